"""Whitening of covariances, shared by :mod:`.tica` and :mod:`.vamp`."""

import warnings

import numpy as np
import scipy.linalg


class DroppedDirectionsWarning(UserWarning):
    """Directions of a covariance were dropped by the `rcond` cut before inverting it.

    Issued by :func:`~cvdesign.fit.slow_modes`, :class:`~cvdesign.fit.TICA` and
    :func:`~cvdesign.fit.vamp2_score`; the pipeline, which says so in its own notes or
    scores thousands of small combinations, ignores it.
    """


def _check_rcond(rcond):
    if isinstance(rcond, (bool, np.bool_)) or not np.isscalar(rcond) \
            or not 0.0 <= float(rcond) < 1.0:
        raise ValueError(f"rcond={rcond!r} must be a number in [0, 1)")
    return float(rcond)


def _whitener(cov, rcond, name="C0", floor=0.0):
    """Whitening matrix of a symmetric covariance, dropping tiny directions.

    Returns ``(W, n_dropped)`` with ``W`` of shape (n, m) such that
    ``W^T cov W = I_m``. The cut is made on the correlation scale, so that it does
    not depend on the units of each feature: features of variance at most `floor`
    (0, or :func:`_variance_floor`: the rounding error of the sums it came from) are
    dropped as constant;
    the others are scaled by ``S = diag(s_i)``, ``s_i`` the power of two nearest to
    ``1 / sqrt(cov_ii)``, and the eigen-directions of ``S cov S`` with eigenvalue at
    most ``rcond`` times the largest are dropped. ``S cov S`` is the correlation
    matrix ``D^-1/2 cov D^-1/2`` (``D = diag(cov)``) with each variance off by a
    factor in [1/2, 2], formed without rounding: features already standardized get
    ``S = I`` and keep their results to the last bit (the pipeline's). Its
    eigenvalues are within a factor of 2 of the correlation matrix's (Ostrowski's
    theorem; Horn and Johnson, *Matrix Analysis*, 1985, sect. 4.5, from memory), so a
    change of units moves the cut by less than a factor of 4 in `rcond`, and not at
    all by a power of two. ``W = S V_m Lambda_m^-1/2`` from the kept eigenpairs
    (zero rows for the constant features); columns are ordered by decreasing
    eigenvalue; ``n_dropped`` counts both kinds (``n - m``).
    """
    cov = np.asarray(cov, dtype=np.float64)
    n = cov.shape[0]
    if not np.isfinite(cov).all():
        raise ValueError(f"{name} holds values that are not finite (NaN or inf)")
    var = np.diag(cov)
    live = var > floor
    if not live.any():
        raise ValueError(
            f"{name} has no positive variance (largest {var.max() if n else 0.0!r}): "
            "the features do not vary"
        )
    # the power of two nearest to 1 / sqrt(var): 1 for var in [1/2, 2]
    scale = np.ldexp(1.0, -np.round(0.5 * np.log2(var[live])).astype(np.int64))
    # standardized features (every scale 1, no constant feature): the matrix as given,
    # not a copy, which LAPACK and the products after it could take in another memory
    # order, so that their results keep their bytes
    unit = bool(live.all() and np.all(scale == 1.0))
    mat = cov if unit else scale[:, None] * cov[np.ix_(live, live)] * scale[None, :]
    evals, evecs = scipy.linalg.eigh(mat)
    top = evals[-1]
    if not top > 0:
        raise ValueError(f"{name} has no positive eigenvalue (largest {top!r}): "
                         "the features do not vary")
    keep = evals > rcond * top
    evals = evals[keep][::-1]
    evecs = evecs[:, keep][:, ::-1]
    if unit:
        return evecs / np.sqrt(evals), n - evals.size
    white = np.zeros((n, evals.size))
    white[live] = scale[:, None] * (evecs / np.sqrt(evals))
    return white, n - evals.size


def _variance_floor(moments, ends="xy"):
    """Variances at or below the rounding error of the sums of `moments` (a
    :class:`~cvdesign.stats.moments.LaggedMoments`), per feature: ``n eps m2``, with
    ``n`` the number of pairs and ``m2`` the mean square about the shift of the ends
    named in `ends` (the larger). ``var = sum_xx / n - a^2`` loses that much to rounding
    at most (a sum of ``n`` terms, then a difference), so a constant feature, whose
    computed variance is such a residue (of either sign), counts as constant: its
    scaling to the correlation scale would make a feature of that noise.
    """
    if not moments.count > 0:
        return 0.0
    squares = [np.diag(getattr(moments, f"sum_{e}{e}")) for e in ends]
    return moments.n_pairs * np.finfo(np.float64).eps * (np.max(squares, axis=0)
                                                          / moments.count)


def _warn_dropped(n_dropped, n_features, rcond, name, stacklevel=3):
    """Warn that `n_dropped` of `n_features` directions of `name` were dropped."""
    if n_dropped:
        warnings.warn(
            f"{n_dropped} of {n_features} directions of {name} dropped: constant features "
            "(a variance within the rounding of its sums), "
            f"or directions whose eigenvalue on the correlation scale is at most "
            f"rcond={rcond!r} times the largest (features that depend linearly on the "
            "others, to within rcond); the fit uses the rest. Remove such features, or "
            "lower rcond to keep them",
            DroppedDirectionsWarning, stacklevel=stacklevel + 1)
