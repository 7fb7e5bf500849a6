"""Block bootstrap over mergeable statistics.

Frames of a trajectory are correlated, so resampling single frames would
understate every uncertainty. The block bootstrap (Künsch 1989; Efron and
Tibshirani, *An Introduction to the Bootstrap*, 1993) resamples contiguous
blocks, each at least as long as the correlation time, with replacement,
within each group (a state, or a state in one fold), and recomputes the
statistic on the merged blocks. Because blocks carry mergeable statistics
(:mod:`cvdesign.stats.moments`), a replicate costs a few merges and a refit, never a
pass over the trajectories.
"""

import warnings
from dataclasses import dataclass

import numpy as np

from .. import progress
from .moments import LaggedMoments, Moments, merge_all

__all__ = ["ArraySum", "StackedSums", "merge_blocks", "block_bootstrap", "BootstrapResult",
           "percentile_interval", "hull_interval", "MIN_INTERVAL_BLOCKS"]


class ArraySum:
    """Named arrays that merge by addition: counts, sums, histograms of a block.

    The simplest mergeable statistic: any quantity that is a sum over frames
    (or over lagged pairs) of one block. Blocks of this kind take the fast
    weighted path of :func:`block_bootstrap`.

    Parameters
    ----------
    **arrays : array-like
        Each a sum over the block's frames, of any shape.

    Examples
    --------
    >>> import numpy as np
    >>> a = ArraySum(n=1.0, s1=np.array([2.0, 3.0]))
    >>> a.merge(a)["s1"].tolist()
    [4.0, 6.0]
    """

    def __init__(self, **arrays):
        self.arrays = {k: np.array(v, dtype=np.float64) for k, v in arrays.items()}

    @classmethod
    def _of(cls, arrays):
        """An ArraySum of float64 arrays taken as they are (no copy)."""
        out = cls.__new__(cls)
        out.arrays = arrays
        return out

    def __getitem__(self, key):
        return self.arrays[key]

    def merge(self, other):
        """The sums of the union of two disjoint blocks."""
        if self.arrays.keys() != other.arrays.keys():
            raise ValueError("cannot merge ArraySum blocks with different fields")
        # the sums are new arrays: no copy
        return ArraySum._of({k: np.asarray(v + other.arrays[k]) for k, v in self.arrays.items()})


class StackedSums:
    """Blocks of :class:`ArraySum` with the same fields, held as one row per block.

    A sequence of blocks (``len``, indexing and iteration give :class:`ArraySum` views
    of the rows) that :func:`block_bootstrap` resamples without stacking them again:
    many blocks of wide sums (the score card's histograms of every feature) are held
    once, not once as blocks and once more as a stack.

    Parameters
    ----------
    fields : dict of str to ndarray of shape (n_blocks, size)
        Each field's sums, one C-contiguous float64 row per block (taken as they are).
    shapes : dict of str to tuple
        The shape of each field in one block (``()`` for a count).

    Examples
    --------
    >>> import numpy as np
    >>> st = StackedSums.from_blocks([ArraySum(n=1.0, s1=[2.0, 3.0]),
    ...                               ArraySum(n=2.0, s1=[1.0, 1.0])])
    >>> len(st), st[1]["s1"].tolist(), merge_blocks(st)["n"].tolist()
    (2, [1.0, 1.0], 3.0)
    """

    def __init__(self, fields, shapes):
        self.fields = dict(fields)
        self.shapes = {k: tuple(v) for k, v in shapes.items()}
        if self.fields.keys() != self.shapes.keys():
            raise ValueError("StackedSums needs a shape for every field")
        sizes = {a.shape[0] for a in self.fields.values()}
        if len(sizes) > 1:
            raise ValueError("every field of StackedSums needs one row per block")
        self._n = sizes.pop() if sizes else 0

    @classmethod
    def from_blocks(cls, blocks):
        """Stack a list of ArraySum blocks with the same fields (a copy of their sums)."""
        blocks = list(blocks)
        shapes = {k: np.shape(v) for k, v in blocks[0].arrays.items()}
        return cls({k: np.ascontiguousarray(np.array([np.ravel(b.arrays[k]) for b in blocks],
                                                     dtype=np.float64))
                    for k in shapes}, shapes)

    def __len__(self):
        return self._n

    def __getitem__(self, i):
        if not -self._n <= i < self._n:
            raise IndexError(f"block {i} of {self._n}")
        return ArraySum._of({k: a[i].reshape(self.shapes[k]) for k, a in self.fields.items()})

    def __iter__(self):
        return (self[i] for i in range(self._n))


def merge_blocks(blocks):
    """Merge a list of blocks: mergeable objects, or tuples of them (merged item-wise).

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import Moments
    >>> b = [Moments.from_data(np.array([[float(i)]])) for i in range(4)]
    >>> merge_blocks(b).mean.tolist()
    [1.5]
    """
    blocks = list(blocks)
    if not blocks:
        return None
    if isinstance(blocks[0], tuple):
        return tuple(merge_all(col) if col[0] is not None else None for col in zip(*blocks))
    return merge_all(blocks)


class _Raw:
    """Blocks of one kind stacked as additive raw sums, for fast weighted merging.

    Moments become (count, sum, sum of outer products) about zero; lagged
    moments and ArraySum blocks, which share one shift in a bootstrap, already are
    additive. A replicate is then one weighted sum over blocks instead of a tree of merges.
    """

    def __init__(self, blocks):
        first = blocks[0]
        self.kind = type(first)
        # every field flattened to one row per block, so a replicate is one
        # matrix-vector product per field
        if isinstance(blocks, StackedSums):  # already one row per block: no copy
            self.kind, self.shapes, self.fields = ArraySum, blocks.shapes, blocks.fields
        elif self.kind is ArraySum:
            stacked = StackedSums.from_blocks(blocks)
            self.shapes, self.fields = stacked.shapes, stacked.fields
        elif self.kind is Moments:
            p = first.n_features
            self.shape = (p, p)
            self.n = np.array([b.count for b in blocks])
            self.s1 = np.array([b.count * b.mean for b in blocks])
            self.s2 = np.ascontiguousarray(np.array(
                [(b.scatter + b.count * np.outer(b.mean, b.mean)).ravel() for b in blocks]))
        else:
            self.template = first
            self.fields = {f: np.ascontiguousarray(np.array(
                [np.ravel(getattr(b, f)) for b in blocks], dtype=np.float64))
                for f in ("count", "n_pairs", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy")}
            self.shapes = {f: np.shape(getattr(first, f)) for f in self.fields}

    @staticmethod
    def supported(blocks):
        if isinstance(blocks, StackedSums):
            return len(blocks) > 0
        if not blocks:
            return False
        kind = type(blocks[0])
        if kind is Moments:
            return all(type(b) is Moments for b in blocks)
        if kind is ArraySum:
            keys = blocks[0].arrays.keys()
            return all(type(b) is ArraySum and b.arrays.keys() == keys for b in blocks)
        if kind is LaggedMoments:
            return all(type(b) is LaggedMoments and np.array_equal(b.shift, blocks[0].shift)
                       for b in blocks)
        return False

    def n_values(self):
        """Numbers a combined block holds (for batching replicates within memory)."""
        if self.kind is Moments:
            return self.s2.shape[1] + self.s1.shape[1] + 1
        return sum(arr.shape[1] for arr in self.fields.values())

    def combine_many(self, weights):
        """The merged block of each row of `weights` (block multiplicities of one
        replicate), with one matrix product per field for all rows."""
        weights = np.asarray(weights, dtype=np.float64)
        if self.kind is Moments:
            n, s1, s2 = weights @ self.n, weights @ self.s1, weights @ self.s2
            return [self._moments(n[i], s1[i], s2[i]) for i in range(len(weights))]
        sums = {k: weights @ arr for k, arr in self.fields.items()}
        return [self._from_sums({k: v[i] for k, v in sums.items()}) for i in range(len(weights))]

    def _moments(self, n, s1, s2):
        m = Moments(self.s1.shape[1])
        n = float(n)
        if n <= 0:
            return m
        m.count = n
        m.mean = s1 / n
        m.scatter = s2.reshape(self.shape) - n * np.outer(m.mean, m.mean)
        return m

    def _from_sums(self, sums):
        if self.kind is ArraySum:  # (rows of this batch's new sums: no copy)
            return ArraySum._of({k: v.reshape(self.shapes[k]) for k, v in sums.items()})
        out = self.template.copy()
        for f, v in sums.items():
            val = v.reshape(self.shapes[f])
            if f == "n_pairs":
                val = int(round(float(val)))
            elif f == "count":
                val = float(val)
            setattr(out, f, val)
        return out


def _fast_groups(groups):
    """Per group, a list of _Raw (one per tuple position), or None if unsupported."""
    out = []
    for g in groups:
        if isinstance(g, StackedSums):
            out.append((False, [_Raw(g)] if _Raw.supported(g) else [None]))
            continue
        cols = list(zip(*g)) if isinstance(g[0], tuple) else [g]
        raws = []
        for col in cols:
            col = list(col)
            if col[0] is None:
                raws.append(None)
            elif _Raw.supported(col):
                raws.append(_Raw(col))
            else:
                return None
        out.append((isinstance(g[0], tuple), raws))
    return out


def percentile_interval(replicates, level=0.95):
    """Percentile confidence interval of bootstrap replicates along axis 0.

    Returns
    -------
    low, high : ndarray
        The ``(1 - level) / 2`` and ``(1 + level) / 2`` quantiles (NaN
        replicates ignored).
    """
    r = np.asarray(replicates, dtype=np.float64)
    a = (1.0 - level) / 2.0
    if r.shape[0] == 0:
        nan = np.full(r.shape[1:], np.nan)
        return nan, nan.copy()
    flat = r.reshape(r.shape[0], -1)
    low = np.empty(flat.shape[1])
    high = np.empty(flat.shape[1])
    holes = np.isnan(flat).any(axis=0)
    clean = ~holes
    cols = np.flatnonzero(clean)
    step = max(1, 2_000_000 // max(1, flat.shape[0]))  # bounded temporaries
    for lo in range(0, cols.size, step):  # vectorized; nanquantile goes column by column
        c = cols[lo:lo + step]
        low[c], high[c] = np.quantile(flat[:, c], [a, 1.0 - a], axis=0)
    if holes.any():
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            # columns that are NaN in every replicate (a statistic that does not apply)
            # give NaN without a warning
            warnings.simplefilter("ignore", RuntimeWarning)
            low[holes] = np.nanquantile(flat[:, holes], a, axis=0)
            high[holes] = np.nanquantile(flat[:, holes], 1.0 - a, axis=0)
    return low.reshape(r.shape[1:]), high.reshape(r.shape[1:])


@dataclass
class BootstrapResult:
    """Bootstrap replicates of a statistic and their percentile interval.

    Attributes
    ----------
    estimate : ndarray
        The statistic on all blocks.
    replicates : ndarray of shape (n_boot, ...)
        The statistic on each resample (NaN where it could not be computed).
    low, high : ndarray
        Percentile interval at `level`.
    level : float
    """

    estimate: np.ndarray
    replicates: np.ndarray
    low: np.ndarray
    high: np.ndarray
    level: float

    def interval(self, bounds=(-np.inf, np.inf)):
        """The interval the outputs report: :func:`hull_interval` of the estimate and the
        percentile interval, within `bounds` (the statistic's range)."""
        return hull_interval(self.estimate, self.low, self.high, bounds=bounds)


def hull_interval(estimate, low, high, *, bounds=(-np.inf, np.inf)):
    """The hull of the percentile interval and the basic bootstrap interval.

    The percentile interval ``[q_lo, q_hi]`` of the replicates and the basic
    (reverse-percentile) interval ``[2 e - q_hi, 2 e - q_lo]`` about the estimate
    ``e`` (Davison and Hinkley, *Bootstrap Methods and their Application*,
    Cambridge University Press, 1997, section 5.2) coincide when the replicates
    spread evenly about the estimate. When resampling biases the statistic (the
    overlap of histograms of resampled blocks comes out lower, since repeated blocks
    add noise; a Fisher ratio near 0 higher), the percentile interval can lie beside
    the estimate, and the basic one on its other side: their hull (our design, a
    conservative choice) always contains the estimate and is wider where the
    bootstrap shows a bias. Clipped to `bounds`; NaN stays NaN, and where the
    estimate is not finite the percentile interval is kept.

    Parameters
    ----------
    estimate, low, high : array-like
        The estimate and the percentile interval (same shape).
    bounds : (float, float), default=(-inf, inf)
        The range of the statistic (e.g. ``(0, 1)`` for an overlap coefficient).

    Returns
    -------
    low, high : ndarray

    Examples
    --------
    >>> lo, hi = hull_interval([0.92], [0.89], [0.91], bounds=(0.0, 1.0))
    >>> [round(float(v), 2) for v in (lo[0], hi[0])]  # replicates all below: widened up
    [0.89, 0.95]
    >>> lo, hi = hull_interval([1e-6], [2e-6], [2e-3], bounds=(0.0, np.inf))
    >>> float(lo[0]), float(hi[0])  # a Fisher ratio near 0: the interval reaches 0
    (0.0, 0.002)
    """
    e = np.asarray(estimate, dtype=np.float64)
    lo = np.asarray(low, dtype=np.float64)
    hi = np.asarray(high, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        basic_lo, basic_hi = 2.0 * e - hi, 2.0 * e - lo
        use = np.isfinite(e)
        out_lo = np.where(use, np.fmin(lo, basic_lo), lo)
        out_hi = np.where(use, np.fmax(hi, basic_hi), hi)
    out_lo = np.where(np.isnan(lo), np.nan, out_lo)
    out_hi = np.where(np.isnan(hi), np.nan, out_hi)
    return np.clip(out_lo, *bounds), np.clip(out_hi, *bounds)


def block_bootstrap(groups, statistic, *, n_boot=200, seed=0, level=0.95, label="bootstrap"):
    """Resample blocks within each group, merge, and recompute `statistic`.

    Parameters
    ----------
    groups : sequence of sequence of block
        ``groups[g]`` lists the blocks of group ``g`` (e.g. a state); a block is
        a mergeable statistic or a tuple of them. Each replicate draws, for
        every group, as many blocks as it has, with replacement.
    statistic : callable
        ``statistic(merged)`` with ``merged[g]`` the merged blocks of group
        ``g``; returns a float or an array. An exception in a replicate
        (e.g. a singular resample) gives NaN for that replicate.
    n_boot : int, default=200
        Number of replicates.
    seed : int, default=0
        Seed of the resampling (numpy ``default_rng``); same seed, same result.
    level : float, default=0.95
        Confidence level of the percentile interval.
    label : str, default='bootstrap'
        Shown beside the bar of the replicates when a progress display is
        active (:mod:`cvdesign.progress`); never changes the result.

    Returns
    -------
    BootstrapResult

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(1)
    >>> blocks = [[Moments.from_data(rng.normal(0, 1, (50, 1))) for _ in range(40)]]
    >>> res = block_bootstrap(blocks, lambda m: m[0].mean[0], n_boot=100, seed=0)
    >>> bool(res.low < res.estimate < res.high)
    True
    """
    groups = [g if isinstance(g, StackedSums) else list(g) for g in groups]
    if any(len(g) == 0 for g in groups):
        raise ValueError("every group needs at least one block")
    if not 0 < level < 1:
        raise ValueError(f"level={level!r} must be in (0, 1)")
    estimate = np.asarray(statistic([merge_blocks(g) for g in groups]), dtype=np.float64)
    rng = np.random.default_rng(seed)
    n_boot = int(n_boot)
    reps = np.full((n_boot,) + estimate.shape, np.nan)
    draws = [[rng.integers(0, len(g), len(g)) for g in groups] for _ in range(n_boot)]
    fast = _fast_groups(groups)
    with progress.bar(label, n_boot, unit="replicates") as shown:
        if fast is None:
            for r in range(n_boot):
                merged = [merge_blocks([g[i] for i in d]) for g, d in zip(groups, draws[r])]
                _replicate(reps, r, statistic, merged)
                shown.update(1)
        else:
            # block counts of every replicate, then one matrix product per field for a batch
            # of replicates (bounded memory) instead of one product per replicate
            counts = [np.array([np.bincount(draws[r][gi], minlength=len(g))
                                for r in range(n_boot)], dtype=np.float64)
                      for gi, g in enumerate(groups)]
            width = sum(raw.n_values() for _, raws in fast for raw in raws if raw is not None)
            batch = max(1, min(n_boot, _BATCH_VALUES // max(1, width)))
            for lo in range(0, n_boot, batch):
                hi = min(n_boot, lo + batch)
                per_group = []
                for (is_tuple, raws), c in zip(fast, counts):
                    parts = [[None] * (hi - lo) if raw is None else raw.combine_many(c[lo:hi])
                             for raw in raws]
                    per_group.append([tuple(p) if is_tuple else p[0] for p in zip(*parts)])
                for r in range(lo, hi):
                    _replicate(reps, r, statistic, [g[r - lo] for g in per_group])
                    shown.update(1)
    low, high = percentile_interval(reps, level)
    return BootstrapResult(estimate, reps, low, high, level)


#: Fewest blocks in every group for an interval the outputs report. Measured (independent
#: blocks, two states, a true Fisher ratio of 0.25, 200 repeats; our measurement): the
#: 95 % interval (:func:`hull_interval`) covered it in 0.64, 0.77, 0.90 and 0.92 of the
#: repeats with 2, 3, 5 and 10 blocks per state.
MIN_INTERVAL_BLOCKS = 5

#: Numbers held at once for a batch of bootstrap replicates (32 MiB of float64; bigger
#: batches save little time and cost memory).
_BATCH_VALUES = 4 * 2**20


def _replicate(reps, r, statistic, merged):
    """Replicate `r` of the statistic; NaN when it cannot be computed on this resample."""
    try:
        reps[r] = statistic(merged)
    except (ValueError, np.linalg.LinAlgError, ZeroDivisionError):
        pass
