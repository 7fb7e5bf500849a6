"""Compact linear combinations: greedy forward search, held-out scores, ranking.

All fitting works from per-state, per-fold :class:`~cvdesign.stats.moments.Moments`
of standardized features. Folds are groups of whole trajectories, or
contiguous blocks of frames when a state has a single trajectory, never
random frames: neighbouring frames are correlated, and a random split would
score a combination on frames it has effectively already seen.

A combination of descriptors is scored by cross-validation: for each fold,
LDA is fitted on the other folds and the Fisher ratio of its first direction
is measured on the held-out fold; the score is the mean over folds, with its
standard error.
"""

from dataclasses import dataclass, field

import numpy as np

from ..fit import TICA, discriminant_directions, rayleigh_quotient, two_state_direction, vamp2_score
from ..stats.moments import merge_all

__all__ = ["FoldMoments", "Combination", "OBJECTIVES", "heldout_score", "fold_scores",
           "fit_direction", "slow_direction", "cv_direction", "autocorrelation_along",
           "greedy_search", "rank_combinations", "standardize_moments", "standardize_lagged",
           "state_arrays"]


class FoldMoments:
    """Per-state, per-fold moments of a set of features.

    Parameters
    ----------
    moments : list of list of Moments
        ``moments[state][fold]``; every state must have frames in every fold.
    priors : array-like of shape (n_states,), default=None
        State weights (equal when None).

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal(m, 1, (30, 2))) for _ in range(3)]
    ...                   for m in (0.0, 3.0)])
    >>> fm.n_states, fm.n_folds, fm.n_features
    (2, 3, 2)
    """

    def __init__(self, moments, priors=None, lagged=None):
        self.moments = [list(m) for m in moments]
        self.lagged = None if lagged is None else list(lagged)
        self.n_states = len(self.moments)
        self.n_folds = len(self.moments[0])
        self.n_features = self.moments[0][0].n_features
        self.priors = (np.full(self.n_states, 1.0 / self.n_states) if priors is None
                       else np.asarray(priors, dtype=np.float64) / np.sum(priors))
        self._all = [merge_all(m) for m in self.moments]
        self._train = [
            [merge_all(m for f, m in enumerate(ms) if f != k) for ms in self.moments]
            for k in range(self.n_folds)
        ]
        if self.lagged is not None:
            self._lag_all = merge_all(self.lagged)
            self._lag_train = [merge_all(m for f, m in enumerate(self.lagged) if f != k)
                               for k in range(self.n_folds)]

    def lagged_pooled(self):
        """Lagged moments over all folds (LaggedMoments), or None."""
        return None if self.lagged is None else self._lag_all

    def lagged_train(self, k):
        """Lagged moments of every fold but `k`."""
        return self._lag_train[k]

    def lagged_test(self, k):
        """Lagged moments of fold `k`."""
        return self.lagged[k]

    def pooled(self):
        """Per-state moments over all folds (list of Moments)."""
        return self._all

    def train(self, k):
        """Per-state moments of every fold but `k`."""
        return self._train[k]

    def test(self, k):
        """Per-state moments of fold `k`."""
        return [ms[k] for ms in self.moments]

    def standardized(self, center, scale):
        """A copy with features transformed to ``(x - center) / scale``."""
        center = np.asarray(center, dtype=np.float64)
        scale = np.asarray(scale, dtype=np.float64)
        out = [[standardize_moments(m, center, scale) for m in ms] for ms in self.moments]
        lagged = None if self.lagged is None else [
            standardize_lagged(m, center, scale) for m in self.lagged]
        return FoldMoments(out, self.priors, lagged)


def standardize_moments(m, center, scale):
    """Moments of ``(x - center) / scale`` from those of ``x`` (exact)."""
    out = m.copy()
    out.mean = (m.mean - center) / scale
    out.scatter = m.scatter / np.outer(scale, scale)
    return out


def standardize_lagged(m, center, scale):
    """Lagged moments of ``(x - center) / scale`` from those of ``x`` (exact)."""
    out = m.reshifted(center)
    inv = 1.0 / np.asarray(scale, dtype=np.float64)
    out.shift = np.zeros_like(out.shift)
    out.sum_x = out.sum_x * inv
    out.sum_y = out.sum_y * inv
    for name in ("sum_xx", "sum_xy", "sum_yy"):
        setattr(out, name, getattr(out, name) * np.outer(inv, inv))
    return out


def state_arrays(moments, idx):
    """Per-state means (n_states, k) and covariances (n_states, k, k) of features `idx`."""
    means = np.array([m.mean[idx] for m in moments])
    covs = np.array([m.covariance[np.ix_(idx, idx)] for m in moments])
    return means, covs


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
    tica = TICA.from_moments(sub, lag=sub.lag or 1, n_components=1, rcond=rcond)
    w = tica.eigenvectors_[:, 0]
    return w / np.linalg.norm(w), float(tica.eigenvalues_[0])


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
    * ``both``: ``J / (1 + J) * max(rho, 0)``, the held-out Fisher ratio mapped
      to [0, 1) times the held-out autocorrelation at the lag of the same
      (discriminant) direction.

    Returns
    -------
    ndarray of shape (n_folds,)
    """
    _check_objective(objective, method)
    idx = np.asarray(idx, dtype=np.intp)
    out = np.empty(fold_moments.n_folds)
    for k in range(fold_moments.n_folds):
        if objective == "slow":
            train = fold_moments.lagged_train(k).subset(idx)
            test = fold_moments.lagged_test(k).subset(idx)
            try:
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
            rho = autocorrelation_along(w, fold_moments.lagged_test(k), idx)
            out[k] = j / (1.0 + j) * (max(rho, 0.0) if np.isfinite(rho) else 0.0)
    return out


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
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal(m, 1, (500, 1))) for _ in range(2)]
    ...                   for m in (0.0, 2.0)])
    >>> round(heldout_score(fm, [0])[0], 1)  # (delta mu / 2 sigma)^2 = 1
    1.0
    """
    scores = fold_scores(fold_moments, idx, objective=objective, method=method,
                         shrinkage=shrinkage)
    se = scores.std(ddof=1) / np.sqrt(len(scores)) if len(scores) > 1 else 0.0
    return float(scores.mean()), float(se), scores


@dataclass
class Combination:
    """A set of descriptors and its held-out score.

    Attributes
    ----------
    members : tuple of int
        Indices (into the candidate groups) in the order the search added them.
    score : float
        Mean held-out Fisher ratio.
    se : float
        Standard error of `score` over folds.
    fold_scores : ndarray of shape (n_folds,)
    """

    members: tuple
    score: float
    se: float
    fold_scores: np.ndarray = field(repr=False)

    @property
    def n_terms(self):
        """int : number of descriptors."""
        return len(self.members)


def greedy_search(fold_moments, groups, *, max_terms=5, n_seeds=5, min_gain=0.01,
                  shrinkage=1e-3, objective="separate", method="lda"):
    """Greedy forward selection of descriptors by held-out Fisher ratio.

    Starting from each of the `n_seeds` best single descriptors, the
    descriptor that most raises the held-out score is added, until
    `max_terms` descriptors are in the set or no addition raises the score by
    more than the fraction `min_gain`. Every set met on the way is returned
    once.

    Parameters
    ----------
    fold_moments : FoldMoments
        Standardized features.
    groups : sequence of array-like of int
        Feature indices of each candidate descriptor (a dihedral brings two).
    max_terms : int, default=5
    n_seeds : int, default=5
    min_gain : float, default=0.01
        Smallest relative gain in held-out score worth another term.
    shrinkage : float, default=1e-3
    objective : {'separate', 'slow', 'both'}, default='separate'
        Held-out score to maximize, see :func:`fold_scores`.
    method : {'lda', 'hlda'}, default='lda'

    Returns
    -------
    list of Combination
        In the order found.

    Notes
    -----
    Costs ``O(n_seeds * max_terms * len(groups))`` small eigenproblems per fold.
    """
    groups = [np.asarray(g, dtype=np.intp) for g in groups]
    if max_terms < 1:
        raise ValueError(f"max_terms={max_terms!r} must be at least 1")
    cache = {}

    def score(members):
        key = frozenset(members)
        if key not in cache:
            idx = np.concatenate([groups[m] for m in sorted(key)])
            cache[key] = heldout_score(fold_moments, idx, shrinkage=shrinkage,
                                       objective=objective, method=method)
        return cache[key]

    singles = sorted(range(len(groups)), key=lambda g: (-score((g,))[0], g))
    found = {}
    for seed in singles[:max(1, n_seeds)]:
        members = (seed,)
        found.setdefault(frozenset(members), members)
        while len(members) < min(max_terms, len(groups)):
            best, best_val = None, -np.inf
            for g in range(len(groups)):
                if g in members:
                    continue
                val = score(members + (g,))[0]
                if val > best_val:
                    best, best_val = g, val
            current = score(members)[0]
            if not best_val > current + min_gain * abs(current):
                break
            members = members + (best,)
            found.setdefault(frozenset(members), members)
    for s in singles[:max(1, n_seeds)]:
        found.setdefault(frozenset((s,)), (s,))
    out = []
    for key, members in found.items():
        mean, se, per = score(members)
        out.append(Combination(tuple(members), mean, se, per))
    return out


def rank_combinations(combinations, *, limit=None):
    """Rank combinations, preferring the compact ones that are as good.

    A combination is dropped when one of its proper subsets scores within
    one standard error of it (its extra terms add nothing measurable). Of the
    rest, the ranking repeatedly takes, among the combinations not yet ranked, the best by
    held-out score, and then the smallest combination whose score is within
    one standard error of it (the one-standard-error rule, Hastie, Tibshirani
    and Friedman, *The Elements of Statistical Learning*, 2nd ed. 2009,
    sect. 7.10); ties go to the higher score, then to the earlier found.

    Parameters
    ----------
    combinations : sequence of Combination
    limit : int, default=None
        Keep at most this many.

    Returns
    -------
    list of Combination
        Best first.

    Examples
    --------
    >>> import numpy as np
    >>> a = Combination((0,), 10.0, 1.0, np.zeros(2))
    >>> b = Combination((0, 1), 10.5, 1.0, np.zeros(2))
    >>> c = Combination((0, 1, 2), 30.0, 1.0, np.zeros(2))
    >>> [x.members for x in rank_combinations([a, b, c])]
    [(0, 1, 2), (0,)]
    """
    combinations = list(combinations)
    sets = [frozenset(c.members) for c in combinations]
    keep = []
    for i, c in enumerate(combinations):
        dominated = any(sets[j] < sets[i] and o.score >= c.score - c.se
                        for j, o in enumerate(combinations))
        if not dominated:
            keep.append(c)
    pool = list(enumerate(keep))
    ranked = []
    while pool and (limit is None or len(ranked) < limit):
        best = max(pool, key=lambda t: (t[1].score, -t[0]))[1]
        near = [t for t in pool if t[1].score >= best.score - best.se]
        pick = min(near, key=lambda t: (t[1].n_terms, -t[1].score, t[0]))
        ranked.append(pick[1])
        pool.remove(pick)
    return ranked
