"""Confidence intervals for every row of the score card.

The score card reports, for every descriptor of the pool, its Fisher ratio,
the overlap of the state histograms, the autocorrelation at the lag (all runs
about their common mean, and each run about its own mean) and the integrated
autocorrelation time. The first four get block-bootstrap intervals
(:func:`cvdesign.stats.bootstrap.block_bootstrap`): a pass over the data keeps, per
contiguous block of each run, additive sums (frame count, first and second
moments about a fixed center, histogram counts on the score card's bins,
lagged-pair sums), so a replicate is a weighted sum over blocks, never a pass
over the trajectories. A lagged pair belongs to the block of its first frame,
so no pair is lost at a block boundary and the estimate on all blocks equals
the score card's value.

The integrated time sums the autocorrelation up to a window of several
correlation times, longer than a bootstrap block, so its interval is the
asymptotic one of Madras and Sokal (J. Stat. Phys. 50, 109, 1988):
``var(tau) ~ 2 (2 M + 1) / N * tau**2`` for a window of ``M`` frames and
``N`` frames in all.

Memory is bounded by :data:`CARD_BUDGET_BYTES`, independent of trajectory
length: blocks are lengthened until each state has at most
:data:`MAX_CARD_BLOCKS`, and when even :data:`MIN_CARD_BLOCKS` blocks per
state do not fit, only the best descriptors of the score card get intervals
(the note of the run says how many).
"""

import numpy as np

from ..stats.bootstrap import ArraySum, block_bootstrap
from .univariate import Histograms, fisher_ratio, overlap_coefficient

__all__ = ["CardBlocks", "plan_card_blocks", "card_intervals", "integrated_time_interval",
           "CARD_BUDGET_BYTES", "MIN_CARD_BLOCKS", "MAX_CARD_BLOCKS"]

#: Memory for the per-block sums of the score card, bytes.
CARD_BUDGET_BYTES = 192 * 2**20
#: Fewest blocks per state for an interval worth reporting (common practice: a
#: percentile interval from fewer resampling units is coarse).
MIN_CARD_BLOCKS = 20
#: Most blocks per state; longer blocks are still valid (each at least as long
#: as the correlation time) and cost less.
MAX_CARD_BLOCKS = 100

_LAG_FIELDS = ("n_pairs", "sx", "sy", "sxx", "sxy", "syy", "l0", "lt")


def _bytes_per_feature_block(n_bins, has_lag):
    # float64 sums, kept once per block and once more when stacked for the bootstrap
    return 2 * 8 * (2 + n_bins + (len(_LAG_FIELDS) if has_lag else 0))


def _blocks_per_state(seg_counts, block_frames):
    counts = np.asarray(seg_counts)
    if block_frames is None:
        return (counts > 0).sum(axis=0)
    return np.ceil(counts / block_frames).astype(np.int64).sum(axis=0)


def plan_card_blocks(seg_counts, block_frames, n_features, *, n_bins=50, has_lag=True,
                     budget=None):
    """Block length and number of features for the score-card bootstrap.

    Parameters
    ----------
    seg_counts : ndarray of shape (n_segments, n_states)
        Frames of each state in each input segment.
    block_frames : int or None
        Shortest acceptable block, frames (None: whole runs).
    n_features : int
        Features of the pool.
    n_bins : int, default=50
    has_lag : bool, default=True
        Whether lagged sums are kept.
    budget : int, default=None
        Bytes for the block sums; None: :data:`CARD_BUDGET_BYTES`.

    Returns
    -------
    block_frames : int or None
        Block length, at least the given one, so that no state has more than
        :data:`MAX_CARD_BLOCKS` blocks (or fewer when memory is short).
    n_features_kept : int
        How many features (best first) fit the budget with those blocks.

    Examples
    --------
    >>> import numpy as np
    >>> plan_card_blocks(np.array([[1000, 0], [0, 1000]]), 10, 50)
    (10, 50)
    """
    seg_counts = np.asarray(seg_counts)
    budget = CARD_BUDGET_BYTES if budget is None else int(budget)
    n_states = seg_counts.shape[1]
    per = _bytes_per_feature_block(n_bins, has_lag)
    cap = budget // max(1, n_features * n_states * per)
    cap = int(min(MAX_CARD_BLOCKS, max(MIN_CARD_BLOCKS, cap)))
    bf = block_frames
    if bf is not None and _blocks_per_state(seg_counts, bf).max() > cap:
        longest = int(seg_counts.max())
        lo, hi = bf, longest
        if _blocks_per_state(seg_counts, hi).max() > cap:
            bf = None  # even whole runs are too many blocks of this length: keep whole runs
        else:
            while lo < hi:  # smallest block length with at most `cap` blocks per state
                mid = (lo + hi) // 2
                if _blocks_per_state(seg_counts, mid).max() > cap:
                    lo = mid + 1
                else:
                    hi = mid
            bf = lo
    total = int(_blocks_per_state(seg_counts, bf).sum())
    kept = int(min(n_features, budget // max(1, total * per)))
    return bf, kept


class CardBlocks:
    """Per-block additive sums of many features, fed run by run in frame order.

    Parameters
    ----------
    center : ndarray of shape (n_features,)
        Fixed shift of the sums (any value near the data keeps them accurate).
    low, high : ndarray of shape (n_features,)
        Histogram range of each feature (the score card's bins).
    n_bins : int
    block_frames : int or None
        Block length in frames within each run (None: a run is one block).
    lag_frames : dict of int to int, default=None
        Lag in frames of each segment; None: no lagged sums.
    run_means : dict of (segment, state) to ndarray, default=None
        Mean of each run's lagged pairs, for the autocorrelation within runs.

    Examples
    --------
    >>> import numpy as np
    >>> cb = CardBlocks(np.zeros(1), np.zeros(1), np.ones(1), 4, 5)
    >>> cb.add(0, 0, np.arange(12), np.linspace(0, 1, 12)[:, None])
    >>> [int(b["n"]) for b in cb.blocks()[0]]
    [5, 5, 2]
    """

    def __init__(self, center, low, high, n_bins, block_frames, lag_frames=None,
                 run_means=None):
        self.center = np.asarray(center, dtype=np.float64)
        self.low, self.high = np.asarray(low, np.float64), np.asarray(high, np.float64)
        self.n_bins = int(n_bins)
        self.block_frames = block_frames
        self.lag_frames = lag_frames
        self.run_means = run_means
        self._acc = {}
        self._seen = {}
        self._tail = {}

    @property
    def has_lag(self):
        return self.lag_frames is not None

    def _block(self, s, si, b):
        key = (s, si, int(b))
        acc = self._acc.get(key)
        if acc is None:
            n = self.center.size
            acc = {"n": 0.0, "s1": np.zeros(n), "s2": np.zeros(n),
                   "hist": Histograms(self.low, self.high, n_states=1, n_bins=self.n_bins)}
            if self.has_lag:
                acc["n_pairs"] = 0.0
                for f in _LAG_FIELDS[1:]:
                    acc[f] = np.zeros(n)
            self._acc[key] = acc
        return acc

    def add(self, si, s, frames, x):
        """Add rows `x` (frame numbers `frames`, increasing) of state `s` in segment `si`.

        Rows of one (segment, state) run must come in frame order, chunk after
        chunk; a gap in frame numbers breaks the lagged pairs.
        """
        x = np.asarray(x, dtype=np.float64)
        if x.shape[0] == 0:
            return
        frames = np.asarray(frames)
        key = (si, s)
        start = self._seen.get(key, 0)
        self._seen[key] = start + x.shape[0]
        rank = start + np.arange(x.shape[0])
        bid = rank // self.block_frames if self.block_frames else np.zeros(x.shape[0], int)
        for b in np.unique(bid):
            rows = bid == b
            acc = self._block(s, si, b)
            d = x[rows] - self.center
            acc["n"] += float(rows.sum())
            acc["s1"] += d.sum(axis=0)
            acc["s2"] += (d * d).sum(axis=0)
            acc["hist"].add(x[rows], np.zeros(int(rows.sum()), dtype=np.intp))
        if self.has_lag:
            self._pairs(key, frames, x, bid)

    def _pairs(self, key, frames, x, bid):
        si, s = key
        lag = int(self.lag_frames[si])
        mean = self.run_means.get(key) if self.run_means is not None else None
        mean = self.center if mean is None else mean
        tail = self._tail.get(key)
        cuts = np.flatnonzero(np.diff(frames) != 1) + 1
        for piece in np.split(np.arange(frames.size), cuts):
            if tail is not None and frames[piece[0]] != tail[0] + 1:
                tail = None
            tx = x[:0] if tail is None else tail[1]
            tb = bid[:0] if tail is None else tail[2]
            cx = np.concatenate([tx, x[piece]])
            cb = np.concatenate([tb, bid[piece]])
            if cx.shape[0] > lag:
                # pairs (i, i + lag) whose second frame is new, in the block of frame i
                first = np.arange(max(0, tx.shape[0] - lag), cx.shape[0] - lag)
                xi, yi, bi = cx[first], cx[first + lag], cb[first]
                for b in np.unique(bi):
                    rows = bi == b
                    p, q = xi[rows] - self.center, yi[rows] - self.center
                    u, v = xi[rows] - mean, yi[rows] - mean
                    acc = self._block(s, si, b)
                    acc["n_pairs"] += float(rows.sum())
                    acc["sx"] += p.sum(axis=0)
                    acc["sy"] += q.sum(axis=0)
                    acc["sxx"] += (p * p).sum(axis=0)
                    acc["sxy"] += (p * q).sum(axis=0)
                    acc["syy"] += (q * q).sum(axis=0)
                    acc["l0"] += 0.5 * (u * u + v * v).sum(axis=0)
                    acc["lt"] += (u * v).sum(axis=0)
            tail = (frames[piece[-1]], cx[-lag:], cb[-lag:])
        self._tail[key] = tail

    def blocks(self):
        """Per state, the list of blocks as :class:`~cvdesign.stats.bootstrap.ArraySum` (sorted)."""
        n_states = 1 + max((k[0] for k in self._acc), default=-1)
        out = [[] for _ in range(n_states)]
        for key in sorted(self._acc):
            acc = dict(self._acc[key])
            acc["hist"] = acc["hist"].counts[0]
            out[key[0]].append(ArraySum(**acc))
        return out


def card_statistics(merged, center, priors, constant, has_lag):
    """Per-feature Fisher ratio, overlap and autocorrelations of merged block sums.

    Returns
    -------
    dict of ndarray of shape (n_features,)
        ``fisher_ratio``, ``overlap`` and, with lagged sums, ``autocorrelation``
        (all runs about their common mean) and ``autocorrelation_within_runs``;
        conventions as in the score card (0 for constant features).
    """
    means, variances = [], []
    for m in merged:
        n = m["n"]
        mu = m["s1"] / n
        means.append(center + mu)
        variances.append(np.maximum(m["s2"] / n - mu * mu, 0.0))
    f = fisher_ratio(np.array(means), np.array(variances), priors)
    f[constant] = 0.0
    f = np.where(np.isfinite(f), f, 1e12)
    out = {"fisher_ratio": f,
           "overlap": overlap_coefficient(np.stack([m["hist"] for m in merged]))}
    if has_lag:
        tot = {k: sum(m[k] for m in merged) for k in _LAG_FIELDS}
        with np.errstate(divide="ignore", invalid="ignore"):
            p = tot["n_pairs"]
            mm = (tot["sx"] + tot["sy"]) / (2 * p)
            v0 = (tot["sxx"] + tot["syy"]) / (2 * p) - mm * mm
            ct = tot["sxy"] / p - mm * mm
            rho = np.where(v0 > 0, ct / v0, np.nan)
            local = np.where(tot["l0"] > 0, tot["lt"] / tot["l0"], np.nan)
        rho, local = np.nan_to_num(rho, nan=0.0), np.nan_to_num(local, nan=0.0)
        rho[constant] = 0.0
        local[constant] = 0.0
        out["autocorrelation"] = rho
        out["autocorrelation_within_runs"] = local
    return out


#: Score-card columns with bootstrap intervals, and how a descriptor's value
#: follows from its features' values.
_REDUCE = {"fisher_ratio": np.maximum, "overlap": np.minimum, "autocorrelation": np.maximum,
           "autocorrelation_within_runs": np.maximum}


def _per_descriptor(values, feature_descriptor, n_desc):
    out = []
    for name, ufunc in _REDUCE.items():
        if name not in values:
            continue
        d = np.full(n_desc, 1.0 if ufunc is np.minimum else -np.inf)
        ufunc.at(d, feature_descriptor, values[name])
        out.append(d)
    return np.concatenate(out)


def card_intervals(card, center, priors, constant, feature_descriptor, n_desc, *, n_boot,
                   seed, level=0.95):
    """Bootstrap intervals of the score-card columns of `n_desc` descriptors.

    Parameters
    ----------
    card : CardBlocks
    center : ndarray of shape (n_features,)
        The `card`'s center.
    priors : ndarray of shape (n_states,)
    constant : ndarray of bool, shape (n_features,)
        Features constant in the data (scored 0).
    feature_descriptor : ndarray of int, shape (n_features,)
        Descriptor (0 .. n_desc - 1) of each feature.
    n_desc : int
    n_boot, seed : int
        Replicates and seed of :func:`~cvdesign.stats.bootstrap.block_bootstrap`.
    level : float, default=0.95

    Returns
    -------
    dict or None
        Column name -> (estimate, low, high), each of shape (n_desc,); None
        when a state has fewer than two blocks.
    """
    groups = card.blocks()
    if len(groups) != len(priors) or any(len(g) < 2 for g in groups):
        return None
    names = [n for n in _REDUCE if card.has_lag or not n.startswith("autocorrelation")]

    def stat(merged):
        vals = card_statistics(merged, center, priors, constant, card.has_lag)
        return _per_descriptor(vals, feature_descriptor, n_desc)

    res = block_bootstrap(groups, stat, n_boot=n_boot, seed=seed, level=level)
    out = {}
    for j, name in enumerate(names):
        sl = slice(j * n_desc, (j + 1) * n_desc)
        out[name] = (res.estimate[sl], res.low[sl], res.high[sl])
    return out


def integrated_time_interval(tau, window_frames, n_frames, *, level=0.95):
    """Asymptotic interval of an integrated autocorrelation time.

    ``sd(tau) = tau * sqrt(2 (2 M + 1) / N)`` for a window of ``M`` frames
    and ``N`` frames in all (Madras and Sokal, J. Stat. Phys. 50, 109, 1988).
    The interval is taken on ``log(tau)`` (delta method: ``sd(log tau) = sd(tau) /
    tau``), ``tau exp(+-z sd(log tau))``, so it stays positive and widens upward
    when the runs are short, rather than a symmetric interval clipped at 0.

    Parameters
    ----------
    tau : array-like
        Integrated times (any unit; the interval has the same).
    window_frames : array-like
        Summation window of each, frames.
    n_frames : int
        Frames of all runs together.
    level : float, default=0.95

    Returns
    -------
    low, high : ndarray

    Examples
    --------
    >>> lo, hi = integrated_time_interval([10.0], [50], 100_000)
    >>> round(float(lo[0]), 2), round(float(hi[0]), 2)
    (9.16, 10.92)
    """
    from scipy.stats import norm

    tau = np.asarray(tau, dtype=np.float64)
    rel = np.sqrt(2.0 * (2.0 * np.asarray(window_frames, np.float64) + 1.0) / n_frames)
    z = float(norm.ppf(0.5 + level / 2.0))
    return tau * np.exp(-z * rel), tau * np.exp(z * rel)
