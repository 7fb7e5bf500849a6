"""Objectives of the search and held-out scores of a combination of descriptors.

A combination is scored by cross-validation: for each fold, the direction
(LDA or HLDA for ``separate``, TICA for ``slow``) is fitted on the other folds
and scored on the held-out fold; the score is the mean over folds, with its
standard error.
"""

import warnings

import numpy as np

from ..fit import (DroppedDirectionsWarning, discriminant_directions, quadratic_forms,
                   rayleigh_quotient, rayleigh_quotients, slow_modes, two_state_direction,
                   two_state_directions, vamp2_score)
from .folds import stacked_state_arrays, state_arrays

__all__ = ["OBJECTIVES", "fit_direction", "slow_direction", "cv_direction",
           "autocorrelation_along", "fold_scores", "heldout_score", "heldout_scores"]


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
    """Held-out score of a combination in each fold.

    * ``separate``: Fisher ratio (between- over within-state variance,
      arithmetic within-state mean, so it compares across methods) of the
      direction fitted on the other folds;
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
    return _fold_score_table(fold_moments, [idx], objective, method, shrinkage)[0]


def _fold_scores_one(fold_moments, idx, objective, method, shrinkage):
    """:func:`fold_scores` of one combination, fold by fold: the reference the stacked
    :func:`_two_state_fold_scores` must agree with, and its fallback."""
    out = np.empty(fold_moments.n_folds)
    for k in range(fold_moments.n_folds):
        if objective == "slow":
            train = fold_moments.lagged_train(k).subset(idx)
            test = fold_moments.lagged_test(k).subset(idx)
            try:
                with warnings.catch_warnings():  # as in slow_direction
                    warnings.simplefilter("ignore", DroppedDirectionsWarning)
                    out[k] = vamp2_score(train, test, k=1) - 1.0
            except ValueError:
                out[k] = 0.0
            continue
        w = fit_direction(fold_moments.train(k), idx, fold_moments.priors, shrinkage,
                          method=method)
        means, covs = state_arrays(fold_moments.test(k), idx)
        j = min(rayleigh_quotient(w, means, covs, fold_moments.priors), 1e12)
        if objective == "separate":
            out[k] = j
        else:
            rho = autocorrelation_along(w, fold_moments.slowness_test(k), idx)
            out[k] = j / (1.0 + j) * both_weight(rho)
    return out


#: Covariance entries stacked at once by :func:`_fold_score_table` (1 MiB of float64 per
#: 2**17; the temporaries of a batch take a few times that).
_STACK_VALUES = 2**20


def _fold_score_table(fold_moments, combos, objective, method, shrinkage):
    """Held-out scores of each combination in each fold, shape (len(combos), n_folds).

    Two states (``separate``, ``both``): the combinations of each size are fitted and
    scored in every fold by one stacked computation (:func:`_two_state_fold_scores`);
    a combination it cannot take (coincident means, a matrix that is not positive
    definite) and the other cases go fold by fold (:func:`_fold_scores_one`).
    """
    _check_objective(objective, method)
    combos = [np.asarray(c, dtype=np.intp).reshape(-1) for c in combos]
    out = np.empty((len(combos), fold_moments.n_folds))
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
                scores, ok = _two_state_fold_scores(
                    fold_moments, np.stack([combos[i] for i in part]), objective, method,
                    shrinkage)
                out[part[ok]] = scores[ok]
                todo[part[ok]] = False
    for i in np.flatnonzero(todo):
        out[i] = _fold_scores_one(fold_moments, combos[i], objective, method, shrinkage)
    return out


def _two_state_fold_scores(fold_moments, combos, objective, method, shrinkage):
    """:func:`_fold_scores_one` of two states for many combinations of one size at once.

    Returns the scores, shape (n_combos, n_folds), and which combinations were scored
    in every fold (the others need :func:`_fold_scores_one`).
    """
    folds = range(fold_moments.n_folds)
    priors = fold_moments.priors
    means, covs = stacked_state_arrays([fold_moments.train(k) for k in folds], combos)
    w, ok = two_state_directions(means, covs, priors, shrinkage=shrinkage,
                                 within=_within(method))
    means, covs = stacked_state_arrays([fold_moments.test(k) for k in folds], combos)
    j = np.minimum(rayleigh_quotients(w, means, covs, priors), 1e12)
    if objective == "both":
        rows, cols = combos[:, :, None], combos[:, None, :]
        rho = np.full(j.shape, np.nan)
        for k in folds:
            count, c0, ct = fold_moments.slowness_covariances(k)
            if not count > 0:
                continue
            den = quadratic_forms(w[k], c0[rows, cols])
            num = quadratic_forms(w[k], ct[rows, cols])
            with np.errstate(divide="ignore", invalid="ignore"):
                rho[k] = np.where(den > 0, num / den, np.nan)
        weight = 0.5 * (1.0 + np.where(np.isfinite(rho), np.maximum(rho, 0.0), 0.0))
        j = j / (1.0 + j) * weight  # both_weight, stacked
    return j.T, ok.all(axis=0)


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
    mean : float
        Mean held-out score over folds (dimensionless).
    se : float
        Its standard error (standard deviation over folds / sqrt(n_folds)).
    per_fold : ndarray of shape (n_folds,)

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
    table = _fold_score_table(fold_moments, combinations, objective, method, shrinkage)
    n_folds = table.shape[1]
    means = table.mean(axis=1)
    ses = (table.std(axis=1, ddof=1) / np.sqrt(n_folds) if n_folds > 1
           else np.zeros(len(table)))
    return [(float(m), float(se), scores) for m, se, scores in zip(means, ses, table)]
