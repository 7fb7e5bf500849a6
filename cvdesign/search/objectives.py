"""Objectives of the search and held-out scores of a combination of descriptors.

A combination is scored by cross-validation: for each fold, the direction
(LDA or HLDA for ``separate``, TICA for ``slow``) is fitted on the other folds
and applied to the held-out fold. For ``separate`` and ``both`` the held-out
folds are then pooled: each fold's frames projected on its own direction (scaled
to one unit over all frames, and signed so that the folds agree on the order of
the states on their training folds), the states' means and spreads taken over
all the held-out frames, and the Fisher ratio computed once. Scored fold by fold
instead, each fold's ratio divides by the spread within that fold alone (one
trajectory per state with whole-trajectory folds): runs of a state that sit at
different means along the CV (not equilibrated, or in sub-states they do not
cross between) would not count against it, and such a CV would outrank one on
which the runs agree. The pooled ratio counts them, as a bias along the CV
meets them. The between-state part is signed by the training folds: it counts the
held-out states' spread along the order the training folds put them in (for two
states, nothing when they lie the other way round), so that a combination whose
folds each contradict the others (a pattern the search can otherwise pick out of
noise, since every fold's ratio is a square) does not score as separating. Its
standard error is the jackknife's over the folds. ``slow``
keeps the mean of the folds' VAMP-2 scores (Wu and Noé 2020), with its
standard error.
"""

import warnings

import numpy as np

from ..fit import (DroppedDirectionsWarning, discriminant_directions, quadratic_forms,
                   slow_modes, two_state_direction,
                   two_state_directions, vamp2_score)
from .folds import stacked_state_arrays, state_arrays

__all__ = ["OBJECTIVES", "fit_direction", "slow_direction", "cv_direction",
           "autocorrelation_along", "fold_scores", "heldout_score", "heldout_scores",
           "heldout_fisher_along", "heldout_autocorrelation", "scaled_fold_directions",
           "pooled_autocorrelation"]


#: Objectives of the search: what a combination is scored by on held-out folds.
OBJECTIVES = ("separate", "slow", "both")


def _check_objective(objective, method):
    if objective not in OBJECTIVES:
        raise ValueError(f"objective={objective!r} must be one of {', '.join(OBJECTIVES)}")
    if method not in ("lda", "hlda"):
        raise ValueError(f"method={method!r} must be 'lda' or 'hlda'")


def _within(method):
    return "harmonic" if method == "hlda" else "arithmetic"


def fit_direction(moments, idx, priors, shrinkage, *, method="lda"):
    """First discriminant direction (LDA or HLDA) on features `idx`.

    Parameters
    ----------
    moments : sequence of Moments
        Per-state moments (standardized features).
    idx : array-like of int
        Feature indices.
    priors : array-like of shape (n_states,)
    shrinkage : float
    method : {'lda', 'hlda'}, default='lda'
        Arithmetic (LDA) or harmonic (HLDA) mean of the state covariances as
        within-state scatter.

    Returns
    -------
    ndarray of shape (len(idx),)
        Unit-length direction.
    """
    means, covs = state_arrays(moments, idx)
    if len(means) == 2:  # one or two linear solves instead of an eigenproblem
        w = two_state_direction(means, covs, priors, shrinkage=shrinkage,
                                within=_within(method))
        if w is not None:
            return w
    _, vecs = discriminant_directions(means, covs, priors, shrinkage=shrinkage,
                                      within=_within(method))
    return vecs[:, 0]


def slow_direction(lagged, idx, *, rcond=1e-6):
    """Slowest TICA direction (reversible estimate) on features `idx`.

    Returns
    -------
    direction : ndarray of shape (len(idx),), unit length
    eigenvalue : float
        Its autocorrelation at the lag (dimensionless).
    """
    sub = lagged.subset(np.asarray(idx, dtype=np.intp))
    with warnings.catch_warnings():  # one of many combinations: not worth a warning each
        warnings.simplefilter("ignore", DroppedDirectionsWarning)
        modes = slow_modes(sub, lag=sub.lag or 1, n_components=1, rcond=rcond)  # as TICA's
    w = modes.eigenvectors[:, 0]
    return w / np.linalg.norm(w), float(modes.eigenvalues[0])


def autocorrelation_along(w, lagged, idx):
    """Normalized autocorrelation at the lag of the projection on `w` (reversible).

    Returns NaN (not measured) when `lagged` holds no lagged pairs (every run
    shorter than the lag) or the projection does not vary.
    """
    if not lagged.count > 0:
        return float("nan")
    sub = lagged.subset(np.asarray(idx, dtype=np.intp))
    _, c0, ct = sub.covariances(reversible=True)
    den = float(w @ c0 @ w)
    return float(w @ ct @ w) / den if den > 0 else float("nan")


def cv_direction(fold_moments, idx, *, objective="separate", method="lda", shrinkage=1e-3,
                 fold=None):
    """The CV direction a combination gets: on all folds, or on all but `fold`.

    ``separate`` and ``both`` use the discriminant direction (`method`);
    ``slow`` uses the slowest TICA direction.
    """
    if objective == "slow":
        lag = fold_moments.lagged_pooled() if fold is None else fold_moments.lagged_train(fold)
        return slow_direction(lag, idx)[0]
    states = fold_moments.pooled() if fold is None else fold_moments.train(fold)
    return fit_direction(states, idx, fold_moments.priors, shrinkage, method=method)


def fold_scores(fold_moments, idx, *, objective="separate", method="lda", shrinkage=1e-3):
    """Held-out score of a combination in each fold on its own.

    Each fold's score is that of the direction fitted on the other folds, on the
    frames of that fold alone (the held-out score, :func:`heldout_score`, pools
    the folds instead):

    * ``separate``: Fisher ratio (between- over within-state variance,
      arithmetic within-state mean, so it compares across methods);
    * ``slow``: cross-validated VAMP-2 score of the slowest singular function,
      minus the constant part (Wu and Noé 2020): the squared correlation, in
      [0, 1], across the lag of the slowest linear function of the features;
    * ``both``: ``J / (1 + J) * (1 + max(rho, 0)) / 2``: the held-out Fisher
      ratio mapped to [0, 1), weighted by the held-out autocorrelation
      ``rho`` at the lag of the same (discriminant) direction *within the
      states* (each state's lagged pairs about that state's own mean,
      :meth:`FoldMoments.within_test`), mapped to [1/2, 1]. Our design, for
      basin-only data (the lagged pairs never span a state change): about one
      common mean, runs that stay in their states make every separating
      direction look slow (``rho`` near ``J / (1 + J)``), so slowness would
      rank separation twice; within the states, ``rho`` tells a CV whose
      motion inside the basins is slow (coupled to slow modes) from one
      carried by fast noise, but not how slowly it crosses between the states,
      which such data cannot show. So the factor lies in [1/2, 1] and at most
      halves a CV's separation score: a CV whose ``J / (1 + J)`` is more than
      twice another's stays above it. But ``J / (1 + J)`` saturates, so among
      CVs that separate well it can reorder them: a CV with held-out J 1.4
      (states overlapping by about a fifth) that is slow inside the states
      (0.58) can rank above a fully separating one (J near 100) that is fast
      there (0.50). When runs that cross between
      the states were given (:attr:`FoldMoments.slowness` is
      ``'transitions'``), ``rho`` is measured instead on their held-out
      blocks, pairs spanning the crossings and the frames between the states
      included (:meth:`FoldMoments.transition_test`): then it does tell how
      slowly the CV crosses, with the same bounded weight.

    Returns
    -------
    ndarray of shape (n_folds,)
    """
    return _score_table(fold_moments, [idx], objective, method, shrinkage)[2][0]


#: Held-out Fisher ratios are capped here (a direction along which the states do not
#: spread at all would give infinity).
_MAX_RATIO = 1e12


def _unit_scaled(w, all_means, all_covs, priors):
    """Directions ``w`` (shape (..., k)) scaled to unit variance along them over all frames
    (within plus between the states, weighted by `priors`; means and covariances of the
    states over every fold, broadcast against `w`): one unit for every fold, so that the
    held-out folds can be pooled (the same direction gets the same length in every fold;
    the within-state part alone would be rounding along a CV rigid within the states). A
    direction without spread keeps its length."""
    proj = (all_means * w[..., None, :]).sum(axis=-1)  # (..., n_states)
    centred = proj - (priors * proj).sum(axis=-1, keepdims=True)
    var = (priors * (quadratic_forms(w[..., None, :], all_covs) + centred ** 2)).sum(axis=-1)
    with np.errstate(invalid="ignore"):
        scale = np.where(var > 0, np.sqrt(np.where(var > 0, var, 1.0)), 1.0)
    return w / scale[..., None]


def _fold_signs(u, priors):
    """Signs (shape (n_folds, ...)) that make the folds' directions agree, from their
    training folds alone: ``u`` (shape (n_folds, ..., n_states)) holds each fold's
    training state means along its direction; each fold is turned so that this pattern
    (less its prior-weighted mean) has a non-negative prior-weighted product with that of
    the fold whose training states spread most (the first such). Independent of the order
    of the states; for two states, every fold then has the states in one order on its
    training folds. (Which way round all the folds lie does not change a score.)"""
    uc = u - (priors * u).sum(axis=-1, keepdims=True)
    ref = np.argmax((priors * uc * uc).sum(axis=-1), axis=0)  # (...)
    u_ref = np.take_along_axis(uc, ref[None, ..., None], axis=0)
    return np.where((priors * uc * u_ref).sum(axis=-1) < 0, -1.0, 1.0)


def _fold_projections(fm, idx, directions):
    """Each fold's direction on features `idx` scaled to one unit (:func:`_unit_scaled`)
    and signed to agree with the others (:func:`_fold_signs`), with the held-out states'
    means `t` and variances `v` along it and the training states' means `u` (arrays of
    shape (1, n_folds, n_states))."""
    idx = np.asarray(idx, dtype=np.intp)
    all_means, all_covs = state_arrays(fm.pooled(), idx)
    ws = []
    t, v, u = np.empty((3, 1, fm.n_folds, fm.n_states))
    for k, w in enumerate(directions):
        w = _unit_scaled(np.asarray(w, dtype=np.float64), all_means, all_covs, fm.priors)
        u[0, k] = (state_arrays(fm.train(k), idx)[0] * w).sum(axis=-1)
        means, covs = state_arrays(fm.test(k), idx)
        t[0, k], v[0, k] = (means * w).sum(axis=-1), quadratic_forms(w, covs)
        ws.append(w)
    signs = _fold_signs(u[0], fm.priors)
    return ([w * sk for w, sk in zip(ws, signs)], t * signs[:, None], v,
            u * signs[:, None])


def _fisher(t, v, u, priors):
    """Held-out Fisher ratio of projected state means `t` and variances `v` (shape (...,
    n_states)), signed by the training folds' state means `u` along the same direction:
    the between-state variance is that of `t` along the pattern of `u`,
    ``max(sum_s p_s t'_s u'_s, 0)^2 / sum_s p_s u'_s^2`` (primes: less the prior-weighted
    mean), over the within-state ``sum_s p_s v_s``; capped, with the Fisher ratios'
    conventions (inf where only the between-state part is positive, 0 where neither is,
    NaN where either is NaN). For two states the between part is
    ``p_1 p_2 (t_2 - t_1)^2`` when the held-out states lie in the order of the training
    ones, and 0 when they lie the other way round."""
    tc = t - (priors * t).sum(axis=-1, keepdims=True)
    uc = u - (priors * u).sum(axis=-1, keepdims=True)
    cross = (priors * tc * uc).sum(axis=-1)
    norm = (priors * uc * uc).sum(axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        between = np.where(norm > 0, np.maximum(cross, 0.0) ** 2 / norm,
                           np.where(np.isnan(cross), np.nan, 0.0))
        within = (priors * v).sum(axis=-1)
        ratio = np.where(within <= 0, np.where(between > 0, np.inf,
                                               np.where(np.isnan(between), np.nan, 0.0)),
                         between / within)
    return np.minimum(ratio, _MAX_RATIO)


def _pooled_states(t, v, u, n, keep):
    """Per state, the mean and variance of the held-out projections of the folds in `keep`
    pooled (each fold's frames at its own direction), and the mean of their training
    means: ``t``, ``v``, ``u`` of shape (n_combos, n_folds, n_states), ``n`` frames (sum
    of weights) of shape (n_folds, n_states)."""
    frac = n[keep] / n[keep].sum(axis=0)  # (folds kept, n_states)
    tk = t[:, keep]
    mean = (frac * tk).sum(axis=1)
    var = (frac * (v[:, keep] + (tk - mean[:, None]) ** 2)).sum(axis=1)
    return mean, var, (frac * u[:, keep]).sum(axis=1)


def _summary(t, v, u, n, priors, objective, slowness=None):
    """Pooled held-out score, its jackknife standard error over the folds and the
    per-fold scores of combinations whose held-out folds project to state means `t` and
    variances `v`, and their training folds to state means `u` (shape (n_combos, n_folds,
    n_states) each), with `n` frames per fold and state; `slowness`, for ``both``: per
    fold the lagged-pair count (n_folds,) and the ``C(lag)`` and ``C0`` quadratic forms
    along each fold's direction (n_combos, n_folds)."""
    n_folds = t.shape[1]
    every = np.ones(n_folds, dtype=bool)
    subsets = [every] + [every & (np.arange(n_folds) != k) for k in range(n_folds)]
    per_fold = _fisher(t, v, u, priors)  # (n_combos, n_folds)
    pooled = np.stack([_fisher(*_pooled_states(t, v, u, n, keep), priors)
                       for keep in subsets], axis=1)  # (n_combos, 1 + n_folds): all, then
    # each fold left out
    if objective == "both":
        count, num, den = slowness
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where((count > 0) & (den > 0), num / den, np.nan)
        per_fold = per_fold / (1.0 + per_fold) * both_weight(rho)
        rhos = []
        for keep in subsets:  # pairs of the kept folds pooled, each along its direction
            use = keep & (count > 0)
            a = (count[use] * num[:, use]).sum(axis=1)
            b = (count[use] * den[:, use]).sum(axis=1)
            with np.errstate(divide="ignore", invalid="ignore"):
                rhos.append(np.where(b > 0, a / b, np.nan))
        pooled = pooled / (1.0 + pooled) * both_weight(np.stack(rhos, axis=1))
    score, loo = pooled[:, 0], pooled[:, 1:]
    if n_folds > 1:  # jackknife over the folds (Efron and Tibshirani 1993, An Introduction
        # to the Bootstrap, Chapman & Hall, ch. 11; from memory)
        dev = loo - loo.mean(axis=1, keepdims=True)
        se = np.sqrt((n_folds - 1) / n_folds * (dev ** 2).sum(axis=1))
    else:
        se = np.zeros(len(score))
    return score, se, per_fold


def _fold_scores_one(fold_moments, idx, objective, method, shrinkage):
    """:func:`heldout_scores`'s ``(score, se, per_fold)`` of one combination, fold by
    fold: the reference the stacked :func:`_two_state_fold_scores` must agree with, and
    its fallback."""
    fm = fold_moments
    if objective == "slow":
        out = np.empty(fm.n_folds)
        for k in range(fm.n_folds):
            train = fm.lagged_train(k).subset(idx)
            test = fm.lagged_test(k).subset(idx)
            try:
                with warnings.catch_warnings():  # as in slow_direction
                    warnings.simplefilter("ignore", DroppedDirectionsWarning)
                    out[k] = vamp2_score(train, test, k=1) - 1.0
            except ValueError:
                out[k] = 0.0
        # (the jackknife standard error of a mean is the usual one)
        se = out.std(ddof=1) / np.sqrt(fm.n_folds) if fm.n_folds > 1 else 0.0
        return float(out.mean()), float(se), out
    ws, t, v, u = _fold_projections(fm, idx, [
        fit_direction(fm.train(k), idx, fm.priors, shrinkage, method=method)
        for k in range(fm.n_folds)])
    num, den = np.full((2, 1, fm.n_folds), np.nan)
    count = np.zeros(fm.n_folds)
    if objective == "both":
        sub = np.ix_(idx, idx)
        for k, w in enumerate(ws):
            count[k], c0, ct = fm.slowness_covariances(k)
            if count[k] > 0:
                num[0, k], den[0, k] = quadratic_forms(w, ct[sub]), quadratic_forms(w, c0[sub])
    score, se, per_fold = _summary(t, v, u, _fold_counts(fm), fm.priors, objective,
                                   (count, num, den) if objective == "both" else None)
    return float(score[0]), float(se[0]), per_fold[0]


def heldout_fisher_along(fold_moments, idx, directions):
    """Held-out Fisher ratio of the folds pooled along a given direction per fold.

    As the held-out score of ``separate`` (:func:`heldout_score`), but along
    `directions` instead of discriminants refitted without each fold (a ``slow``
    CV's TICA directions, say).

    Parameters
    ----------
    fold_moments : FoldMoments
    idx : array-like of int
        Features of the CV.
    directions : sequence of ndarray
        The CV's direction (on `idx`) fitted without each fold.

    Returns
    -------
    score, se : float
        The pooled ratio and its jackknife standard error (dimensionless).
    per_fold : ndarray of shape (n_folds,)
        Each fold's ratio on its own.

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.search import FoldMoments
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal([0, m], 1, (4000, 2)))
    ...                    for _ in range(2)] for m in (0.0, 2.0)])
    >>> # (delta mu / 2 sigma)^2 = 1 along feature 1 (Fisher 1936, Ann. Eugen. 7:179;
    >>> # the algebra as in heldout_score)
    >>> round(heldout_fisher_along(fm, [0, 1], [np.array([0.0, 1.0])] * 2)[0], 1)
    1.0
    """
    fm = fold_moments
    _, t, v, u = _fold_projections(fm, idx, directions)
    score, se, per_fold = _summary(t, v, u, _fold_counts(fm), fm.priors, "separate")
    return float(score[0]), float(se[0]), per_fold[0]


def heldout_autocorrelation(fold_moments, idx, directions, pairs):
    """Autocorrelation at the lag along a direction per fold, the held-out folds' lagged
    pairs pooled.

    Each fold's pairs (``pairs(k)``, a LaggedMoments of every feature) give the
    reversible ``C(lag)`` and ``C0`` along that fold's direction, signed and
    scaled by its training folds as in :func:`heldout_score`; the ratio of their
    pair-weighted sums over the folds is returned.

    Parameters
    ----------
    fold_moments : FoldMoments
    idx : array-like of int
    directions : sequence of ndarray
        The CV's direction (on `idx`) fitted without each fold.
    pairs : callable
        ``pairs(k)``: the lagged pairs of fold `k` (say ``fold_moments.within_test``).

    Returns
    -------
    float
        NaN when no fold has pairs (or the CV does not vary along them).

    Examples
    --------
    >>> import numpy as np
    >>> from scipy.signal import lfilter
    >>> from cvdesign.search import FoldMoments
    >>> from cvdesign.stats.moments import LaggedMoments, Moments
    >>> rng = np.random.default_rng(0)
    >>> def run(mean):  # AR(1) of coefficient 0.8 (lag-1 autocorrelation 0.8)
    ...     return mean + lfilter([1.0], [1.0, -0.8], rng.normal(size=(20000, 1)), axis=0)
    >>> runs = [[run(m) for _ in range(2)] for m in (0.0, 3.0)]
    >>> fm = FoldMoments([[Moments.from_data(x) for x in r] for r in runs],
    ...                  lagged=[[LaggedMoments.from_series(x, lag=1) for x in r]
    ...                          for r in runs])
    >>> round(heldout_autocorrelation(fm, [0], [np.ones(1)] * 2, fm.within_test), 2)
    0.8
    """
    return pooled_autocorrelation(scaled_fold_directions(fold_moments, idx, directions),
                                  [pairs(k) for k in range(fold_moments.n_folds)], idx)


def scaled_fold_directions(fold_moments, idx, directions):
    """Each fold's direction as the held-out scores take it: scaled to unit variance over
    all frames (within plus between the states) and signed so that the folds agree on the
    order of the states on their training folds (:func:`_fold_signs`)

    Returns
    -------
    list of ndarray
    """
    return _fold_projections(fold_moments, idx, directions)[0]


def pooled_autocorrelation(directions, pairs, idx):
    """Reversible autocorrelation at the lag of the folds' pairs pooled, each fold's along
    its own direction: ``sum_k n_k w_k' C_k(lag) w_k / sum_k n_k w_k' C0_k w_k``.

    Parameters
    ----------
    directions : sequence of ndarray
        Per fold, on features `idx`, in one unit (:func:`scaled_fold_directions`).
    pairs : sequence of LaggedMoments or None
        Per fold, its lagged pairs (every feature); None or empty: the fold adds nothing.
    idx : array-like of int

    Returns
    -------
    float
        NaN when no fold has pairs (or the CV does not vary along them).
    """
    idx = np.asarray(idx, dtype=np.intp)
    num = den = 0.0
    for w, lagged in zip(directions, pairs):
        if lagged is None or not lagged.count > 0:
            continue
        _, c0, ct = lagged.subset(idx).covariances(reversible=True)
        num += lagged.count * float(w @ ct @ w)
        den += lagged.count * float(w @ c0 @ w)
    return num / den if den > 0 else float("nan")


def _fold_counts(fm):
    """Held-out frames (sums of weights) per fold and state, shape (n_folds, n_states)."""
    return np.array([[m.count for m in fm.test(k)] for k in range(fm.n_folds)],
                    dtype=np.float64)


#: Covariance entries stacked at once by :func:`_score_table` (1 MiB of float64 per
#: 2**17; the temporaries of a batch take a few times that).
_STACK_VALUES = 2**20


def _score_table(fold_moments, combos, objective, method, shrinkage):
    """Pooled held-out scores, their standard errors (shape (len(combos),) each) and the
    per-fold scores (shape (len(combos), n_folds)) of the combinations.

    Two states (``separate``, ``both``): the combinations of each size are fitted and
    scored in every fold by one stacked computation (:func:`_two_state_fold_scores`);
    a combination it cannot take (coincident means, a matrix that is not positive
    definite) and the other cases go fold by fold (:func:`_fold_scores_one`).
    """
    _check_objective(objective, method)
    combos = [np.asarray(c, dtype=np.intp).reshape(-1) for c in combos]
    score, se = np.empty(len(combos)), np.empty(len(combos))
    per_fold = np.empty((len(combos), fold_moments.n_folds))
    todo = np.ones(len(combos), dtype=bool)
    if objective != "slow" and fold_moments.n_states == 2:
        by_size = {}
        for i, c in enumerate(combos):
            if c.size:
                by_size.setdefault(c.size, []).append(i)
        for size, rows in by_size.items():
            # batches bounded in memory (the stacked covariances and their temporaries):
            # a score does not depend on its batch, so the split changes nothing else
            step = max(1, _STACK_VALUES // (fold_moments.n_folds * 2 * size * size))
            for lo in range(0, len(rows), step):
                part = np.asarray(rows[lo:lo + step], dtype=np.intp)
                got, ok = _two_state_fold_scores(
                    fold_moments, np.stack([combos[i] for i in part]), objective, method,
                    shrinkage)
                for dst, src in zip((score, se, per_fold), got):
                    dst[part[ok]] = src[ok]
                todo[part[ok]] = False
    for i in np.flatnonzero(todo):
        score[i], se[i], per_fold[i] = _fold_scores_one(fold_moments, combos[i], objective,
                                                        method, shrinkage)
    return score, se, per_fold


def _two_state_fold_scores(fold_moments, combos, objective, method, shrinkage):
    """:func:`_fold_scores_one` of two states for many combinations of one size at once.

    Returns ``(score, se, per_fold)`` (shapes (n_combos,), (n_combos,), (n_combos,
    n_folds)) and which combinations were fitted in every fold (the others need
    :func:`_fold_scores_one`).
    """
    fm = fold_moments
    folds = range(fm.n_folds)
    priors = fm.priors
    means, covs = stacked_state_arrays([fm.train(k) for k in folds], combos)
    w, ok = two_state_directions(means, covs, priors, shrinkage=shrinkage,
                                 within=_within(method))
    w = _unit_scaled(w, *stacked_state_arrays([fm.pooled()], combos), priors)
    u = (means * w[..., None, :]).sum(axis=-1)  # training state means (n_folds, n_combos,
    # n_states)
    signs = _fold_signs(u, priors)  # (n_folds, n_combos)
    w, u = w * signs[..., None], u * signs[..., None]
    means, covs = stacked_state_arrays([fm.test(k) for k in folds], combos)
    t = (means * w[..., None, :]).sum(axis=-1)  # (n_folds, n_combos, n_states)
    v = quadratic_forms(w[..., None, :], covs)
    slowness = None
    if objective == "both":
        rows, cols = combos[:, :, None], combos[:, None, :]
        count = np.zeros(fm.n_folds)
        num, den = np.full((2, fm.n_folds, len(combos)), np.nan)
        for k in folds:
            count[k], c0, ct = fm.slowness_covariances(k)
            if count[k] > 0:
                num[k] = quadratic_forms(w[k], ct[rows, cols])
                den[k] = quadratic_forms(w[k], c0[rows, cols])
        slowness = (count, num.T, den.T)
    got = _summary(t.transpose(1, 0, 2), v.transpose(1, 0, 2), u.transpose(1, 0, 2),
                   _fold_counts(fm), priors, objective, slowness)
    return got, ok.all(axis=0)


def both_weight(rho):
    """The factor of objective ``both`` for a within-state autocorrelation `rho`.

    ``(1 + max(rho, 0)) / 2``, in [1/2, 1]; 1/2 when `rho` is not measured
    (NaN or infinite). See :func:`fold_scores`.

    Examples
    --------
    >>> both_weight(0.8), both_weight(-0.2), both_weight(float("nan"))
    (0.9, 0.5, 0.5)
    >>> both_weight(np.array([0.8, -np.inf])).tolist()  # elementwise for an array
    [0.9, 0.5]
    """
    r = np.asarray(rho, dtype=np.float64)
    out = 0.5 * (1.0 + np.where(np.isfinite(r), np.maximum(r, 0.0), 0.0))
    return float(out) if out.ndim == 0 else out


def heldout_score(fold_moments, idx, *, objective="separate", method="lda", shrinkage=1e-3):
    """Cross-validated score of the combination of features `idx`.

    Parameters
    ----------
    fold_moments : FoldMoments
        Standardized features (with lagged moments for ``slow`` and ``both``).
    idx : array-like of int
        Feature indices.
    objective : {'separate', 'slow', 'both'}, default='separate'
        See :func:`fold_scores`.
    method : {'lda', 'hlda'}, default='lda'
    shrinkage : float, default=1e-3
        Discriminant regularization, see
        :func:`cvdesign.fit.discriminant_directions`.

    Returns
    -------
    score : float
        Held-out score (dimensionless). ``separate``: the Fisher ratio of the held-out
        folds pooled, each fold's frames projected on the direction fitted without it
        (scaled to unit variance over all frames and signed so that the folds agree on the
        order of the states on their training folds), the states' means and variances over
        all the
        held-out frames, the between-state variance taken along the training folds'
        pattern of state means (for two states: zero when the held-out states lie in the
        other order); ``both``: that ratio mapped to [0, 1) and weighted by the
        held-out autocorrelation of the pooled folds' pairs (see :func:`fold_scores`);
        ``slow``: the mean of the folds' scores.
    se : float
        Its standard error: the jackknife's over the folds (each fold left out of the
        pooling in turn; Efron and Tibshirani 1993, *An Introduction to the Bootstrap*,
        Chapman & Hall, ch. 11, from memory), for ``slow`` the standard deviation over the folds over
        sqrt(n_folds), which is the jackknife's for a mean. With two folds each left-out
        value is the other fold's own score: a crude error.
    per_fold : ndarray of shape (n_folds,)
        Each fold's score on its own (:func:`fold_scores`): with runs of a state at
        different means along the CV, above the pooled score.

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.search import FoldMoments
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal(m, 1, (500, 1))) for _ in range(2)]
    ...                   for m in (0.0, 2.0)])
    >>> # Fisher's ratio (Fisher 1936, Ann. Eugen. 7:179) of two equally weighted states:
    >>> # between (delta mu / 2)^2, within sigma^2 (our own algebra), so (delta mu / 2 sigma)^2
    >>> round(heldout_score(fm, [0])[0], 1)  # (2 / 2)^2 = 1
    1.0
    """
    return heldout_scores(fold_moments, [idx], objective=objective, method=method,
                          shrinkage=shrinkage)[0]


def heldout_scores(fold_moments, combinations, *, objective="separate", method="lda",
                   shrinkage=1e-3):
    """:func:`heldout_score` of several combinations at once.

    With two states (objectives ``separate`` and ``both``) the combinations of each
    size are fitted and scored in all folds by stacked computations (in batches of
    bounded memory), which is how the searches afford their thousands of combinations;
    the scores agree with a fold-by-fold computation to rounding, and each is the same,
    bit for bit, whatever else is scored with it. Combinations the stack cannot take
    (coincident means, a matrix close to singular) are scored fold by fold.

    Parameters
    ----------
    fold_moments : FoldMoments
    combinations : sequence of array-like of int
        Feature indices of each combination.
    objective, method, shrinkage
        As in :func:`heldout_score`.

    Returns
    -------
    list of tuple
        ``(mean, se, per_fold)`` for each combination, as :func:`heldout_score`.

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.search import FoldMoments
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal([0, m], 1, (2000, 2)))
    ...                    for _ in range(2)] for m in (0.0, 2.0)])
    >>> # feature 1 separates the states ((delta mu / 2 sigma)^2 = 1, as in heldout_score:
    >>> # Fisher 1936, Ann. Eugen. 7:179, and our own algebra), feature 0 is noise
    >>> [round(mean, 1) for mean, _, _ in heldout_scores(fm, [[1], [0, 1], [0]])]
    [1.0, 1.0, 0.0]
    """
    score, se, per_fold = _score_table(fold_moments, combinations, objective, method,
                                       shrinkage)
    return [(float(m), float(e), scores) for m, e, scores in zip(score, se, per_fold)]
