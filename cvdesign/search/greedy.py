"""Greedy forward search of compact combinations and their ranking."""

import math
from dataclasses import dataclass, field

import numpy as np

from .objectives import heldout_scores

__all__ = ["Combination", "greedy_search", "rank_combinations"]


@dataclass
class Combination:
    """A set of descriptors and its held-out score.

    Attributes
    ----------
    members : tuple of int
        Indices (into the candidate groups) in the order the search added them.
    score : float
        Held-out score (:func:`~cvdesign.search.heldout_score`: for ``separate`` the
        Fisher ratio of the held-out folds pooled).
    se : float
        Standard error of `score` (jackknife over the folds).
    fold_scores : ndarray of shape (n_folds,)
        Each fold's score on its own.
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
        Held-out score to maximize, see :func:`heldout_score`.
    method : {'lda', 'hlda'}, default='lda'

    Returns
    -------
    list of Combination
        In the order found.

    Notes
    -----
    Costs ``O(n_seeds * max_terms * len(groups))`` small fits per fold; each step's
    candidates are scored together (:func:`~cvdesign.search.objectives.heldout_scores`).
    """
    groups = [np.asarray(g, dtype=np.intp) for g in groups]
    if max_terms < 1:
        raise ValueError(f"max_terms={max_terms!r} must be at least 1")
    cache = {}

    def scores(keys):
        """Held-out scores of the member sets `keys`, the new ones computed in one batch."""
        new = [k for k in dict.fromkeys(keys) if k not in cache]
        if new:
            combos = [np.concatenate([groups[m] for m in sorted(k)]) for k in new]
            cache.update(zip(new, heldout_scores(fold_moments, combos, shrinkage=shrinkage,
                                                 objective=objective, method=method)))
        return [cache[k] for k in keys]

    def score(members):
        return scores([frozenset(members)])[0]

    firsts = scores([frozenset((g,)) for g in range(len(groups))])
    singles = sorted(range(len(groups)), key=lambda g: (-firsts[g][0], g))
    # the searches from every seed advance together, one step each per round, so that a
    # round's candidates are scored in one batch; each seed's path is its own (a score
    # does not depend on its batch), and the sets are recorded seed by seed, in path order
    paths = [[(seed,)] for seed in singles[:max(1, n_seeds)]]
    active = list(paths)
    while active:
        size = len(active[0][-1])
        if size >= min(max_terms, len(groups)):
            break
        steps = [[g for g in range(len(groups)) if g not in path[-1]] for path in active]
        flat = scores([frozenset(path[-1] + (g,)) for path, others in zip(active, steps)
                       for g in others])
        still, pos = [], 0
        for path, others in zip(active, steps):
            best, best_val = None, -np.inf
            for g, (val, _, _) in zip(others, flat[pos:pos + len(others)]):
                if val > best_val:
                    best, best_val = g, val
            pos += len(others)
            current = score(path[-1])[0]
            if best_val > current + min_gain * abs(current):
                path.append(path[-1] + (best,))
                still.append(path)
        active = still
    found = {}
    for path in paths:
        for members in path:
            found.setdefault(frozenset(members), members)
    out = []
    for key, members in found.items():
        mean, se, per = score(members)
        out.append(Combination(tuple(members), mean, se, per))
    return out


def _within_one_se(other, ref):
    """Whether `other` scores within one standard error of `ref`, on the scale of
    ``log(1 + score)`` (see :func:`rank_combinations`; scores are above -1)."""
    floor = -1.0 + 1e-12
    x, y = max(ref.score, floor), max(other.score, floor)
    return math.log1p(y) >= math.log1p(x) - ref.se / (1.0 + x)


def rank_combinations(combinations, *, limit=None):
    """Rank combinations, preferring the compact ones that are as good.

    A combination is dropped when one of its proper subsets scores within
    one standard error of it (its extra terms add nothing measurable). Of the
    rest, the ranking repeatedly takes, among the combinations not yet ranked, the best by
    held-out score, and then the smallest combination whose score is within
    one standard error of it (the one-standard-error rule, Hastie, Tibshirani
    and Friedman, *The Elements of Statistical Learning*, 2nd ed. 2009,
    sect. 7.10); ties go to the higher score, then to the earlier found. Scores
    are compared on the scale of ``log(1 + score)``, the standard error carried
    over by the delta method (``se / (1 + score)``): for a standard error small
    beside ``1 + score`` the same as comparing the scores themselves, while
    ratios far above 1, whose folds can differ many times over (a CV nearly rigid
    within the states, its within-state spread at the level of rounding), are
    compared by their relative size, not dropped for an error larger than the
    score.

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
        dominated = any(sets[j] < sets[i] and _within_one_se(o, c)
                        for j, o in enumerate(combinations))
        if not dominated:
            keep.append(c)
    pool = list(enumerate(keep))
    ranked = []
    while pool and (limit is None or len(ranked) < limit):
        best = max(pool, key=lambda t: (t[1].score, -t[0]))[1]
        near = [t for t in pool if _within_one_se(t[1], best)]
        pick = min(near, key=lambda t: (t[1].n_terms, -t[1].score, t[0]))
        ranked.append(pick[1])
        pool.remove(pick)
    return ranked
