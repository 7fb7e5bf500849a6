"""Compact linear combinations: greedy forward search, held-out scores, ranking.

All fitting works from per-state, per-fold :class:`~cvdesign.moments.Moments`
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

from .estimators import discriminant_directions, rayleigh_quotient
from .moments import merge_all

__all__ = ["FoldMoments", "Combination", "heldout_score", "greedy_search", "rank_combinations"]


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
    >>> from cvdesign.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal(m, 1, (30, 2))) for _ in range(3)]
    ...                   for m in (0.0, 3.0)])
    >>> fm.n_states, fm.n_folds, fm.n_features
    (2, 3, 2)
    """

    def __init__(self, moments, priors=None):
        self.moments = [list(m) for m in moments]
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
        out = []
        for ms in self.moments:
            row = []
            for m in ms:
                m2 = m.copy()
                m2.mean = (m.mean - center) / scale
                m2.scatter = m.scatter / np.outer(scale, scale)
                row.append(m2)
            out.append(row)
        return FoldMoments(out, self.priors)


def _arrays(moments, idx):
    means = np.array([m.mean[idx] for m in moments])
    covs = np.array([m.covariance[np.ix_(idx, idx)] for m in moments])
    return means, covs


def fit_direction(moments, idx, priors, shrinkage):
    """First LDA direction on the features `idx` from per-state moments."""
    means, covs = _arrays(moments, idx)
    _, vecs = discriminant_directions(means, covs, priors, shrinkage=shrinkage)
    return vecs[:, 0]


def heldout_score(fold_moments, idx, *, shrinkage=1e-3):
    """Cross-validated Fisher ratio of the LDA direction on features `idx`.

    Parameters
    ----------
    fold_moments : FoldMoments
        Standardized features.
    idx : array-like of int
        Feature indices.
    shrinkage : float, default=1e-3
        LDA regularization, see :func:`cvdesign.estimators.discriminant_directions`.

    Returns
    -------
    mean : float
        Mean held-out Fisher ratio over folds (dimensionless).
    se : float
        Its standard error (standard deviation over folds / sqrt(n_folds)).
    per_fold : ndarray of shape (n_folds,)
    """
    idx = np.asarray(idx, dtype=np.intp)
    scores = np.empty(fold_moments.n_folds)
    for k in range(fold_moments.n_folds):
        w = fit_direction(fold_moments.train(k), idx, fold_moments.priors, shrinkage)
        means, covs = _arrays(fold_moments.test(k), idx)
        scores[k] = rayleigh_quotient(w, means, covs, fold_moments.priors)
    scores = np.minimum(scores, 1e12)
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
                  shrinkage=1e-3):
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
            cache[key] = heldout_score(fold_moments, idx, shrinkage=shrinkage)
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
