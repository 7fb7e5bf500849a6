"""Per-state, per-fold moments of standardized features, the input of every fit.

Folds are groups of whole trajectories, or contiguous blocks of frames when a
state has a single trajectory, never random frames: neighbouring frames are
correlated, and a random split would score a combination on frames it has
effectively already seen.
"""

import numpy as np

from ..stats.moments import merge_all

__all__ = ["FoldMoments", "standardize_moments", "standardize_lagged", "state_arrays",
           "stacked_state_arrays", "within_states"]


class FoldMoments:
    """Per-state, per-fold moments of a set of features.

    Parameters
    ----------
    moments : list of list of Moments
        ``moments[state][fold]``; every state must have frames in every fold.
    priors : array-like of shape (n_states,), default=None
        State weights (equal when None).
    lagged : list of LaggedMoments, default=None
        Lagged pairs per fold, every state merged; alternatively
        ``lagged[state][fold]`` (a list of lists), which also gives the
        within-state lagged statistics (:meth:`within_test` and kin) that the
        objective ``both`` needs.
    transitions : list of list of LaggedMoments, default=None
        ``transitions[run][fold]``: lagged pairs along runs that cross between
        the states (transition frames included, pairs spanning state changes;
        :mod:`cvdesign.pipeline.transitions`). When given, the objective
        ``both`` measures slowness on them (:meth:`slowness_test`), each run's
        pairs about that run's own mean (:func:`within_states` over runs).
    rank_transitions : bool, default=True
        False: keep `transitions` for :meth:`transition_test` and kin, but
        let the objective ``both`` measure slowness within the states (too
        few crossings to rank on).

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

    def __init__(self, moments, priors=None, lagged=None, transitions=None, *,
                 rank_transitions=True):
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
        self.lagged_states = None
        if lagged is not None and lagged and isinstance(lagged[0], (list, tuple)):
            self.lagged_states = [list(ls) for ls in lagged]
            lagged = [merge_all(ls[k] for ls in self.lagged_states)
                      for k in range(self.n_folds)]
        self.lagged = None if lagged is None else list(lagged)
        if self.lagged is not None:
            self._lag_all = merge_all(self.lagged)
            self._lag_train = [merge_all(m for f, m in enumerate(self.lagged) if f != k)
                               for k in range(self.n_folds)]
        # within-state and transition pairs about their own means, computed when first
        # asked for (objective 'both', the ranking)
        self._about_own = {}
        self.transitions = None if transitions is None else [list(r) for r in transitions]
        self.rank_transitions = bool(rank_transitions)

    def _own_means(self, table, key, rows):
        """Lagged pairs of `table` (``lagged_states`` or ``transitions``), each row (a state,
        a crossing run) about its own mean, computed once per (table, key)."""
        rows_of = self.lagged_states if table == "within" else self.transitions
        if rows_of is None:
            raise ValueError(
                "within-state lagged statistics need the lagged pairs per state and fold "
                "(FoldMoments(..., lagged=[[...] per fold] per state))" if table == "within" else
                "transition slowness needs the lagged pairs of the crossing runs "
                "(FoldMoments(..., transitions=[[...] per fold] per run))")
        if (table, key) not in self._about_own:
            self._about_own[(table, key)] = within_states(rows(row) for row in rows_of)
        return self._about_own[(table, key)]

    def within_pooled(self):
        """Lagged pairs of all folds, each state about its own mean (LaggedMoments).

        See :func:`within_states`; ValueError without per-state lagged pairs.
        """
        return self._own_means("within", "all", merge_all)

    def within_test(self, k):
        """As :meth:`within_pooled`, fold `k` alone."""
        return self._own_means("within", k, lambda row: row[k])

    def transition_pooled(self):
        """Lagged pairs of the crossing runs, all folds, each run about its own mean.

        ValueError without `transitions`.
        """
        return self._own_means("transit", "all", merge_all)

    def transition_test(self, k):
        """As :meth:`transition_pooled`, fold `k` alone (each run's fold-`k` block about
        that block's own mean)."""
        return self._own_means("transit", k, lambda row: row[k])

    @property
    def slowness(self):
        """str : what the objective ``both`` measures slowness on: ``'transitions'``
        (crossing runs given, `rank_transitions`) or ``'within_states'``."""
        return ("transitions" if self.transitions is not None and self.rank_transitions
                else "within_states")

    def slowness_test(self, k):
        """The lagged pairs of fold `k` that the objective ``both`` measures slowness on:
        :meth:`transition_test` when crossing runs rank (:attr:`slowness`), else
        :meth:`within_test`."""
        return (self.transition_test(k) if self.slowness == "transitions"
                else self.within_test(k))

    def slowness_covariances(self, k):
        """Reversible ``C0`` and ``C(lag)`` of every feature on :meth:`slowness_test`'s
        pairs of fold `k`, with their count, computed once per fold.

        Returns
        -------
        count : float
            Pairs (sum of weights); 0 when there are none (the matrices are then NaN).
        c0, ct : ndarray of shape (n_features, n_features)
            Features' units squared.
        """
        key = ("covariances", self.slowness, k)
        if key not in self._about_own:
            lagged = self.slowness_test(k)
            self._about_own[key] = (lagged.count, *lagged.covariances(reversible=True)[1:])
        return self._about_own[key]

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
        if self.lagged_states is not None:
            lagged = [[standardize_lagged(m, center, scale) for m in row]
                      for row in self.lagged_states]
        else:
            lagged = None if self.lagged is None else [
                standardize_lagged(m, center, scale) for m in self.lagged]
        transitions = None if self.transitions is None else [
            [standardize_lagged(m, center, scale) for m in row] for row in self.transitions]
        return FoldMoments(out, self.priors, lagged, transitions,
                           rank_transitions=self.rank_transitions)


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
    idx = np.asarray(idx, dtype=np.intp)
    means = np.array([m.mean[idx] for m in moments])
    # the subset of each covariance (scatter / count), without dividing the whole matrix
    covs = np.array([m.scatter[idx[:, None], idx] / m.count if m.count else
                     np.full((idx.size, idx.size), np.nan) for m in moments])
    return means, covs


def stacked_state_arrays(grid, combos):
    """Per-state means and covariances of many combinations of features at once.

    The stacked form of :func:`state_arrays`, element for element the same values.

    Parameters
    ----------
    grid : sequence of sequence of Moments
        ``grid[k][s]``: the moments of state ``s`` in the ``k``-th set (a fold, say).
    combos : array-like of int, shape (n_combos, k)
        Feature indices of each combination, all of one size.

    Returns
    -------
    means : ndarray of shape (len(grid), n_combos, n_states, k)
    covariances : ndarray of shape (len(grid), n_combos, n_states, k, k)
        ``scatter / count``; NaN for moments without frames.

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import Moments
    >>> m = Moments.from_data(np.arange(12.0).reshape(4, 3) ** 2)
    >>> means, covs = stacked_state_arrays([[m, m]], [[0, 2], [1, 2]])
    >>> means.shape, covs.shape
    ((1, 2, 2, 2), (1, 2, 2, 2, 2))
    >>> bool(np.array_equal(covs[0, 1, 0], state_arrays([m], [1, 2])[1][0]))
    True
    """
    combos = np.asarray(combos, dtype=np.intp)
    n_combos, size = combos.shape
    n_states = len(grid[0])
    means = np.empty((len(grid), n_combos, n_states, size))
    covs = np.empty((len(grid), n_combos, n_states, size, size))
    rows, cols = combos[:, :, None], combos[:, None, :]
    for k, states in enumerate(grid):
        for s, m in enumerate(states):
            means[k, :, s] = m.mean[combos]
            covs[k, :, s] = m.scatter[rows, cols] / m.count if m.count else np.nan
    return means, covs


def within_states(per_state):
    """Lagged pairs of several states, each state's pairs about that state's own mean.

    The sums of ``x - m_s`` and ``y - m_s``, with ``m_s`` the mean over both
    ends of state ``s``'s pairs (the reversible mean), added over the states:
    the reversible covariances of the result are the pair-count-weighted
    within-state covariances ``C0`` and ``C(lag)``. Its autocorrelation along
    a direction measures how slowly the CV moves *within* the states, free of
    the offsets between their means -- about one common mean instead, runs
    that never leave their state make every separating direction look slow.
    Exact (sums re-centred, no data needed).

    Parameters
    ----------
    per_state : iterable of LaggedMoments or None
        One per state (empty moments or None: the state adds nothing).

    Returns
    -------
    LaggedMoments
        Shift zero, lag None; empty (count 0) when no state has pairs; None when
        `per_state` holds nothing but None.

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import LaggedMoments
    >>> rng = np.random.default_rng(0)
    >>> noise = [rng.normal(size=(2000, 1)) for _ in range(2)]  # fast within each state
    >>> a = LaggedMoments.from_series(noise[0], lag=1)
    >>> b = LaggedMoments.from_series(noise[1] + 10.0, lag=1)  # another state, far away
    >>> pooled = a.merge(b).covariances()
    >>> round(float(pooled[2][0, 0] / pooled[1][0, 0]), 2)  # looks slow about one mean
    0.96
    >>> within = within_states([a, b]).covariances()
    >>> abs(float(within[2][0, 0] / within[1][0, 0])) < 0.05  # is fast
    True
    """
    per_state = [m for m in per_state if m is not None]
    if not per_state:
        return None
    out = type(per_state[0])(per_state[0].n_features)
    for m in per_state:
        if not m.count > 0:
            continue
        c = m.reshifted(m.covariances(reversible=True)[0])
        c.shift = np.zeros_like(c.shift)
        c.lag = None
        out = out.merge(c)
    return out
