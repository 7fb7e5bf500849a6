"""Whitening of covariances, shared by :mod:`.tica` and :mod:`.vamp`."""

import numpy as np
import scipy.linalg


def _check_rcond(rcond):
    if isinstance(rcond, (bool, np.bool_)) or not np.isscalar(rcond) \
            or not 0.0 <= float(rcond) < 1.0:
        raise ValueError(f"rcond={rcond!r} must be a number in [0, 1)")
    return float(rcond)


def _whitener(cov, rcond, name="C0"):
    """Whitening matrix of a symmetric covariance, dropping tiny directions.

    Returns ``(W, n_dropped)`` with ``W`` of shape (n, m) such that
    ``W^T cov W = I_m``; the eigen-directions of `cov` with eigenvalue at most
    ``rcond`` times the largest are dropped. Columns are ordered by
    decreasing variance.
    """
    evals, evecs = scipy.linalg.eigh(cov)
    top = evals[-1] if evals.size else 0.0
    if not top > 0:
        raise ValueError(
            f"{name} has no positive eigenvalue (largest {top!r}): the features do not vary"
        )
    keep = evals > rcond * top
    evals = evals[keep][::-1]
    evecs = evecs[:, keep][:, ::-1]
    return evecs / np.sqrt(evals), int(np.count_nonzero(~keep))
