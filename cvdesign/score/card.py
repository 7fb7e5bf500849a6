"""Confidence intervals for every row of the score card.

The score card reports, for every descriptor of the pool, its Fisher ratio,
the overlap of the state histograms, the autocorrelation at the lag (all runs
about their common mean, and each run about its own mean) and the integrated
autocorrelation time. The first four get block-bootstrap intervals
(:func:`cvdesign.stats.bootstrap.block_bootstrap`): a pass over the data
(:class:`cvdesign.passes.CardPass`) keeps, per contiguous block of each run,
additive sums (frame count, first and second moments about a fixed center,
histogram counts on the score card's bins, lagged-pair sums :data:`CARD_LAG_FIELDS`),
so a replicate is a weighted sum over blocks, never a pass over the
trajectories. A lagged pair belongs to the block of its first frame, so no
pair is lost at a block boundary and the estimate on all blocks equals the
score card's value. This module plans the blocks and turns their sums into
the card's statistics and intervals.

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

from ..stats.bootstrap import MIN_INTERVAL_BLOCKS, block_bootstrap, hull_interval
from .univariate import fisher_ratio, overlap_coefficient

__all__ = ["plan_card_blocks", "card_intervals", "integrated_time_interval",
           "CARD_BUDGET_BYTES", "MIN_CARD_BLOCKS", "MAX_CARD_BLOCKS", "CARD_LAG_FIELDS"]

#: Memory for the per-block sums of the score card, bytes.
CARD_BUDGET_BYTES = 192 * 2**20
#: Fewest blocks per state for an interval worth reporting (common practice: a
#: percentile interval from fewer resampling units is coarse).
MIN_CARD_BLOCKS = 20
#: Most blocks per state; longer blocks are still valid (each at least as long
#: as the correlation time) and cost less.
MAX_CARD_BLOCKS = 100

#: Lagged sums kept per block (see :class:`cvdesign.passes.CardPass`): pair count, sums
#: and products of the pairs about the center, and ``l0``, ``lt`` about the run's own mean.
CARD_LAG_FIELDS = ("n_pairs", "sx", "sy", "sxx", "sxy", "syy", "l0", "lt")


def _bytes_per_feature_block(n_bins, has_lag):
    # float64 sums, held twice at the peak: once per block in the pass's partial, once more
    # in the rows CardPass.finish stacks them into (the bootstrap resamples those rows)
    return 2 * 8 * (2 + n_bins + (len(CARD_LAG_FIELDS) if has_lag else 0))


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
        tot = {k: sum(m[k] for m in merged) for k in CARD_LAG_FIELDS}
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
#: The range of each column, for its interval.
_BOUNDS = {"fisher_ratio": (0.0, np.inf), "overlap": (0.0, 1.0), "autocorrelation": (-1.0, 1.0),
           "autocorrelation_within_runs": (-1.0, 1.0)}


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
    card : object
        The per-block sums: ``card.blocks()`` gives, per state, its blocks as
        :class:`~cvdesign.stats.bootstrap.ArraySum` (fields as in
        :class:`cvdesign.passes.CardSums`), ``card.has_lag`` whether they hold
        lagged sums (:class:`cvdesign.passes.CardSums` provides both).
    center : ndarray of shape (n_features,)
        The center the sums were taken about.
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
        Column name -> (estimate, low, high), each of shape (n_desc,), the interval
        :func:`~cvdesign.stats.bootstrap.hull_interval` within the column's range; None
        when a state has fewer than :data:`~cvdesign.stats.bootstrap.MIN_INTERVAL_BLOCKS`
        blocks.
    """
    groups = card.blocks()
    if len(groups) != len(priors) or any(len(g) < MIN_INTERVAL_BLOCKS for g in groups):
        return None
    names = [n for n in _REDUCE if card.has_lag or not n.startswith("autocorrelation")]

    def stat(merged):
        vals = card_statistics(merged, center, priors, constant, card.has_lag)
        return _per_descriptor(vals, feature_descriptor, n_desc)

    res = block_bootstrap(groups, stat, n_boot=n_boot, seed=seed, level=level,
                          label="bootstrap card")
    out = {}
    for j, name in enumerate(names):
        sl = slice(j * n_desc, (j + 1) * n_desc)
        low, high = hull_interval(res.estimate[sl], res.low[sl], res.high[sl],
                                  bounds=_BOUNDS[name])
        out[name] = (res.estimate[sl], low, high)
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
    from scipy.special import ndtri  # (scipy.stats would add about 0.5 s of imports)

    tau = np.asarray(tau, dtype=np.float64)
    rel = np.sqrt(2.0 * (2.0 * np.asarray(window_frames, np.float64) + 1.0) / n_frames)
    z = float(ndtri(0.5 + level / 2.0))
    return tau * np.exp(-z * rel), tau * np.exp(z * rel)
