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

import importlib as _importlib
import logging as _logging

from ._version import __version__
from .errors import CVDesignError, InputError, SpecError, TopologyMismatchError

#: Public names and the module each comes from, imported on first use (PEP 562), so that
#: ``import cvdesign.passes`` in a worker process does not pull in scikit-learn, pandas and
#: the pipeline (about 0.9 s of imports).
_LAZY = {
    "LDA": "fit", "HLDA": "fit", "TICA": "fit", "timescales_from_eigenvalues": "fit",
    "vamp2_score": "fit",
    "Source": "io.source",
    "Exploration": "pipeline.explore", "propose_states": "pipeline.explore",
    "Suggestions": "pipeline.suggest", "suggest": "pipeline.suggest",
    "Descriptor": "pool", "Pool": "pool", "build_pool": "pool",
    "show_progress": "progress",
    "Spec": "spec", "load_spec": "spec",
    "Moments": "stats.moments", "DiagonalMoments": "stats.moments",
    "LaggedMoments": "stats.moments", "DiagonalLaggedMoments": "stats.moments",
    "LagAccumulator": "stats.moments",
}


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(_importlib.import_module(f"{__name__}.{module}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


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
