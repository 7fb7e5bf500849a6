"""Scores of single descriptors: Fisher ratio, histograms and overlap
(:mod:`.univariate`), the redundancy graph (:mod:`.redundancy`), score-card
intervals (:mod:`.card`)."""

from .card import (CARD_BUDGET_BYTES, CARD_LAG_FIELDS, MAX_CARD_BLOCKS, MIN_CARD_BLOCKS,
                   card_intervals, integrated_time_interval, plan_card_blocks)
from .redundancy import descriptor_correlation, redundancy_graph, representatives
from .univariate import Histograms, fisher_ratio, overlap_coefficient

__all__ = ["fisher_ratio", "Histograms", "overlap_coefficient", "descriptor_correlation",
           "redundancy_graph", "representatives", "plan_card_blocks",
           "card_intervals", "integrated_time_interval", "CARD_BUDGET_BYTES",
           "MIN_CARD_BLOCKS", "MAX_CARD_BLOCKS", "CARD_LAG_FIELDS"]
