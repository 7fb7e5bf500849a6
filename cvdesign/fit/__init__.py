"""Linear fits on mergeable moments: discriminants, TICA, VAMP-2."""

from .discriminant import (HLDA, LDA, TICA, discriminant_directions, fix_signs, rayleigh_quotient,
                           timescales_from_eigenvalues, two_state_direction)
from .vamp import vamp2_score

__all__ = ["LDA", "HLDA", "TICA", "discriminant_directions", "two_state_direction",
           "rayleigh_quotient", "timescales_from_eigenvalues", "fix_signs", "vamp2_score"]
