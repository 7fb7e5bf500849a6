"""VAMP-2 score of a set of features, from lagged moments.

The variational approach for Markov processes (Wu and Noé 2020) scores how
well the linear span of a set of features (plus the constant function) can
represent the slow dynamics at a lag ``tau``, without assuming reversibility.
With ``C00``, ``C0t`` and ``Ctt`` the covariances of the earlier frames, across
the lag, and of the later frames (each about its own mean), the whitened
Koopman matrix is

``K = C00^-1/2 C0t Ctt^-1/2``,

its singular values ``s_i`` are the largest possible correlations between a
function of ``x_t`` and one of ``x_{t+tau}``, and the VAMP-2 score is
``1 + sum_i s_i^2``, the 1 being the constant singular function (``s_0 = 1``).
The score only grows with more features on the data it was fitted on, so
comparisons of feature sets should be cross-validated: fit the singular
functions on one part of the data and score them on another
(:func:`vamp2_score` with `test`).

Everything works from :class:`~cvdesign.stats.moments.LaggedMoments`, so the score
of a training block merged from many trajectories and the held-out score of
another block cost a few small matrix operations each.
"""

import numpy as np

from ..stats.moments import LaggedMoments
from ._linalg import _check_rcond, _variance_floor, _warn_dropped, _whitener

__all__ = ["vamp2_score"]


def _check_moments(m, name):
    if not isinstance(m, LaggedMoments):
        raise ValueError(f"{name} must be a LaggedMoments; got {type(m).__name__}")
    if m.count == 0:
        raise ValueError(f"{name} holds no lagged pairs (count=0)")


def vamp2_score(train, test=None, *, k=None, rcond=1e-6):
    """VAMP-2 score of the features, on the training data or cross-validated.

    Parameters
    ----------
    train : LaggedMoments
        Lagged statistics the singular functions are fitted on; its
        non-reversible covariances (each end of the pairs about its own mean)
        are used.
    test : LaggedMoments, default=None
        Independent statistics, at the same lag and of the same features, to
        score the fitted singular functions on. None: score on `train`.
    k : int, default=None
        Number of singular functions (besides the constant one) kept; None
        keeps all that survive the `rcond` cut, at most ``n_features``.
    rcond : float, default=1e-6
        Relative cutoff of small eigenvalues, in [0, 1): constant features, and
        directions of ``C00`` and ``Ctt`` (of `train`; and of the projected test
        covariances) whose eigenvalue on the correlation scale (``D^-1/2 C D^-1/2``,
        ``D = diag C``, each feature's scale rounded to a power of two: independent of
        the features' units) is at most `rcond` times
        the largest, are dropped before inverting, with a
        :class:`~cvdesign.fit.DroppedDirectionsWarning`.

    Returns
    -------
    float
        Dimensionless score, including the constant function. Without `test`:
        ``1 + sum_{i <= k} s_i^2`` with ``s_i`` the singular values of the
        training ``K``. With `test`, the cross-validation formula of Wu and
        Noé (2020):

        ``1 + || (U^T C00' U)^-1/2 (U^T C0t' V) (V^T Ctt' V)^-1/2 ||_F^2``,

        where ``U = C00^-1/2 P_k`` and ``V = Ctt^-1/2 Q_k`` are the first `k`
        left and right singular functions fitted on `train` (``K = P S Q^T``)
        and the primed covariances are those of `test`, about the test means.
        It lies between 1 and ``1 + k`` in both cases.

    Notes
    -----
    When `k` keeps every singular function and nothing is truncated, ``U``
    and ``V`` span all linear functions of the features, and the
    cross-validated score equals the score of `test` on its own (the score is
    invariant under invertible linear maps of the features). Cross-validation
    therefore tells feature sets or models apart only through a `k` smaller
    than the number of features: compare sets at a common `k`.

    Cost: two eigen-decompositions and one SVD of ``n_features``-square
    matrices, ``O(n_features^3)``, whatever the number of frames.

    References
    ----------
    Wu, H. and Noé, F. (2020). Variational approach for learning Markov
    processes from time series data. J. Nonlinear Sci. 30, 23-66.

    Examples
    --------
    >>> import numpy as np
    >>> from scipy.signal import lfilter
    >>> from cvdesign.stats.moments import LaggedMoments
    >>> rng = np.random.default_rng(0)
    >>> x = lfilter([1.0], [1.0, -0.9], rng.normal(size=(20000, 1)), axis=0)  # AR(1)
    >>> train = LaggedMoments.from_series(x[:10000], lag=1)
    >>> test = LaggedMoments.from_series(x[10000:], lag=1)
    >>> round(vamp2_score(train), 1), round(vamp2_score(train, test), 1)  # 1 + 0.9**2
    (1.8, 1.8)
    """
    _check_moments(train, "train")
    rcond = _check_rcond(rcond)
    if test is not None:
        _check_moments(test, "test")
        if test.n_features != train.n_features:
            raise ValueError(f"test has {test.n_features} features; train has {train.n_features}")
        if train.lag is not None and test.lag is not None and train.lag != test.lag:
            raise ValueError(f"test has lag={test.lag}; train has lag={train.lag}")
    _, _, c00, c0t, ctt = train.covariances(reversible=False)
    w0, drop0 = _whitener(c00, rcond, "the training C00", _variance_floor(train, "x"))
    wt, dropt = _whitener(ctt, rcond, "the training Ctt", _variance_floor(train, "y"))
    _warn_dropped(drop0, train.n_features, rcond, "the training C00")
    _warn_dropped(dropt, train.n_features, rcond, "the training Ctt")
    p, s, qt = np.linalg.svd(w0.T @ c0t @ wt)
    n_max = s.shape[0]
    if k is None:
        k = n_max
    elif isinstance(k, (bool, np.bool_)) or not isinstance(k, (int, np.integer)) \
            or not 1 <= k <= n_max:
        raise ValueError(f"k={k!r} must be an integer between 1 and the number of singular "
                         f"functions, {n_max} ({train.n_features} features)")
    k = int(k)
    if test is None:
        return float(1.0 + np.sum(s[:k] ** 2))
    u = w0 @ p[:, :k]
    v = wt @ qt[:k].T
    _, _, d00, d0t, dtt = test.covariances(reversible=False)
    a, drop_a = _whitener(u.T @ d00 @ u, rcond, "the test C00 of the singular functions")
    b, drop_b = _whitener(v.T @ dtt @ v, rcond, "the test Ctt of the singular functions")
    _warn_dropped(drop_a, k, rcond, "the test C00 of the singular functions")
    _warn_dropped(drop_b, k, rcond, "the test Ctt of the singular functions")
    # W_a^T (U^T C0t' V) W_b has the Frobenius norm of the symmetric form
    # (U^T C00' U)^-1/2 (U^T C0t' V) (V^T Ctt' V)^-1/2 (they differ by rotations).
    return float(1.0 + np.sum((a.T @ (u.T @ d0t @ v) @ b) ** 2))
