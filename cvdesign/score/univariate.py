"""Univariate scores: how well each feature separates the states.

* **Fisher ratio** (Fisher 1936): between-state variance of the state means
  over the mean within-state variance, ``J = sum_k p_k (mu_k - mu)^2 /
  sum_k p_k sigma_k^2`` with state weights ``p_k`` (equal by default, so a
  longer run of one state does not dominate). 0 means no separation; for two
  equally weighted states with a common spread sigma, ``J = (delta mu /
  2 sigma)^2``.
* **Overlap**: the overlapping coefficient ``OVL = sum_bins min(p_i, p_j)``
  of two states' normalized histograms (Inman and Bradley 1989), 1 for
  identical distributions and 0 for disjoint ones; with more than two states
  the worst (largest) pairwise value is reported.

Both are computed from mergeable statistics (:mod:`cvdesign.stats.moments` and
:class:`Histograms`).
"""

import itertools

import numpy as np

from ..stats.scratch import scratch
from ..stats.separation import fisher_ratio

__all__ = ["fisher_ratio", "Histograms", "bin_counts", "histogram_range",
           "overlap_coefficient", "pairwise_overlaps"]


def histogram_range(low, high):
    """Copies of `low` and `high` (float64), with ``high = low + 1`` where ``high <= low``.

    Examples
    --------
    >>> [a.tolist() for a in histogram_range([0.0, 2.0], [1.0, 2.0])]
    [[0.0, 2.0], [1.0, 3.0]]
    """
    low = np.array(low, dtype=np.float64, copy=True)
    high = np.array(high, dtype=np.float64, copy=True)
    flat = ~(high > low)
    high[flat] = low[flat] + 1.0
    return low, high


#: Values binned at once by :func:`bin_counts` (a block of columns of about 0.5 MB, so the
#: chain of elementwise passes and the counts stay in the processor's cache).
BIN_BLOCK_VALUES = 65536


def bin_counts(x, low, high, n_bins, groups, n_groups, weights=None, *, block=None, out=None):
    """Counts of every feature on fixed bins, per group of rows, added into `out`.

    The bin of a value is ``floor((x - low) / (high - low) * n_bins)``, clipped to
    ``[0, n_bins - 1]`` (values outside the range, infinities included, fall into the
    edge bins; NaN into the first). The counts of a block of features come from one
    ``bincount`` over a combined (group, feature, bin) index; the blocks are narrow enough
    (:data:`BIN_BLOCK_VALUES` values) for their passes and counts to stay in cache. With
    fewer rows than bins (the short leaves of big pools) each row is added in place
    instead, which does not sweep the whole array of counts once per block.

    Parameters
    ----------
    x : array-like of shape (n_frames, n_features)
    low, high : ndarray of shape (n_features,)
        Range of each feature (``high > low``).
    n_bins : int
    groups : array-like of int, shape (n_frames,)
        Group of each row (a state code, a block number), in ``[0, n_groups)``.
    n_groups : int
    weights : array-like of shape (n_frames,), default=None
        Row weights (counts of 1 when None).
    block : int, default=None
        Features binned at once (bounds the temporaries); None: as many as make
        :data:`BIN_BLOCK_VALUES` values. The counts do not depend on it.
    out : ndarray of shape (n_groups, n_features, n_bins), default=None
        Counts to add to (C-contiguous float64); None: new zeros.

    Returns
    -------
    ndarray of shape (n_groups, n_features, n_bins), float64
        `out` with the counts added (weighted counts: each bin's sum in row order,
        then added).

    Examples
    --------
    >>> bin_counts(np.array([[0.1], [0.9], [0.2]]), np.array([0.0]), np.array([1.0]), 2,
    ...            [0, 1, 1], 2).tolist()
    [[[1.0, 0.0]], [[1.0, 1.0]]]
    """
    x = np.asarray(x, dtype=np.float64)
    groups = np.asarray(groups, dtype=np.intp).reshape(-1)
    n_frames, n_feat = x.shape
    nb, n_groups = int(n_bins), int(n_groups)
    if out is None:
        out = np.zeros((n_groups, n_feat, nb))
    if n_frames == 0 or n_feat == 0:
        return out
    if weights is not None:
        weights = np.asarray(weights, dtype=np.float64).reshape(-1)
    by_row = weights is None and n_frames < nb
    if block is None:
        block = max(1, BIN_BLOCK_VALUES // n_frames)
    block = min(int(block), n_feat)
    width = high - low
    offsets = np.arange(block) * nb                # feature offset within a block
    grouped = bool(groups.any())
    # one group for every row (the usual leaf): its offset joins the features' offsets
    single = int(groups[0]) if grouped and not (groups != groups[0]).any() else None
    flat = out.reshape(-1)
    w = None if weights is None else np.repeat(weights, block)
    for lo in range(0, n_feat, block):
        hi = min(n_feat, lo + block)
        m = hi - lo
        t = np.subtract(x[:, lo:hi], low[lo:hi], out=scratch("bin_values", (n_frames, m)))
        t /= width[lo:hi]
        t *= nb
        np.fmax(t, 0.0, out=t)                     # (NaN to 0)
        np.minimum(t, nb - 1, out=t)
        b = scratch("bin_index", (n_frames, m), np.intp)
        b[...] = t                                 # truncation: floor of t >= 0
        size = m * nb
        if by_row:  # a row holds each feature once: no repeated index within a row
            b += offsets[:m]
            b += lo * nb
            if grouped:
                b += (groups * (n_feat * nb))[:, None]
            for row in b:
                flat[row] += 1.0
            continue
        if single is not None:
            b += offsets[:m] + single * size       # feature and group offsets in one pass
        else:
            b += offsets[:m]
            if grouped:
                b += (groups * size)[:, None]      # group offset
        if w is not None and w.size != b.size:  # (the last, narrower block)
            w = np.repeat(weights, m)
        c = np.bincount(b.ravel(), weights=w, minlength=n_groups * size)
        out[:, lo:hi] += c.reshape(n_groups, m, nb)
    return out


class Histograms:
    """Mergeable per-state histograms of many features on fixed bins.

    Parameters
    ----------
    low, high : array-like of shape (n_features,)
        Range of each feature; values outside fall into the edge bins.
    n_states : int
    n_bins : int, default=50

    Attributes
    ----------
    counts : ndarray of shape (n_states, n_features, n_bins)
        Weighted counts.

    Examples
    --------
    >>> import numpy as np
    >>> h = Histograms([0.0], [1.0], n_states=2, n_bins=4)
    >>> h.add(np.array([[0.1], [0.9]]), np.array([0, 1]))
    >>> overlap_coefficient(h.counts).tolist()
    [0.0]
    """

    def __init__(self, low, high, *, n_states, n_bins=50):
        self.low, self.high = histogram_range(low, high)
        self.n_bins = int(n_bins)
        self.counts = np.zeros((int(n_states), self.low.shape[0], self.n_bins))

    def add(self, x, states, weights=None, *, block=None):
        """Add frames `x` (n_frames, n_features) with state indices `states`."""
        bin_counts(x, self.low, self.high, self.n_bins, states, self.counts.shape[0], weights,
                   block=block, out=self.counts)

    def merge(self, other):
        """Return the histograms of the union of two disjoint sets of frames."""
        if not (np.array_equal(self.low, other.low) and np.array_equal(self.high, other.high)
                and self.counts.shape == other.counts.shape):
            raise ValueError("cannot merge histograms with different bins")
        out = Histograms(self.low, self.high, n_states=self.counts.shape[0], n_bins=self.n_bins)
        out.counts = self.counts + other.counts
        return out


def pairwise_overlaps(counts):
    """Overlapping coefficient of every pair of per-state histograms.

    Parameters
    ----------
    counts : array-like of shape (n_states, n_features, n_bins)

    Returns
    -------
    pairs : list of tuple of int
        ``(i, j)``, ``i < j``, in :func:`itertools.combinations` order.
    overlap : ndarray of shape (n_pairs, n_features)
        ``sum_b min(p_i(b), p_j(b))`` in [0, 1] (Inman and Bradley 1989, Commun.
        Stat. Theory Methods 18, 3851; from memory); NaN for a feature where some state has
        no counts.

    Examples
    --------
    >>> import numpy as np
    >>> c = np.array([[[1.0, 1.0]], [[0.0, 2.0]], [[2.0, 0.0]]])
    >>> pairs, ov = pairwise_overlaps(c)
    >>> pairs, ov[:, 0].tolist()
    ([(0, 1), (0, 2), (1, 2)], [0.5, 0.5, 0.0])
    """
    counts = np.asarray(counts, dtype=np.float64)
    totals = counts.sum(axis=2, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = counts / totals
    pairs = list(itertools.combinations(range(counts.shape[0]), 2))
    out = np.zeros((len(pairs), counts.shape[1]))
    for k, (i, j) in enumerate(pairs):
        out[k] = np.minimum(p[i], p[j]).sum(axis=1)
    out[:, (totals[..., 0] == 0).any(axis=0)] = np.nan
    return pairs, out


def overlap_coefficient(counts):
    """Worst pairwise overlapping coefficient of per-state histograms.

    Parameters
    ----------
    counts : array-like of shape (n_states, n_features, n_bins)

    Returns
    -------
    ndarray of shape (n_features,)
        ``max_{i<j} sum_b min(p_i(b), p_j(b))`` in [0, 1]; NaN for a feature
        where some state has no counts (:func:`pairwise_overlaps`).

    Examples
    --------
    >>> import numpy as np
    >>> c = np.array([[[1.0, 1.0]], [[0.0, 2.0]]])
    >>> overlap_coefficient(c).tolist()
    [0.5]
    """
    counts = np.asarray(counts, dtype=np.float64)
    pairs, ov = pairwise_overlaps(counts)
    if not pairs:
        return np.zeros(counts.shape[1])
    bad = np.isnan(ov).any(axis=0)
    out = np.max(np.where(np.isnan(ov), 0.0, ov), axis=0)
    out[bad] = np.nan
    return out
