"""Mergeable statistics: moments and lagged moments (:mod:`.moments`), the block
bootstrap over mergeable blocks (:mod:`.bootstrap`)."""

from .bootstrap import (ArraySum, BootstrapResult, StackedSums, block_bootstrap, hull_interval,
                        merge_blocks, percentile_interval)
from .moments import (DiagonalLaggedMoments, DiagonalMoments, LagAccumulator, LaggedMoments,
                      Moments, merge_all)

__all__ = ["Moments", "DiagonalMoments", "merge_all", "LaggedMoments", "DiagonalLaggedMoments",
           "LagAccumulator", "ArraySum", "StackedSums", "merge_blocks", "block_bootstrap",
           "BootstrapResult", "percentile_interval", "hull_interval"]
