"""The pass engine: every statistic over trajectories as map / merge / finish over leaves.

See :mod:`cvdesign.passes.engine` (leaves, tasks, running a pass),
:mod:`cvdesign.passes.tree` (the fixed reduction tree),
:mod:`cvdesign.passes.keys` (frame keys: state, rank, fold, block),
:mod:`cvdesign.passes.read` (raw reading through mdtraj's file objects) and
:mod:`cvdesign.passes.stats` (the concrete passes). Executors live in
:mod:`cvdesign.parallel`.
"""

from .engine import (FEATURE_BUDGET, LEAF_FRAMES, LEAF_VALUES, MAX_LEAF_FRAMES,
                     CoordinateFeaturizer, Featurizer, Leaf, Pass, PoolFeaturizer, Task,
                     TaskPlan, first_frame, leaf_frames_for, plan_tasks, reference_features,
                     run_pass, run_task)
from .keys import (MIN_FRAMES_PER_FOLD, Folds, FrameKeys, SegmentLayout, frame_keys,
                   thinning_stride)
from .stats import (BlockPass, CardPass, CardSums, FeaturePass, FoldMomentsPass, HistogramPass,
                    LagGridPass, LaggedPass, LaggedResult, ProjectionRangePass, ScreeningPass,
                    ScreeningResult, group_rows, merge_keyed)
from .tree import TreeReducer, merge_optional

__all__ = ["LEAF_FRAMES", "MAX_LEAF_FRAMES", "LEAF_VALUES", "FEATURE_BUDGET", "Featurizer",
           "PoolFeaturizer", "CoordinateFeaturizer", "Pass", "Leaf", "Task", "TaskPlan",
           "plan_tasks", "leaf_frames_for", "run_pass", "run_task", "first_frame",
           "reference_features", "SegmentLayout", "Folds", "FrameKeys", "frame_keys",
           "MIN_FRAMES_PER_FOLD", "thinning_stride", "FeaturePass", "group_rows",
           "ScreeningPass", "ScreeningResult", "FoldMomentsPass", "LaggedPass", "LaggedResult",
           "LagGridPass", "HistogramPass", "ProjectionRangePass", "BlockPass", "CardPass",
           "CardSums", "merge_keyed", "TreeReducer", "merge_optional"]
