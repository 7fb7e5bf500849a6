"""cvdesign: collective variables for enhanced sampling, designed from short unbiased runs.

The main entry points:

* :class:`Source` -- a topology and trajectories grouped by state;
* :func:`suggest` -- ranked compact linear CVs and their spec documents;
* :func:`load_spec` -- load a spec and evaluate the CV on coordinates;
* :func:`propose_states` -- metastable states of unlabelled runs, from TICA;
* :class:`LDA`, :class:`HLDA`, :class:`TICA` -- scikit-learn estimators on arrays
  (and from mergeable moments); :func:`vamp2_score`;
* :func:`show_progress` -- progress bars of the passes and the bootstrap in a ``with`` block.

The library prints nothing: it reports what it does through the ``cvdesign``
logger (:mod:`logging`, silent until the application configures logging, e.g.
``logging.basicConfig(level=logging.INFO)``), and draws progress bars only
inside :func:`show_progress`.
"""

import logging as _logging

from ._version import __version__
from .errors import CVDesignError, InputError, SpecError, TopologyMismatchError
from .fit import HLDA, LDA, TICA, timescales_from_eigenvalues, vamp2_score
from .io.source import Source
from .pipeline.explore import Exploration, propose_states
from .pipeline.suggest import Suggestions, suggest
from .pool import Descriptor, Pool, build_pool
from .progress import show_progress
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
    "show_progress",
]

# silent by default: with a NullHandler on the package's logger, nothing is printed unless the
# application adds a handler of its own (otherwise Python's last-resort handler would print
# warnings on standard error)
_logging.getLogger(__name__).addHandler(_logging.NullHandler())
