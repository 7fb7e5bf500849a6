"""Compact linear combinations: greedy forward search, held-out scores, ranking."""

from .objectives import (OBJECTIVES, Combination, FoldMoments, autocorrelation_along, cv_direction,
                         fit_direction, fold_scores, greedy_search, heldout_score,
                         rank_combinations, slow_direction, standardize_lagged,
                         standardize_moments, state_arrays)

__all__ = ["FoldMoments", "Combination", "OBJECTIVES", "heldout_score", "fold_scores",
           "fit_direction", "slow_direction", "cv_direction", "autocorrelation_along",
           "greedy_search", "rank_combinations", "standardize_moments", "standardize_lagged",
           "state_arrays"]
