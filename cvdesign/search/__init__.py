"""Compact linear combinations: greedy forward search, held-out scores, ranking.

All fitting works from per-state, per-fold :class:`~cvdesign.stats.moments.Moments`
of standardized features. Folds are groups of whole trajectories, or
contiguous blocks of frames when a state has a single trajectory, never
random frames: neighbouring frames are correlated, and a random split would
score a combination on frames it has effectively already seen.

A combination of descriptors is scored by cross-validation: for each fold,
LDA is fitted on the other folds and applied to the held-out fold; the Fisher
ratio of the held-out folds pooled is the score, with its jackknife standard
error (:mod:`.objectives` says why pooled, not the mean over the folds).

Modules: :mod:`.folds` (per-fold moments, standardization), :mod:`.objectives`
(``separate``, ``slow``, ``both``; held-out scores), :mod:`.greedy` (forward
search, ranking).
"""

from .folds import (FoldMoments, stacked_state_arrays, standardize_lagged, standardize_moments,
                    state_arrays, within_states)
from .greedy import Combination, greedy_search, rank_combinations
from .objectives import (OBJECTIVES, autocorrelation_along, both_weight, cv_direction,
                         fit_direction, fold_scores, heldout_autocorrelation,
                         heldout_fisher_along, heldout_score, heldout_scores,
                         pooled_autocorrelation, scaled_fold_directions, slow_direction)

__all__ = ["FoldMoments", "Combination", "OBJECTIVES", "heldout_score", "heldout_scores",
           "fold_scores",
           "fit_direction", "slow_direction", "both_weight", "cv_direction",
           "autocorrelation_along", "heldout_fisher_along", "heldout_autocorrelation",
           "scaled_fold_directions", "pooled_autocorrelation",
           "greedy_search", "rank_combinations", "standardize_moments", "standardize_lagged",
           "state_arrays", "stacked_state_arrays", "within_states"]
