"""Mergeable sufficient statistics of feature values.

Everything after featurization works from these statistics, not from the
frame-by-feature matrix: memory does not grow with trajectory length, partial
results from chunks, files or workers merge exactly, and a block bootstrap only
needs to resample and merge blocks.

Two kinds are provided:

* :class:`Moments` -- weighted count, mean and scatter matrix (full covariance)
  of a set of features, merged with the pairwise update of Chan, Golub and
  LeVeque (1979);
* :class:`DiagonalMoments` -- the same with the diagonal only (per-feature mean
  and variance), for screening pools too large for a full covariance.
"""

import numpy as np

__all__ = ["Moments", "DiagonalMoments", "merge_all"]


def _as_2d(x, n_features, name="x"):
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1 and n_features is not None and n_features == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise ValueError(f"{name} must be 2-D (n_frames, n_features); got shape {x.shape}")
    if n_features is not None and x.shape[1] != n_features:
        raise ValueError(f"{name} has {x.shape[1]} features; these moments hold {n_features}")
    return x


def _weights(w, n):
    if w is None:
        return None
    w = np.asarray(w, dtype=np.float64).reshape(-1)
    if w.shape[0] != n:
        raise ValueError(f"weights has {w.shape[0]} entries for {n} frames")
    if np.any(w < 0) or not np.all(np.isfinite(w)):
        raise ValueError("weights must be finite and non-negative")
    return w


class Moments:
    """Weighted count, mean and scatter matrix of ``n_features`` features.

    The scatter matrix is ``M2 = sum_t w_t (x_t - mean)(x_t - mean)^T``; the
    (biased, maximum-likelihood) covariance is ``M2 / count``.

    Parameters
    ----------
    n_features : int
        Number of features.

    Attributes
    ----------
    count : float
        Sum of frame weights (number of frames when unweighted).
    mean : ndarray of shape (n_features,)
        Weighted mean, in the features' units.
    scatter : ndarray of shape (n_features, n_features)
        Weighted scatter matrix ``M2``.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).normal(size=(100, 3))
    >>> a = Moments.from_data(x[:40]); b = Moments.from_data(x[40:])
    >>> bool(np.allclose(a.merge(b).covariance, np.cov(x.T, bias=True)))
    True
    """

    __slots__ = ("count", "mean", "scatter")

    def __init__(self, n_features):
        n_features = int(n_features)
        self.count = 0.0
        self.mean = np.zeros(n_features)
        self.scatter = np.zeros((n_features, n_features))

    @property
    def n_features(self):
        """int : number of features."""
        return self.mean.shape[0]

    @classmethod
    def from_data(cls, x, weights=None):
        """Moments of a block of frames.

        Parameters
        ----------
        x : array-like of shape (n_frames, n_features)
            Feature values.
        weights : array-like of shape (n_frames,), default=None
            Non-negative frame weights (all 1 when None).
        """
        x = _as_2d(x, None)
        w = _weights(weights, x.shape[0])
        m = cls(x.shape[1])
        if x.shape[0] == 0:
            return m
        if w is None:
            m.count = float(x.shape[0])
            m.mean = x.mean(axis=0)
            d = x - m.mean
            m.scatter = d.T @ d
        else:
            total = w.sum()
            if total == 0:
                return m
            m.count = float(total)
            m.mean = (w @ x) / total
            d = x - m.mean
            m.scatter = (d * w[:, None]).T @ d
        return m

    def copy(self):
        """Return an independent copy."""
        m = Moments(self.n_features)
        m.count = self.count
        m.mean = self.mean.copy()
        m.scatter = self.scatter.copy()
        return m

    def merge(self, other):
        """Return the moments of the union of two disjoint sets of frames.

        Uses the pairwise update of Chan, Golub and LeVeque (1979), which is
        exact and numerically stable in float64.
        """
        m, delta, cross = _merge_start(self, other)
        if delta is not None:
            m.scatter = self.scatter + other.scatter + np.outer(delta, delta) * cross
        return m

    def update(self, x, weights=None):
        """Add a block of frames in place and return self."""
        merged = self.merge(Moments.from_data(_as_2d(x, self.n_features), weights))
        self.count, self.mean, self.scatter = merged.count, merged.mean, merged.scatter
        return self

    def subset(self, index):
        """Moments of a subset of the features (exact)."""
        index = np.asarray(index, dtype=np.intp)
        m = Moments(index.shape[0])
        m.count = self.count
        m.mean = self.mean[index].copy()
        m.scatter = self.scatter[np.ix_(index, index)].copy()
        return m

    @property
    def covariance(self):
        """ndarray of shape (n_features, n_features) : biased covariance ``M2 / count``."""
        if self.count == 0:
            return np.full_like(self.scatter, np.nan)
        return self.scatter / self.count

    @property
    def variance(self):
        """ndarray of shape (n_features,) : biased variance per feature."""
        return np.diag(self.covariance).copy()


class DiagonalMoments:
    """Weighted count, mean, variance, minimum and maximum of each feature.

    The per-feature analogue of :class:`Moments`, with memory linear in the
    number of features, for screening large pools.

    Parameters
    ----------
    n_features : int
        Number of features.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(1).normal(size=(50, 4))
    >>> d = DiagonalMoments.from_data(x[:10]).merge(DiagonalMoments.from_data(x[10:]))
    >>> bool(np.allclose(d.variance, x.var(axis=0)))
    True
    """

    __slots__ = ("count", "mean", "m2", "minimum", "maximum")

    def __init__(self, n_features):
        n_features = int(n_features)
        self.count = 0.0
        self.mean = np.zeros(n_features)
        self.m2 = np.zeros(n_features)
        self.minimum = np.full(n_features, np.inf)
        self.maximum = np.full(n_features, -np.inf)

    @property
    def n_features(self):
        """int : number of features."""
        return self.mean.shape[0]

    @classmethod
    def from_data(cls, x, weights=None):
        """Diagonal moments of a block of frames (see :meth:`Moments.from_data`)."""
        x = _as_2d(x, None)
        w = _weights(weights, x.shape[0])
        m = cls(x.shape[1])
        if x.shape[0] == 0:
            return m
        if w is None:
            m.count = float(x.shape[0])
            m.mean = x.mean(axis=0)
            m.m2 = ((x - m.mean) ** 2).sum(axis=0)
        else:
            total = w.sum()
            if total == 0:
                return m
            m.count = float(total)
            m.mean = (w @ x) / total
            m.m2 = w @ ((x - m.mean) ** 2)
            x = x[w > 0]
        m.minimum = x.min(axis=0)
        m.maximum = x.max(axis=0)
        return m

    def copy(self):
        """Return an independent copy."""
        m = DiagonalMoments(self.n_features)
        m.count = self.count
        for name in ("mean", "m2", "minimum", "maximum"):
            setattr(m, name, getattr(self, name).copy())
        return m

    def merge(self, other):
        """Return the diagonal moments of the union of two disjoint sets of frames."""
        m, delta, cross = _merge_start(self, other)
        if delta is not None:
            m.m2 = self.m2 + other.m2 + delta**2 * cross
            m.minimum = np.minimum(self.minimum, other.minimum)
            m.maximum = np.maximum(self.maximum, other.maximum)
        return m

    @property
    def variance(self):
        """ndarray of shape (n_features,) : biased variance ``m2 / count``."""
        if self.count == 0:
            return np.full_like(self.m2, np.nan)
        return self.m2 / self.count


def _merge_start(a, b):
    """Shared part of the pairwise merge of Chan, Golub and LeVeque (1979).

    Returns ``(merged, delta, cross)``: a new object with count and mean set,
    the difference of the means and the weight ``n_a n_b / n`` of its outer
    product. ``delta`` is None when one side is empty and ``merged`` is then a
    copy of the other, already complete.
    """
    if b.n_features != a.n_features:
        raise ValueError(f"cannot merge moments of {b.n_features} features into {a.n_features}")
    if b.count == 0:
        return a.copy(), None, 0.0
    if a.count == 0:
        return b.copy(), None, 0.0
    n = a.count + b.count
    delta = b.mean - a.mean
    m = type(a)(a.n_features)
    m.count = n
    m.mean = a.mean + delta * (b.count / n)
    return m, delta, a.count * b.count / n


def merge_all(items):
    """Merge an iterable of moments (all of one class) in a balanced pairwise tree.

    A balanced tree keeps rounding errors at O(log n) merges deep, whatever
    the number of blocks. Returns None for an empty iterable.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.arange(12.0).reshape(6, 2)
    >>> m = merge_all(Moments.from_data(x[i:i + 1]) for i in range(6))
    >>> m.mean.tolist()
    [5.0, 6.0]
    """
    items = list(items)
    if not items:
        return None
    while len(items) > 1:
        nxt = [items[i].merge(items[i + 1]) for i in range(0, len(items) - 1, 2)]
        if len(items) % 2:
            nxt.append(items[-1])
        items = nxt
    return items[0]
