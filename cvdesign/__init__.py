"""cvdesign: collective variables for enhanced sampling, designed from short unbiased runs.

The main entry points:

* :class:`Source` -- a topology and trajectories grouped by state;
* :func:`suggest` -- ranked compact linear CVs and their spec documents;
* :func:`load_spec` -- load a spec and evaluate the CV on coordinates;
* :func:`propose_states` -- metastable states of unlabelled runs, from TICA;
* :class:`LDA`, :class:`HLDA`, :class:`TICA` -- scikit-learn estimators on arrays
  (and from mergeable moments); :func:`vamp2_score`.
"""

from ._version import __version__
from .errors import CVDesignError, InputError, SpecError, TopologyMismatchError
from .fit import HLDA, LDA, TICA, timescales_from_eigenvalues, vamp2_score
from .io.source import Source
from .pipeline.explore import Exploration, propose_states
from .pipeline.suggest import Suggestions, suggest
from .pool import Descriptor, Pool, build_pool
from .spec import Spec, load_spec
from .stats.moments import (DiagonalLaggedMoments, DiagonalMoments, LagAccumulator, LaggedMoments,
                            Moments)

__all__ = [
    "__version__",
    "CVDesignError",
    "InputError",
    "SpecError",
    "TopologyMismatchError",
    "LDA",
    "HLDA",
    "TICA",
    "timescales_from_eigenvalues",
    "vamp2_score",
    "Exploration",
    "propose_states",
    "Moments",
    "DiagonalMoments",
    "LaggedMoments",
    "DiagonalLaggedMoments",
    "LagAccumulator",
    "Suggestions",
    "suggest",
    "Descriptor",
    "Pool",
    "build_pool",
    "Source",
    "Spec",
    "load_spec",
]
