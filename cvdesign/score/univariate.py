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

__all__ = ["fisher_ratio", "Histograms", "overlap_coefficient"]


def fisher_ratio(means, variances, priors=None):
    """Per-feature Fisher ratio of between- to within-state variance.

    Parameters
    ----------
    means : array-like of shape (n_states, n_features)
    variances : array-like of shape (n_states, n_features)
        Within-state variances.
    priors : array-like of shape (n_states,), default=None
        State weights; None gives every state the same weight.

    Returns
    -------
    ndarray of shape (n_features,)
        Dimensionless; 0 where a feature is constant.

    Examples
    --------
    >>> fisher_ratio([[0.0], [2.0]], [[1.0], [1.0]]).tolist()
    [1.0]
    """
    means = np.asarray(means, dtype=np.float64)
    variances = np.asarray(variances, dtype=np.float64)
    n_states = means.shape[0]
    p = np.full(n_states, 1.0 / n_states) if priors is None else np.asarray(priors, float)
    p = p / p.sum()
    grand = p @ means
    between = p @ (means - grand) ** 2
    within = p @ variances
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(within > 0, between / np.where(within > 0, within, 1.0),
                       np.where(between > 0, np.inf, 0.0))
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
        self.low = np.asarray(low, dtype=np.float64).copy()
        self.high = np.asarray(high, dtype=np.float64).copy()
        flat = ~(self.high > self.low)
        self.high[flat] = self.low[flat] + 1.0
        self.n_bins = int(n_bins)
        self.counts = np.zeros((int(n_states), self.low.shape[0], self.n_bins))

    def add(self, x, states, weights=None, *, block=4096):
        """Add frames `x` (n_frames, n_features) with state indices `states`."""
        x = np.asarray(x, dtype=np.float64)
        states = np.asarray(states)
        n_feat = x.shape[1]
        nb = self.n_bins
        for lo in range(0, n_feat, block):
            hi = min(n_feat, lo + block)
            width = self.high[lo:hi] - self.low[lo:hi]
            b = np.floor((x[:, lo:hi] - self.low[lo:hi]) / width * nb).astype(np.intp)
            np.clip(b, 0, nb - 1, out=b)
            b += np.arange(hi - lo) * nb
            for s in np.unique(states):
                rows = states == s
                w = None if weights is None else np.repeat(weights[rows], hi - lo)
                c = np.bincount(b[rows].ravel(), weights=w, minlength=(hi - lo) * nb)
                self.counts[s, lo:hi] += c.reshape(hi - lo, nb)

    def merge(self, other):
        """Return the histograms of the union of two disjoint sets of frames."""
        if not (np.array_equal(self.low, other.low) and np.array_equal(self.high, other.high)
                and self.counts.shape == other.counts.shape):
            raise ValueError("cannot merge histograms with different bins")
        out = Histograms(self.low, self.high, n_states=self.counts.shape[0], n_bins=self.n_bins)
        out.counts = self.counts + other.counts
        return out


def overlap_coefficient(counts):
    """Worst pairwise overlapping coefficient of per-state histograms.

    Parameters
    ----------
    counts : array-like of shape (n_states, n_features, n_bins)

    Returns
    -------
    ndarray of shape (n_features,)
        ``max_{i<j} sum_b min(p_i(b), p_j(b))`` in [0, 1]; NaN for a feature
        where some state has no counts.

    Examples
    --------
    >>> import numpy as np
    >>> c = np.array([[[1.0, 1.0]], [[0.0, 2.0]]])
    >>> overlap_coefficient(c).tolist()
    [0.5]
    """
    counts = np.asarray(counts, dtype=np.float64)
    totals = counts.sum(axis=2, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = counts / totals
    out = np.zeros(counts.shape[1])
    for i, j in itertools.combinations(range(counts.shape[0]), 2):
        out = np.maximum(out, np.minimum(p[i], p[j]).sum(axis=1))
    bad = (totals[..., 0] == 0).any(axis=0)
    out[bad] = np.nan
    return out
