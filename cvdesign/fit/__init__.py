"""Linear fits on mergeable moments: discriminants of labelled states
(:mod:`.discriminant`: LDA, HLDA), slow linear motions (:mod:`.tica`: TICA,
implied timescales) and the VAMP-2 score (:mod:`.vamp`).

The functions come from modules without scikit-learn (:mod:`.directions`,
:mod:`.slowmodes`, :mod:`.vamp`) and are imported with the package; the estimators
:class:`LDA`, :class:`HLDA` and :class:`TICA` derive from scikit-learn's base classes and
load on first use (PEP 562, as :mod:`cvdesign` does), so that ``suggest``, which needs
only the functions, and its worker processes do not import scikit-learn (about 0.65 s).
"""

import importlib as _importlib

from .directions import (discriminant_directions, fix_signs, quadratic_forms, rayleigh_quotient,
                         rayleigh_quotients, two_state_direction, two_state_directions)
from ._linalg import DroppedDirectionsWarning
from .slowmodes import (MIN_PAIRS_PER_FEATURE, FewPairsWarning, SlowModes, few_pairs_text,
                        slow_modes, timescales_from_eigenvalues)
from .vamp import vamp2_score

#: The estimators and their modules, imported on first use (they import scikit-learn).
_LAZY = {"LDA": "discriminant", "HLDA": "discriminant", "TICA": "tica"}


def __getattr__(name):
    if name in ("discriminant", "tica"):  # the estimators' modules, as attributes too
        return _importlib.import_module(f"{__name__}.{name}")
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(_importlib.import_module(f"{__name__}.{module}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


__all__ = ["LDA", "HLDA", "TICA", "discriminant_directions", "two_state_direction",
           "two_state_directions", "rayleigh_quotient", "rayleigh_quotients", "quadratic_forms",
           "timescales_from_eigenvalues", "fix_signs", "vamp2_score", "slow_modes", "SlowModes",
           "DroppedDirectionsWarning", "FewPairsWarning", "few_pairs_text",
           "MIN_PAIRS_PER_FEATURE"]
