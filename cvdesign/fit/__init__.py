"""Linear fits on mergeable moments: discriminants of labelled states
(:mod:`.discriminant`: LDA, HLDA), slow linear motions (:mod:`.tica`: TICA,
implied timescales) and the VAMP-2 score (:mod:`.vamp`)."""

from .discriminant import (HLDA, LDA, discriminant_directions, fix_signs, quadratic_forms,
                           rayleigh_quotient, rayleigh_quotients, two_state_direction,
                           two_state_directions)
from .tica import TICA, timescales_from_eigenvalues
from .vamp import vamp2_score

__all__ = ["LDA", "HLDA", "TICA", "discriminant_directions", "two_state_direction",
           "two_state_directions", "rayleigh_quotient", "rayleigh_quotients", "quadratic_forms",
           "timescales_from_eigenvalues", "fix_signs", "vamp2_score"]
