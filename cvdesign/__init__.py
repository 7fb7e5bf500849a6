"""cvdesign: collective variables for enhanced sampling, designed from short unbiased runs.

The main entry points:

* :class:`Source` -- a topology and trajectories grouped by state;
* :func:`suggest` -- ranked compact linear CVs and their spec documents;
* :func:`load_spec` -- load a spec and evaluate the CV on coordinates;
* :class:`LDA` -- Fisher's discriminant analysis as a scikit-learn estimator.
"""

__version__ = "0.1.0"

from .errors import CVDesignError, InputError, SpecError, TopologyMismatchError  # noqa: E402
from .estimators import LDA  # noqa: E402
from .moments import DiagonalMoments, Moments  # noqa: E402
from .pipeline import Suggestions, suggest  # noqa: E402
from .pool import Descriptor, Pool, build_pool  # noqa: E402
from .source import Source  # noqa: E402
from .spec import Spec, load_spec  # noqa: E402

__all__ = [
    "__version__",
    "CVDesignError",
    "InputError",
    "SpecError",
    "TopologyMismatchError",
    "LDA",
    "Moments",
    "DiagonalMoments",
    "Suggestions",
    "suggest",
    "Descriptor",
    "Pool",
    "build_pool",
    "Source",
    "Spec",
    "load_spec",
]
