"""Discriminant directions and Fisher ratios from per-state means and covariances.

The arithmetic behind :class:`~cvdesign.fit.discriminant.LDA` and
:class:`~cvdesign.fit.discriminant.HLDA`, on plain arrays (numpy and SciPy only, no
scikit-learn, so that ``suggest`` and its worker processes do not import it): the
generalized eigenproblem ``S_b w = lambda S_w w`` of between-state and within-state
scatter (Fisher 1936; Rao 1948; with the harmonic within-state scatter of Mendels,
Piccini and Parrinello 2018), the two-state direction by linear solves, one at a time
and stacked, Rayleigh quotients, quadratic forms and sign fixing.
"""

import numpy as np
import scipy.linalg
from scipy.linalg.lapack import dpotrf as _dpotrf
from scipy.linalg.lapack import dpotrs as _dpotrs

__all__ = ["discriminant_directions", "two_state_direction", "two_state_directions",
           "rayleigh_quotient", "rayleigh_quotients", "quadratic_forms", "fix_signs"]


_WITHIN = ("arithmetic", "harmonic")


def fix_signs(vectors):
    """Flip columns so that each column's largest-magnitude entry is positive.

    Makes eigenvectors, and every file written from them, reproducible.

    Parameters
    ----------
    vectors : ndarray of shape (n_features, n_vectors)

    Returns
    -------
    ndarray of shape (n_features, n_vectors)

    Examples
    --------
    >>> import numpy as np
    >>> fix_signs(np.array([[1.0, 0.2], [-3.0, 0.1]])).tolist()
    [[-1.0, 0.2], [3.0, 0.1]]
    """
    vectors = np.array(vectors, dtype=np.float64, copy=True)
    if vectors.size == 0:
        return vectors
    idx = np.argmax(np.abs(vectors), axis=0)
    signs = np.sign(vectors[idx, np.arange(vectors.shape[1])])
    signs[signs == 0] = 1.0
    return vectors * signs


def _check_within(within):
    if within not in _WITHIN:
        raise ValueError(f"within={within!r} must be 'arithmetic' or 'harmonic'")


def _check_shrinkage(shrinkage):
    if not 0.0 <= shrinkage <= 1.0:
        raise ValueError(f"shrinkage={shrinkage!r} must be between 0 and 1")


def _between(means, priors):
    grand = priors @ means
    centered = means - grand
    return (centered * priors[:, None]).T @ centered


def _regularize(within, shrinkage):
    p = within.shape[0]
    if p == 0:
        return within
    target = np.trace(within) / p
    if not np.isfinite(target) or target <= 0:
        target = 1.0
    out = (1.0 - shrinkage) * within
    out[np.diag_indices(p)] += shrinkage * target  # + shrinkage * target * I
    return out


#: Relative size of the ridge added to a singular matrix before it is inverted or
#: factored, on the correlation scale (see :func:`_ridge`).
_RIDGE = 1e-10


def _ridge(matrix):
    """`matrix` shrunk by :data:`_RIDGE` toward its own diagonal: ``(1 - r) M + r D``.

    On the correlation scale (``D^-1/2 M D^-1/2``) this is the shrinkage toward the
    identity by ``r``, so the fallback does not depend on the units of each feature
    (a ridge relative to the trace, ``r tr / p``, swamps the variance of a feature in
    small units beside one in large units). A zero diagonal entry (a constant
    feature, whose row and column are zero) takes the largest diagonal entry (1
    when every entry is zero), which keeps it apart from the others.
    """
    p = matrix.shape[0]
    diag = np.diag(matrix).copy()
    live = np.isfinite(diag) & (diag > 0)
    fill = diag[live].max() if live.any() else 1.0
    out = (1.0 - _RIDGE) * matrix
    out[np.diag_indices(p)] += _RIDGE * np.where(live, diag, fill)
    return out


def _cholesky(matrix):
    """Upper Cholesky factor (LAPACK ``dpotrf``, as ``scipy.linalg.cho_factor``), with the
    ridge fallback: when `matrix` is not positive definite it is shrunk by 1e-10 toward
    its own diagonal first (:func:`_ridge`, the same fallback as LDA's).

    The LAPACK routines are called directly: the searches solve tens of thousands of
    small systems, where scipy's wrappers cost more than the arithmetic.
    """
    matrix = np.asarray(matrix, dtype=np.float64)
    if not np.isfinite(matrix).all():
        raise ValueError("array must not contain infs or NaNs")
    c, info = _dpotrf(matrix, lower=0, clean=0)
    if info > 0:
        c, info = _dpotrf(_ridge(matrix), lower=0, clean=0)
        if info > 0:
            raise np.linalg.LinAlgError(f"{info}-th leading minor of the array is not "
                                        "positive definite")
    if info < 0:
        raise ValueError(f"illegal value in argument {-info} of LAPACK potrf")
    return c


def _cho_solve(factor, rhs):
    rhs = np.asarray(rhs, dtype=np.float64)
    if not np.isfinite(rhs).all():
        raise ValueError("array must not contain infs or NaNs")
    x, info = _dpotrs(factor, rhs, lower=0)
    if info != 0:
        raise ValueError(f"illegal value in argument {-info} of LAPACK potrs")
    return x


def _spd_inverse(matrix):
    """Inverse of a symmetric positive definite matrix; a ridge if it is singular
    (see :func:`_cholesky`)."""
    p = matrix.shape[0]
    if p == 0:
        return np.zeros((0, 0))
    inv = _cho_solve(_cholesky(matrix), np.eye(p))
    return 0.5 * (inv + inv.T)


def _spd_solve(matrix, rhs):
    """Solve ``matrix x = rhs`` for a symmetric positive definite matrix (Cholesky),
    with the same ridge fallback as :func:`_spd_inverse` when it is singular."""
    if np.shape(matrix)[0] == 0:
        return np.zeros(np.shape(rhs))
    return _cho_solve(_cholesky(matrix), rhs)


def two_state_direction(means, covariances, priors, *, shrinkage=0.0, within="arithmetic"):
    """The discriminant direction of two states, by linear solves instead of an eigenproblem.

    With two states the between-state scatter ``S_b = p_0 p_1 d d^T`` (``d = mu_1 -
    mu_0``) has rank one, so the first solution of ``S_b w = lambda S_w w`` is ``w
    proportional to S_w^-1 d`` (Fisher 1936; Duda, Hart and Stork, *Pattern
    Classification*, 2001, sect. 3.8). For HLDA, ``S_w^-1 = sum_k p_k Sigma_k^-1``, so
    ``w`` is a prior-weighted sum of one solve per state. Regularization as in
    :func:`discriminant_directions`.

    Parameters
    ----------
    means : array-like of shape (2, n_features)
    covariances : array-like of shape (2, n_features, n_features)
    priors : array-like of shape (2,)
    shrinkage : float, default=0.0
    within : {'arithmetic', 'harmonic'}, default='arithmetic'

    Returns
    -------
    ndarray of shape (n_features,) or None
        Unit-length direction, sign fixed as by :func:`fix_signs`; None when the two
        means coincide (no direction is preferred).

    Examples
    --------
    >>> import numpy as np
    >>> two_state_direction([[0.0, 0.0], [1.0, 1.0]], [np.eye(2), np.diag([1.0, 4.0])],  # S_w = diag(1, 2.5)
    ...                     [0.5, 0.5]).round(6).tolist()
    [0.928477, 0.371391]
    """
    _check_shrinkage(shrinkage)
    _check_within(within)
    means = np.asarray(means, dtype=np.float64)
    priors = np.asarray(priors, dtype=np.float64)
    d = means[1] - means[0]
    if not np.any(d):
        return None
    if within == "harmonic":
        w = np.zeros_like(d)
        for pk, cov in zip(priors, np.asarray(covariances, dtype=np.float64)):
            if pk:
                w += pk * _spd_solve(_regularize(cov, shrinkage) if shrinkage > 0 else cov, d)
    else:
        w = _spd_solve(_within_scatter(covariances, priors, within, shrinkage), d)
    norm = np.linalg.norm(w)
    if not (norm > 0 and np.isfinite(norm)):
        return None
    return fix_signs((w / norm)[:, None])[:, 0]


def _regularize_stack(matrices, shrinkage):
    """:func:`_regularize` of every matrix of a stack (..., p, p)."""
    p = matrices.shape[-1]
    target = np.trace(matrices, axis1=-2, axis2=-1) / p
    target = np.where(np.isfinite(target) & (target > 0), target, 1.0)
    out = (1.0 - shrinkage) * matrices
    diag = np.arange(p)
    out[..., diag, diag] += shrinkage * target[..., None]
    return out


#: Smallest squared ratio of the smallest to the largest pivot of a Cholesky factor that
#: the stacked solves take (a matrix below it has a condition number above 1e10; not
#: every matrix above that is caught, as with any pivot test): a matrix closer to singular
#: goes to the one-at-a-time path, whose LAPACK Cholesky decides on its ridge fallback
#: (numpy's and scipy's Cholesky can disagree on a matrix that is singular to rounding,
#: and an LU solve of one can fail).
_PIVOT_RATIO = 1e-10


def _well_conditioned(matrices):
    """Which matrices of a stack (..., p, p) are safely positive definite: a Cholesky
    factor whose squared pivots are all above :data:`_PIVOT_RATIO` times the largest
    (bool array (...))."""
    def ok_of(factor):
        pivots = np.diagonal(factor, axis1=-2, axis2=-1) ** 2
        return pivots.min(axis=-1) > _PIVOT_RATIO * pivots.max(axis=-1)

    try:
        return ok_of(np.linalg.cholesky(matrices))
    except np.linalg.LinAlgError:  # rare: find which, one by one
        flat = matrices.reshape(-1, *matrices.shape[-2:])
        ok = np.zeros(flat.shape[0], dtype=bool)
        for i, m in enumerate(flat):
            try:
                ok[i] = ok_of(np.linalg.cholesky(m))
            except np.linalg.LinAlgError:
                pass
        return ok.reshape(matrices.shape[:-2])


def _solve_stack(matrices, rhs):
    """``np.linalg.solve`` of a stack (..., p, p) with right-hand sides (..., p); NaN rows
    where a matrix is singular after all (then the caller falls back)."""
    try:
        return np.linalg.solve(matrices, rhs[..., None])[..., 0]
    except np.linalg.LinAlgError:
        flat_m = matrices.reshape(-1, *matrices.shape[-2:])
        flat_r = np.broadcast_to(rhs, matrices.shape[:-1]).reshape(-1, matrices.shape[-1])
        out = np.full(flat_r.shape, np.nan)
        for i, (m, r) in enumerate(zip(flat_m, flat_r)):
            try:
                out[i] = np.linalg.solve(m, r)
            except np.linalg.LinAlgError:
                pass
        return out.reshape(matrices.shape[:-1])


def two_state_directions(means, covariances, priors, *, shrinkage=0.0, within="arithmetic"):
    """:func:`two_state_direction` for a stack of problems at once.

    The searches score thousands of small combinations; one call here replaces a
    Python-level call (and two LAPACK calls) per combination and fold. The
    arithmetic is the same; the linear solves use LU on the matrices that Cholesky
    showed safely positive definite, so results agree with :func:`two_state_direction`
    to rounding (1e-13 to 1e-11 relative), not bit for bit; the rest is flagged in `ok`.

    Parameters
    ----------
    means : array-like of shape (..., 2, n_features)
    covariances : array-like of shape (..., 2, n_features, n_features)
    priors : array-like of shape (2,)
    shrinkage : float, default=0.0
    within : {'arithmetic', 'harmonic'}, default='arithmetic'

    Returns
    -------
    directions : ndarray of shape (..., n_features)
        Unit-length directions, signs fixed as by :func:`fix_signs`; NaN where `ok` is
        False.
    ok : ndarray of bool, shape (...)
        False where :func:`two_state_direction` would return None (coincident means),
        where a matrix to solve with is not positive definite or close to singular
        (pivots of its Cholesky factor, squared, below 1e-10 times the largest: there
        the one-at-a-time function decides on its ridge fallback), or where the input
        is not finite: call :func:`two_state_direction` for those problems.

    Examples
    --------
    >>> import numpy as np
    >>> means = np.array([[[0.0, 0.0], [1.0, 1.0]], [[0.0, 0.0], [0.0, 0.0]]])
    >>> covs = np.broadcast_to(np.eye(2), (2, 2, 2, 2))
    >>> w, ok = two_state_directions(means, covs, [0.5, 0.5])
    >>> np.round(w[0], 6).tolist(), ok.tolist()  # the second pair of means coincides
    ([0.707107, 0.707107], [True, False])
    """
    _check_shrinkage(shrinkage)
    _check_within(within)
    means = np.asarray(means, dtype=np.float64)
    covs = np.asarray(covariances, dtype=np.float64)
    priors = np.asarray(priors, dtype=np.float64)
    p = means.shape[-1]
    d = means[..., 1, :] - means[..., 0, :]
    if within == "harmonic":
        use = np.flatnonzero(priors)
        mats = covs[..., use, :, :]
        mats = _regularize_stack(mats, shrinkage) if shrinkage > 0 else mats
        rhs = np.broadcast_to(d[..., None, :], mats.shape[:-1])
        ok = np.isfinite(mats).all(axis=(-3, -2, -1))
    else:
        mats = priors[0] * covs[..., 0, :, :] + priors[1] * covs[..., 1, :, :]
        mats = _regularize_stack(mats, shrinkage) if shrinkage > 0 else mats
        rhs = d
        ok = np.isfinite(mats).all(axis=(-2, -1))
    ok &= np.isfinite(d).all(axis=-1) & np.any(d != 0, axis=-1)
    okm = ok[..., None] if within == "harmonic" else ok
    safe = np.where(okm[..., None, None], mats, np.eye(p))  # masked problems solve trivially
    pd = _well_conditioned(safe)
    ok &= pd.all(axis=-1) if within == "harmonic" else pd
    okm = ok[..., None] if within == "harmonic" else ok
    safe = np.where(okm[..., None, None], safe, np.eye(p))
    x = _solve_stack(safe, rhs)
    w = (x * priors[use][:, None]).sum(axis=-2) if within == "harmonic" else x
    norm = np.linalg.norm(w, axis=-1)
    ok &= (norm > 0) & np.isfinite(norm)
    w = w / np.where(ok, norm, 1.0)[..., None]
    big = np.take_along_axis(w, np.argmax(np.abs(w), axis=-1)[..., None], axis=-1)
    w = w * np.where(big < 0, -1.0, 1.0)
    w[~ok] = np.nan
    return w, ok


def quadratic_forms(w, matrices):
    """``w^T M w`` for stacks of vectors and matrices (broadcast), element by element.

    Only elementwise products and sums along the last axis: each value is the same
    whatever else is in the stack (a stacked matrix product or ``einsum`` may take
    another summation order for another stack shape).

    Parameters
    ----------
    w : array-like of shape (..., n)
    matrices : array-like of shape (..., n, n)

    Returns
    -------
    ndarray of shape (...)

    Examples
    --------
    >>> quadratic_forms([[1.0, 2.0]], [[[2.0, 0.0], [0.0, 3.0]]]).tolist()
    [14.0]
    """
    w = np.asarray(w, dtype=np.float64)
    return ((np.asarray(matrices, dtype=np.float64) * w[..., None, :]).sum(axis=-1)
            * w).sum(axis=-1)


def rayleigh_quotients(w, means, covariances, priors):
    """:func:`rayleigh_quotient` (arithmetic within-state scatter, no shrinkage) for a
    stack of directions at once.

    Parameters
    ----------
    w : array-like of shape (..., n_features)
    means : array-like of shape (..., n_states, n_features)
    covariances : array-like of shape (..., n_states, n_features, n_features)
    priors : array-like of shape (n_states,)

    Returns
    -------
    ndarray of shape (...)
        ``(w^T S_b w) / (w^T S_w w)`` (dimensionless), computed as
        ``sum_k p_k (w . (mu_k - mu))^2 / sum_k p_k w^T Sigma_k w``; ``inf`` where the
        within-state variance is zero (or below) and the between-state one is not, 0
        where both are, NaN where either is NaN (moments without frames), as
        :func:`rayleigh_quotient`.

    Examples
    --------
    >>> rayleigh_quotients([[1.0], [2.0]], [[[0.0], [2.0]]] * 2, [[[[1.0]], [[1.0]]]] * 2,
    ...                    [0.5, 0.5]).tolist()
    [1.0, 1.0]
    """
    w = np.asarray(w, dtype=np.float64)
    means = np.asarray(means, dtype=np.float64)
    covs = np.asarray(covariances, dtype=np.float64)
    priors = np.asarray(priors, dtype=np.float64)
    proj = (means * w[..., None, :]).sum(axis=-1)  # (..., n_states)
    centred = proj - (proj * priors).sum(axis=-1, keepdims=True)
    num = (priors * centred ** 2).sum(axis=-1)
    den = (priors * quadratic_forms(w[..., None, :], covs)).sum(axis=-1)
    return _ratio(num, den)


def _harmonic_within(covariances, priors, shrinkage):
    """``S_w = (sum_k p_k Sigma_k^-1)^-1``, each Sigma_k shrunk first when asked."""
    covariances = np.asarray(covariances, dtype=np.float64)
    p = covariances.shape[-1]
    precision = np.zeros((p, p))
    for pk, cov in zip(priors, covariances):
        if pk == 0:
            continue
        cov = _regularize(cov, shrinkage) if shrinkage > 0 else cov
        precision += pk * _spd_inverse(cov)
    return _spd_inverse(precision)


def _within_scatter(covariances, priors, within, shrinkage):
    """Within-state scatter as used in the eigenproblem (regularized)."""
    if within == "harmonic":
        return _harmonic_within(covariances, priors, shrinkage)
    pooled = np.tensordot(priors, np.asarray(covariances, dtype=np.float64), axes=1)
    return _regularize(pooled, shrinkage) if shrinkage > 0 else pooled


def discriminant_directions(means, covariances, priors, *, shrinkage=0.0, within="arithmetic"):
    """Fisher discriminant directions from per-state means and covariances.

    Solves ``S_b w = lambda S_w w`` with ``S_b = sum_k p_k (mu_k - mu)(mu_k - mu)^T``,
    ``mu = sum_k p_k mu_k`` and, by default, ``S_w = sum_k p_k Sigma_k``.

    Parameters
    ----------
    means : array-like of shape (n_states, n_features)
        Per-state feature means.
    covariances : array-like of shape (n_states, n_features, n_features)
        Per-state feature covariances.
    priors : array-like of shape (n_states,)
        State weights, summing to 1.
    shrinkage : float, default=0.0
        Regularization in [0, 1]. With ``within='arithmetic'``, ``S_w`` is
        replaced by ``(1 - shrinkage) S_w + shrinkage (tr S_w / p) I``, which
        keeps the problem well posed when ``S_w`` is singular (constant or
        exactly dependent features). With ``within='harmonic'`` the same
        shrinkage is applied to each ``Sigma_k`` before it is inverted. When
        a matrix to invert or ``S_w`` is singular, it is shrunk by 1e-10
        toward its own diagonal, ``(1 - 1e-10) M + 1e-10 diag(M)`` (a ridge on
        the correlation scale, independent of the features' units; a constant
        feature's zero variance is replaced by the largest variance) instead of
        failing.
    within : {'arithmetic', 'harmonic'}, default='arithmetic'
        Within-state scatter: ``'arithmetic'``, the prior-weighted mean
        ``sum_k p_k Sigma_k`` (LDA); ``'harmonic'``, the prior-weighted
        harmonic mean ``S_w = (sum_k p_k Sigma_k^-1)^-1`` (HLDA, Mendels,
        Piccini and Parrinello 2018). Both equal ``Sigma`` when every state
        has the same covariance ``Sigma``.

    Returns
    -------
    eigenvalues : ndarray of shape (n_features,)
        Fisher ratios of the directions, largest first (dimensionless): each
        is :func:`rayleigh_quotient` of its direction on ``S_b`` and ``S_w``
        as defined here (with `shrinkage`, and for ``'harmonic'`` with the
        ridges of the inverses above), also when ``S_w`` itself was singular
        and the directions were found with the ridge: then a direction
        without within-state variance that separates the states has ratio
        ``inf``.
    directions : ndarray of shape (n_features, n_features)
        Columns are the directions, normalized to unit length, signs fixed by
        :func:`fix_signs`.

    Examples
    --------
    >>> import numpy as np
    >>> ev, w = discriminant_directions([[0.0, 0.0], [2.0, 0.0]],
    ...                                 [np.eye(2), np.eye(2)], [0.5, 0.5])
    >>> round(float(ev[0]), 6), np.round(w[:, 0], 6).tolist()
    (1.0, [1.0, 0.0])
    >>> covs = [np.diag([1.0, 1.0]), np.diag([1.0, 100.0])]
    >>> _, w = discriminant_directions([[0.0, 0.0], [1.0, 1.0]], covs, [0.5, 0.5],
    ...                                within="harmonic")
    >>> np.round(w[:, 0] / w[0, 0], 4).tolist()  # (Sigma_A^-1 + Sigma_B^-1)(mu_B - mu_A)
    [1.0, 0.505]
    """
    _check_shrinkage(shrinkage)
    _check_within(within)
    means = np.asarray(means, dtype=np.float64)
    priors = np.asarray(priors, dtype=np.float64)
    between = _between(means, priors)
    within = _within_scatter(covariances, priors, within, shrinkage)
    try:
        evals, evecs = scipy.linalg.eigh(between, within)
    except np.linalg.LinAlgError:
        evals, evecs = scipy.linalg.eigh(between, _ridge(within))
        # the ratios of the directions found, on the scatter before the ridge (inf along
        # a direction without within-state variance that separates the states)
        evals = _quotients(evecs, between, within)
    order = np.argsort(-evals, kind="stable")
    evals = evals[order]
    evecs = evecs[:, order]
    norms = np.linalg.norm(evecs, axis=0)
    norms[norms == 0] = 1.0
    return evals, fix_signs(evecs / norms)


def _ratio(num, den):
    """``num / den``, inf where only the numerator is positive and 0 where neither is (a
    direction without within-state spread), NaN where either is NaN: the Fisher ratios'
    convention."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = num / den
    return np.where(den <= 0, np.where(num > 0, np.inf, 0.0), out)


def _quotients(vectors, between, within):
    """``(w^T S_b w) / (w^T S_w w)`` of each column `w` of `vectors`, as
    :func:`rayleigh_quotient` (inf where only the numerator is positive, 0 where
    neither is)."""
    num = np.einsum("ij,ik,kj->j", vectors, between, vectors)
    den = np.einsum("ij,ik,kj->j", vectors, within, vectors)
    return _ratio(num, den)


def rayleigh_quotient(w, means, covariances, priors, *, within="arithmetic", shrinkage=0.0):
    """Fisher ratio of a direction: between-state over within-state variance.

    Parameters
    ----------
    w : array-like of shape (n_features,)
        Direction in feature space.
    means, covariances, priors
        As in :func:`discriminant_directions`.
    within : {'arithmetic', 'harmonic'}, default='arithmetic'
        Within-state scatter, as in :func:`discriminant_directions`.
    shrinkage : float, default=0.0
        Regularization of the within-state scatter, as in
        :func:`discriminant_directions` (none by default: the ratio is then
        measured on the covariances as given).

    Returns
    -------
    float
        ``(w^T S_b w) / (w^T S_w w)`` (dimensionless); ``inf`` when the
        within-state variance along `w` is zero and the between-state one is not.

    Examples
    --------
    >>> import numpy as np
    >>> rayleigh_quotient([1.0], [[0.0], [2.0]], [[[1.0]], [[1.0]]], [0.5, 0.5])
    1.0
    >>> round(rayleigh_quotient([1.0], [[0.0], [2.0]], [[[1.0]], [[3.0]]], [0.5, 0.5],
    ...                         within="harmonic"), 12)  # S_w = 1 / (0.5 / 1 + 0.5 / 3)
    0.666666666667
    """
    _check_shrinkage(shrinkage)
    _check_within(within)
    w = np.asarray(w, dtype=np.float64)
    means = np.asarray(means, dtype=np.float64)
    priors = np.asarray(priors, dtype=np.float64)
    between = _between(means, priors)
    within = _within_scatter(covariances, priors, within, shrinkage)
    num = float(w @ between @ w)
    den = float(w @ within @ w)
    if den <= 0:
        return float("inf") if num > 0 else 0.0
    return num / den
