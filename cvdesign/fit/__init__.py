"""Linear fits on mergeable moments: discriminants of labelled states
(:mod:`.discriminant`: LDA, HLDA), slow linear motions (:mod:`.tica`: TICA,
implied timescales) and the VAMP-2 score (:mod:`.vamp`)."""

from .discriminant import (HLDA, LDA, discriminant_directions, fix_signs, rayleigh_quotient,
                           two_state_direction)
from .tica import TICA, timescales_from_eigenvalues
from .vamp import vamp2_score

__all__ = ["LDA", "HLDA", "TICA", "discriminant_directions", "two_state_direction",
           "rayleigh_quotient", "timescales_from_eigenvalues", "fix_signs", "vamp2_score"]
