"""Compact linear combinations: greedy forward search, held-out scores, ranking.

All fitting works from per-state, per-fold :class:`~cvdesign.stats.moments.Moments`
of standardized features. Folds are groups of whole trajectories, or
contiguous blocks of frames when a state has a single trajectory, never
random frames: neighbouring frames are correlated, and a random split would
score a combination on frames it has effectively already seen.

A combination of descriptors is scored by cross-validation: for each fold,
LDA is fitted on the other folds and the Fisher ratio of its first direction
is measured on the held-out fold; the score is the mean over folds, with its
standard error.

Modules: :mod:`.folds` (per-fold moments, standardization), :mod:`.objectives`
(``separate``, ``slow``, ``both``; held-out scores), :mod:`.greedy` (forward
search, ranking).
"""

from .folds import (FoldMoments, stacked_state_arrays, standardize_lagged, standardize_moments,
                    state_arrays, within_states)
from .greedy import Combination, greedy_search, rank_combinations
from .objectives import (OBJECTIVES, autocorrelation_along, both_weight, cv_direction,
                         fit_direction, fold_scores, heldout_score, heldout_scores,
                         slow_direction)

__all__ = ["FoldMoments", "Combination", "OBJECTIVES", "heldout_score", "heldout_scores",
           "fold_scores",
           "fit_direction", "slow_direction", "both_weight", "cv_direction",
           "autocorrelation_along",
           "greedy_search", "rank_combinations", "standardize_moments", "standardize_lagged",
           "state_arrays", "stacked_state_arrays", "within_states"]
