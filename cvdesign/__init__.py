"""cvdesign: collective variables for enhanced sampling, designed from short unbiased runs.

The main entry points:

* :class:`Source` -- a topology and trajectories grouped by state;
* :func:`suggest` -- ranked compact linear CVs and their spec documents;
* :func:`load_spec` -- load a spec and evaluate the CV on coordinates;
* :func:`propose_states` -- metastable states of unlabelled runs, from TICA;
* :class:`LDA`, :class:`HLDA`, :class:`TICA` -- scikit-learn estimators on arrays
  (and from mergeable moments); :func:`vamp2_score`.
"""

__version__ = "0.1.0"

from .errors import CVDesignError, InputError, SpecError, TopologyMismatchError  # noqa: E402
from .estimators import HLDA, LDA, TICA, timescales_from_eigenvalues  # noqa: E402
from .explore import Exploration, propose_states  # noqa: E402
from .moments import (  # noqa: E402
    DiagonalLaggedMoments,
    DiagonalMoments,
    LagAccumulator,
    LaggedMoments,
    Moments,
)
from .pipeline import Suggestions, suggest  # noqa: E402
from .pool import Descriptor, Pool, build_pool  # noqa: E402
from .source import Source  # noqa: E402
from .spec import Spec, load_spec  # noqa: E402
from .vamp import vamp2_score  # noqa: E402

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
