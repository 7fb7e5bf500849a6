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
  and variance), for screening pools too large for a full covariance;
* :class:`LaggedMoments` -- sums of time-lagged pairs ``(x_t, x_{t+lag})`` about
  a fixed shift, from which instantaneous and lagged covariances follow
  (TICA, VAMP-2), merged by exact addition; :class:`DiagonalLaggedMoments` is
  its per-feature counterpart (autocorrelations), and :class:`LagAccumulator`
  builds either from consecutive chunks of trajectories.
"""

import numpy as np

from .scratch import scratch

__all__ = [
    "Moments",
    "DiagonalMoments",
    "merge_all",
    "LaggedMoments",
    "DiagonalLaggedMoments",
    "LagAccumulator",
    "window_sums",
]


def _as_2d(x, n_features, name="x"):
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1 and n_features is not None and n_features == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise ValueError(f"{name} must be 2-D (n_frames, n_features); got shape {x.shape}")
    if n_features is not None and x.shape[1] != n_features:
        raise ValueError(f"{name} has {x.shape[1]} features; these moments hold {n_features}")
    return x


def _column_dot(a, b):
    """Column sums of ``a * b`` (2-D arrays) without forming the product array."""
    return np.einsum("ij,ij->j", a, b)


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
        if x.shape[0] == 0:
            return cls(x.shape[1])
        if w is None:
            m = cls.__new__(cls)  # every field set below
            m.count = float(x.shape[0])
            m.mean = x.mean(axis=0)
            d = np.subtract(x, m.mean, out=scratch("moments_centred", x.shape))
            m.scatter = d.T @ d
            return m
        total = w.sum()
        if total == 0:
            return cls(x.shape[1])
        m = cls.__new__(cls)  # every field set below
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
            m.scatter = _rank_one_update(self.scatter + other.scatter, cross, delta)
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
        if x.shape[0] == 0:
            return cls(x.shape[1])
        if w is None:
            mean = x.mean(axis=0)
            d = x - mean
            return cls._of(float(x.shape[0]), mean, _column_dot(d, d), x.min(axis=0),
                           x.max(axis=0))
        total = w.sum()
        if total == 0:
            return cls(x.shape[1])
        mean = (w @ x) / total
        m2 = w @ ((x - mean) ** 2)
        x = x[w > 0]
        return cls._of(float(total), mean, m2, x.min(axis=0), x.max(axis=0))

    @classmethod
    def _of(cls, count, mean, m2, minimum, maximum):
        """An instance holding these arrays (no copies, no checks; count > 0)."""
        m = cls.__new__(cls)
        m.count, m.mean, m.m2, m.minimum, m.maximum = count, mean, m2, minimum, maximum
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


#: Values of the temporary of :func:`_rank_one_update` (a block of rows of x x^T).
_OUTER_BLOCK = 1 << 15


def _rank_one_update(a, alpha, x):
    """``a + (x x^T) alpha`` in place on the new array `a`, returned.

    Each entry gets ``(x_i x_j) alpha``, which is symmetric to the last bit (so is
    `a` after the update when it was before), added a block of rows at a time: no
    temporary of the whole matrix. numpy only: the worker processes of the pass
    engine merge moments without importing SciPy (about 0.15 s of their start).
    """
    step = max(1, _OUTER_BLOCK // max(1, x.size))
    for i in range(0, x.size, step):
        block = np.multiply.outer(x[i:i + step], x)
        block *= alpha
        a[i:i + step] += block
    return a


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
    m = type(a).__new__(type(a))  # every field is set by the caller
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


# ---------------------------------------------------------------------------
# Time-lagged statistics
# ---------------------------------------------------------------------------


def _check_lag(lag):
    """Validate a lag in frames and return it as an int."""
    if isinstance(lag, (bool, np.bool_)) or not isinstance(lag, (int, np.integer)) or lag < 1:
        raise ValueError(f"lag={lag!r} must be an integer >= 1 (a number of frames)")
    return int(lag)


def window_sums(d, a, b, k, gram, cross, *, sum_x=None, sum_xx=None):
    """Sums of the pairs ``(d[t], d[t + k])``, ``a <= t < b``, of one window of rows.

    The second frames are the first ones moved by `k` rows, so when ``2 k < b - a``
    their sums are the first frames' sums plus those of the `k` rows after them minus
    those of the `k` rows at their start: no product over the second frames. Each term
    sums the same rows as the direct product, so the rounding error stays of the same
    order (the edges hold ``2 k`` rows; a second moment loses at most their share).

    Parameters
    ----------
    d : ndarray of shape (n_rows, n_features), float64
        Rows ``a`` to ``b + k`` at least, in time order (shifted frames).
    a, b, k : int
        First frames ``d[a:b]`` (``b > a``), lag ``k >= 1`` in rows.
    gram, cross : callable
        ``gram(u)`` and ``cross(u, v)``: the second moments (``u.T @ v`` or the column
        sums of ``u * v``).
    sum_x, sum_xx : ndarray, default=None
        The first frames' sums when the caller has them.

    Returns
    -------
    tuple
        ``(sum_x, sum_y, sum_xx, sum_xy, sum_yy)``.

    Examples
    --------
    >>> d = np.arange(12.0).reshape(6, 2)
    >>> dot = lambda u, v=None: (u * (u if v is None else v)).sum(axis=0)
    >>> sy, syy = window_sums(d, 0, 5, 1, dot, dot)[1::3]
    >>> bool(np.array_equal(syy, dot(d[1:6])) and np.array_equal(sy, d[1:6].sum(axis=0)))
    True
    """
    d0 = d[a:b]
    sx = d0.sum(axis=0) if sum_x is None else sum_x
    sxx = gram(d0) if sum_xx is None else sum_xx
    if 2 * k < b - a:
        head, tail = d[a:a + k], d[b:b + k]
        sy = sx + (tail.sum(axis=0) - head.sum(axis=0))
        syy = sxx + (gram(tail) - gram(head))
    else:
        dt = d[a + k:b + k]
        sy, syy = dt.sum(axis=0), gram(dt)
    return sx, sy, sxx, cross(d0, d[a + k:b + k]), syy


class _LaggedBase:
    """Shared machinery of :class:`LaggedMoments` and :class:`DiagonalLaggedMoments`.

    Subclasses define ``_outer(a, b)`` (outer product or elementwise product)
    and ``_products(d0, dt, w)`` (the three second-moment sums of a block).
    """

    __slots__ = ("count", "n_pairs", "lag", "shift", "sum_x", "sum_y",
                 "sum_xx", "sum_xy", "sum_yy")

    def __init__(self, n_features, *, shift=None, lag=None):
        n_features = int(n_features)
        if n_features < 0:
            raise ValueError(f"n_features={n_features!r} must be >= 0")
        if shift is None:
            shift = np.zeros(n_features)
        else:
            shift = np.array(shift, dtype=np.float64, copy=True).reshape(-1)
            if shift.shape[0] != n_features:
                raise ValueError(
                    f"shift has {shift.shape[0]} entries; these moments hold {n_features} features"
                )
            if not np.all(np.isfinite(shift)):
                raise ValueError("shift must be finite")
        self.lag = None if lag is None else _check_lag(lag)
        self.count = 0.0
        self.n_pairs = 0
        self.shift = shift
        self.sum_x = np.zeros(n_features)
        self.sum_y = np.zeros(n_features)
        self.sum_xx = self._zero_second(n_features)
        self.sum_xy = self._zero_second(n_features)
        self.sum_yy = self._zero_second(n_features)

    @property
    def n_features(self):
        """int : number of features."""
        return self.shift.shape[0]

    @classmethod
    def from_series(cls, x, lag, weights=None, shift=None):
        """Statistics of the pairs ``(x[t], x[t + lag])`` of one time-ordered series.

        Parameters
        ----------
        x : array-like of shape (n_frames, n_features)
            Feature values of ONE trajectory, in time order.
        lag : int
            Lag in frames, >= 1.
        weights : array-like of shape (n_frames,), default=None
            Non-negative frame weights; a pair gets the weight of its earlier
            frame ``x[t]``. All 1 when None.
        shift : array-like of shape (n_features,), default=None
            Fixed vector the sums are accumulated about (zeros when None).

        Returns
        -------
        instance of the class
            Empty (``count == 0``) when ``n_frames <= lag``.
        """
        lag = _check_lag(lag)
        x = _as_2d(x, None)
        w = _weights(weights, x.shape[0])
        m = cls(x.shape[1], shift=shift, lag=lag)
        if x.shape[0] > lag:
            m.add_pairs(x[:-lag], x[lag:], None if w is None else w[:-lag])
        return m

    def add_pairs(self, x0, xt, weights=None):
        """Add pairs ``(x0[i], xt[i])`` in place and return self.

        Parameters
        ----------
        x0 : array-like of shape (n_pairs, n_features)
            Earlier frames of the pairs.
        xt : array-like of shape (n_pairs, n_features)
            Frames one lag later.
        weights : array-like of shape (n_pairs,), default=None
            Non-negative pair weights (all 1 when None).

        Returns
        -------
        self
        """
        x0 = _as_2d(x0, self.n_features, "x0")
        xt = _as_2d(xt, self.n_features, "xt")
        if x0.shape != xt.shape:
            raise ValueError(f"x0 has shape {x0.shape} but xt has shape {xt.shape}; "
                             "they must hold the same number of pairs")
        w = _weights(weights, x0.shape[0])
        if x0.shape[0] == 0:
            return self
        return self.add_shifted(x0 - self.shift, xt - self.shift, w)

    def add_shifted(self, d0, dt, weights=None):
        """:meth:`add_pairs` for pairs already shifted: ``d0 = x0 - shift``, ``dt = xt - shift``.

        No checks: `d0` and `dt` are float64 arrays of shape (n_pairs, n_features)
        and `weights` None or checked. For passes that shift a leaf once and take
        several sets of pairs from it; the same bytes as :meth:`add_pairs` on the
        unshifted pairs. Returns self.
        """
        w = weights
        if d0.shape[0] == 0:
            return self
        if w is None:
            self.count += float(d0.shape[0])
            self.sum_x += d0.sum(axis=0)
            self.sum_y += dt.sum(axis=0)
        else:
            self.count += float(w.sum())
            self.sum_x += w @ d0
            self.sum_y += w @ dt
        self.n_pairs += int(d0.shape[0])
        sxx, sxy, syy = self._products(d0, dt, w)
        self.sum_xx += sxx
        self.sum_xy += sxy
        self.sum_yy += syy
        return self

    def add_window(self, d, a, b, k, *, sum_x=None, sum_xx=None):
        """:meth:`add_shifted` for the unweighted pairs ``(d[t], d[t + k])``, ``a <= t < b``.

        `d` is a window of shifted frames (``x - shift``, float64, rows in time order)
        holding rows ``a`` to ``b + k``. The second frames' sums come from the first
        frames' and the edges (:func:`window_sums`): no product over the second frames
        when ``2 k < b - a``.

        Parameters
        ----------
        d : ndarray of shape (n_rows, n_features), float64
        a, b, k : int
            First frames ``d[a:b]``, lag ``k >= 1`` in rows.
        sum_x, sum_xx : ndarray, default=None
            The first frames' ``sum_x`` and ``sum_xx`` when the caller has them already.

        Returns
        -------
        self
        """
        n = b - a
        if n <= 0:
            return self
        sx, sy, sxx, sxy, syy = window_sums(d, a, b, k, self._gram, self._cross, sum_x=sum_x,
                                            sum_xx=sum_xx)
        self.count += float(n)
        self.n_pairs += int(n)
        self.sum_x += sx
        self.sum_y += sy
        self.sum_xx += sxx
        self.sum_xy += sxy
        self.sum_yy += syy
        return self

    def copy(self):
        """Return an independent copy."""
        return self._with(self.lag, self.count, self.n_pairs, self.sum_x.copy(),
                          self.sum_y.copy(), self.sum_xx.copy(), self.sum_xy.copy(),
                          self.sum_yy.copy())

    def _with(self, lag, count, n_pairs, sum_x, sum_y, sum_xx, sum_xy, sum_yy):
        """A new instance with a copy of this shift and these fields (not copied)."""
        m = type(self).__new__(type(self))
        m.shift, m.lag, m.count, m.n_pairs = self.shift.copy(), lag, count, n_pairs
        m.sum_x, m.sum_y, m.sum_xx, m.sum_xy, m.sum_yy = sum_x, sum_y, sum_xx, sum_xy, sum_yy
        return m

    def merge(self, other):
        """Return the statistics of the union of two disjoint sets of pairs.

        Exact: every sum is added. Both sides must have the same shift (an
        empty side, ``count == 0``, is exempt) and, when both know it, the
        same lag; use :meth:`reshifted` to bring statistics to a common shift.

        Parameters
        ----------
        other : same class as self
            Statistics of other pairs (another trajectory, chunk or worker).

        Returns
        -------
        new instance
            Neither input is modified.
        """
        if type(other) is not type(self):
            raise ValueError(f"cannot merge {type(other).__name__} into {type(self).__name__}")
        if other.n_features != self.n_features:
            raise ValueError(
                f"cannot merge moments of {other.n_features} features into {self.n_features}"
            )
        if self.lag is not None and other.lag is not None and self.lag != other.lag:
            raise ValueError(
                f"cannot merge lagged moments of lag={other.lag} into lag={self.lag}"
            )
        lag = self.lag if self.lag is not None else other.lag
        if other.count == 0 or self.count == 0:
            m = (self if other.count == 0 else other).copy()
            m.n_pairs = self.n_pairs + other.n_pairs
            m.lag = lag
            return m
        if not np.array_equal(self.shift, other.shift):
            raise ValueError("cannot merge lagged moments accumulated about different shifts; "
                             "bring one to the other's shift with .reshifted(shift) first")
        return self._with(lag, self.count + other.count, self.n_pairs + other.n_pairs,
                          self.sum_x + other.sum_x, self.sum_y + other.sum_y,
                          self.sum_xx + other.sum_xx, self.sum_xy + other.sum_xy,
                          self.sum_yy + other.sum_yy)

    def reshifted(self, shift):
        """The same statistics accumulated about another shift vector.

        Parameters
        ----------
        shift : array-like of shape (n_features,)

        Returns
        -------
        new instance
            Equal to re-accumulating the pairs about `shift`, up to rounding.
        """
        m = type(self)(self.n_features, shift=shift, lag=self.lag)
        d = self.shift - m.shift
        n = self.count
        m.count, m.n_pairs = n, self.n_pairs
        m.sum_x = self.sum_x + n * d
        m.sum_y = self.sum_y + n * d
        dd = n * self._outer(d, d)
        m.sum_xx = self.sum_xx + self._outer(self.sum_x, d) + self._outer(d, self.sum_x) + dd
        m.sum_xy = self.sum_xy + self._outer(self.sum_x, d) + self._outer(d, self.sum_y) + dd
        m.sum_yy = self.sum_yy + self._outer(self.sum_y, d) + self._outer(d, self.sum_y) + dd
        return m

    def _centered(self):
        """Mean offsets ``a = sum_x / n``, ``b = sum_y / n`` (about the shift)."""
        return self.sum_x / self.count, self.sum_y / self.count


class LaggedMoments(_LaggedBase):
    """Mergeable statistics of time-lagged pairs ``(x_t, y_t = x_{t+lag})``.

    Holds the weighted pair count, the sums of ``x`` and ``y`` and the three
    second-moment matrices ``sum w x x^T``, ``sum w x y^T`` and
    ``sum w y y^T``, all accumulated about a fixed `shift` vector (for example
    a mean from a first pass over the data) so that the raw sums stay well
    conditioned. Merging adds the sums, which is exact.

    Parameters
    ----------
    n_features : int
        Number of features.
    shift : array-like of shape (n_features,), default=None
        Vector subtracted from every frame before accumulation (zeros when
        None). Choose it near the data mean when the features are far from
        zero compared with their spread.
    lag : int, default=None
        Lag in frames, when known; :meth:`merge` refuses to mix lags.

    Attributes
    ----------
    count : float
        Sum of pair weights (number of pairs when unweighted).
    n_pairs : int
        Number of pairs added, whatever their weights.
    lag : int or None
    shift : ndarray of shape (n_features,)
    sum_x, sum_y : ndarray of shape (n_features,)
        ``sum w (x - shift)`` and ``sum w (y - shift)``.
    sum_xx, sum_xy, sum_yy : ndarray of shape (n_features, n_features)
        ``sum w (x - shift)(x - shift)^T``, ``sum w (x - shift)(y - shift)^T``
        and ``sum w (y - shift)(y - shift)^T``.

    See Also
    --------
    LagAccumulator : building these statistics from a stream of chunks.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).normal(size=(200, 2)).cumsum(axis=0)
    >>> a = LaggedMoments.from_series(x[:100], lag=3)
    >>> b = LaggedMoments.from_series(x[100:], lag=3)
    >>> (a.merge(b).n_pairs, LaggedMoments.from_series(x, lag=3).n_pairs)
    (194, 197)
    >>> mean, c0, ctau = a.covariances()
    >>> bool(np.allclose(c0, c0.T) and np.allclose(ctau, ctau.T))
    True
    """

    __slots__ = ()

    @staticmethod
    def _zero_second(n):
        return np.zeros((n, n))

    @staticmethod
    def _outer(a, b):
        return np.outer(a, b)

    @staticmethod
    def _gram(a):
        return a.T @ a

    @staticmethod
    def _cross(a, b):
        return a.T @ b

    @staticmethod
    def _products(d0, dt, w):
        d0w = d0 if w is None else d0 * w[:, None]
        dtw = dt if w is None else dt * w[:, None]
        return d0w.T @ d0, d0w.T @ dt, dtw.T @ dt

    def subset(self, index):
        """Statistics of a subset of the features (exact).

        Parameters
        ----------
        index : array-like of int
            Feature indices, in the order wanted.

        Returns
        -------
        LaggedMoments
        """
        index = np.asarray(index, dtype=np.intp).reshape(-1)
        m = LaggedMoments(index.shape[0], shift=self.shift[index], lag=self.lag)
        m.count, m.n_pairs = self.count, self.n_pairs
        m.sum_x = self.sum_x[index].copy()
        m.sum_y = self.sum_y[index].copy()
        ix = np.ix_(index, index)
        m.sum_xx = self.sum_xx[ix].copy()
        m.sum_xy = self.sum_xy[ix].copy()
        m.sum_yy = self.sum_yy[ix].copy()
        return m

    def diagonal(self):
        """The per-feature statistics (a :class:`DiagonalLaggedMoments`)."""
        m = DiagonalLaggedMoments(self.n_features, shift=self.shift, lag=self.lag)
        m.count, m.n_pairs = self.count, self.n_pairs
        m.sum_x, m.sum_y = self.sum_x.copy(), self.sum_y.copy()
        m.sum_xx = np.diag(self.sum_xx).copy()
        m.sum_xy = np.diag(self.sum_xy).copy()
        m.sum_yy = np.diag(self.sum_yy).copy()
        return m

    def covariances(self, reversible=True):
        """Mean, instantaneous and time-lagged covariances (biased, ``/ count``).

        Parameters
        ----------
        reversible : bool, default=True
            True: the symmetrized estimate, which treats every pair as seen in
            both time directions (detailed balance); False: each end of the
            pairs about its own mean.

        Returns
        -------
        tuple
            With ``reversible=True``: ``(mean, C0, Ctau)`` where ``mean`` of
            shape (n_features,) is the mean over both ends of the pairs,
            ``C0 = (Cxx + Cyy) / 2`` and ``Ctau = (Cxy + Cyx) / 2``, both of
            shape (n_features, n_features), symmetric, about that common
            mean. With ``reversible=False``: ``(mean_x, mean_y, Cxx, Cxy,
            Cyy)``, each covariance about the means of its own ends
            (``Cxy[i, j] = cov(x_i, y_j)``). Units: the features' (squared
            for covariances). All NaN when there are no pairs.
        """
        n = self.n_features
        if self.count == 0:
            vec, mat = np.full(n, np.nan), np.full((n, n), np.nan)
            if reversible:
                return vec, mat, mat.copy()
            return vec, vec.copy(), mat, mat.copy(), mat.copy()
        a, b = self._centered()
        if reversible:
            m = 0.5 * (a + b)
            mm = np.outer(m, m)
            c0 = 0.5 * (self.sum_xx + self.sum_yy) / self.count - mm
            ct = 0.5 * (self.sum_xy + self.sum_xy.T) / self.count - mm
            return self.shift + m, 0.5 * (c0 + c0.T), 0.5 * (ct + ct.T)
        cxx = self.sum_xx / self.count - np.outer(a, a)
        cyy = self.sum_yy / self.count - np.outer(b, b)
        cxy = self.sum_xy / self.count - np.outer(a, b)
        return (self.shift + a, self.shift + b, 0.5 * (cxx + cxx.T), cxy,
                0.5 * (cyy + cyy.T))


class DiagonalLaggedMoments(_LaggedBase):
    """Per-feature statistics of time-lagged pairs, for pools too large for matrices.

    The diagonal of :class:`LaggedMoments`: count, ``sum_x``, ``sum_y``,
    ``sum_xx``, ``sum_xy`` and ``sum_yy`` per feature (memory linear in the
    number of features), with the same constructors and exact merge.

    Parameters
    ----------
    n_features : int
        Number of features.
    shift : array-like of shape (n_features,), default=None
        As in :class:`LaggedMoments`.
    lag : int, default=None
        As in :class:`LaggedMoments`.

    Attributes
    ----------
    count : float
    n_pairs : int
    lag : int or None
    shift : ndarray of shape (n_features,)
    sum_x, sum_y, sum_xx, sum_xy, sum_yy : ndarray of shape (n_features,)
        Per-feature sums about `shift`, e.g. ``sum_xy = sum w (x - shift)(y - shift)``.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).normal(size=(5000, 2))
    >>> x[:, 1] = np.convolve(x[:, 1], np.ones(20) / 20, mode="same")  # a slow feature
    >>> ac = DiagonalLaggedMoments.from_series(x, lag=5).autocorrelation()
    >>> bool(abs(ac[0]) < 0.1 and ac[1] > 0.6)
    True
    """

    __slots__ = ()

    @staticmethod
    def _zero_second(n):
        return np.zeros(n)

    @staticmethod
    def _outer(a, b):
        return a * b

    @staticmethod
    def _gram(a):
        return _column_dot(a, a)

    _cross = staticmethod(_column_dot)

    @staticmethod
    def _products(d0, dt, w):
        if w is None:
            return _column_dot(d0, d0), _column_dot(d0, dt), _column_dot(dt, dt)
        return w @ (d0 * d0), w @ (d0 * dt), w @ (dt * dt)

    def subset(self, index):
        """Statistics of a subset of the features (exact).

        Parameters
        ----------
        index : array-like of int

        Returns
        -------
        DiagonalLaggedMoments
        """
        index = np.asarray(index, dtype=np.intp).reshape(-1)
        m = DiagonalLaggedMoments(index.shape[0], shift=self.shift[index], lag=self.lag)
        m.count, m.n_pairs = self.count, self.n_pairs
        for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
            setattr(m, name, getattr(self, name)[index].copy())
        return m

    def covariances(self, reversible=True):
        """Per-feature means, variances and lagged covariances (biased, ``/ count``).

        Parameters
        ----------
        reversible : bool, default=True
            As in :meth:`LaggedMoments.covariances`.

        Returns
        -------
        tuple of ndarray of shape (n_features,)
            ``(mean, var0, covtau)`` when reversible, else
            ``(mean_x, mean_y, var_x, cov_xy, var_y)``: the diagonals of
            :meth:`LaggedMoments.covariances`. All NaN when there are no pairs.
        """
        n = self.n_features
        if self.count == 0:
            return tuple(np.full(n, np.nan) for _ in range(3 if reversible else 5))
        a, b = self._centered()
        if reversible:
            m = 0.5 * (a + b)
            var0 = 0.5 * (self.sum_xx + self.sum_yy) / self.count - m * m
            covt = self.sum_xy / self.count - m * m
            return self.shift + m, var0, covt
        return (self.shift + a, self.shift + b, self.sum_xx / self.count - a * a,
                self.sum_xy / self.count - a * b, self.sum_yy / self.count - b * b)

    def autocorrelation(self, reversible=True):
        """Normalized autocorrelation of each feature at the lag.

        Parameters
        ----------
        reversible : bool, default=True
            True: ``covtau / var0`` of the symmetrized estimate; False:
            ``cov(x, y) / sqrt(var(x) var(y))`` with each end about its own
            mean.

        Returns
        -------
        ndarray of shape (n_features,)
            Dimensionless, in [-1, 1] up to rounding; NaN for a feature with
            zero variance or when there are no pairs.
        """
        out = np.full(self.n_features, np.nan)
        if self.count == 0:
            return out
        if reversible:
            _, var0, covt = self.covariances(True)
            ok = var0 > 0
            out[ok] = covt[ok] / var0[ok]
        else:
            _, _, vx, cxy, vy = self.covariances(False)
            ok = (vx > 0) & (vy > 0)
            out[ok] = cxy[ok] / np.sqrt(vx[ok] * vy[ok])
        return out


class LagAccumulator:
    """Build lagged statistics from consecutive chunks of time series.

    Keeps the last `lag` frames of the current series as a buffer, so that a
    pair spanning a chunk boundary is counted exactly once, and the result
    equals :meth:`LaggedMoments.from_series` on the whole series, whatever the
    chunk sizes. :meth:`break_series` starts a new, independent series (a
    trajectory boundary): no pair spans it.

    Parameters
    ----------
    n_features : int
        Number of features.
    lag : int
        Lag in frames, >= 1.
    shift : array-like of shape (n_features,), default=None
        As in :class:`LaggedMoments`.
    diagonal : bool, default=False
        Accumulate a :class:`DiagonalLaggedMoments` instead of a
        :class:`LaggedMoments`.

    Attributes
    ----------
    moments : LaggedMoments or DiagonalLaggedMoments
        The statistics so far (the live object; copy it to keep a snapshot).
    n_frames : int
        Frames fed so far, over all series.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).normal(size=(100, 3))
    >>> acc = LagAccumulator(3, lag=4)
    >>> for chunk in np.array_split(x, 7):
    ...     _ = acc.feed(chunk)
    >>> whole = LaggedMoments.from_series(x, lag=4)
    >>> acc.moments.n_pairs, bool(np.allclose(acc.moments.sum_xy, whole.sum_xy))
    (96, True)
    """

    def __init__(self, n_features, lag, *, shift=None, diagonal=False):
        self.lag = _check_lag(lag)
        cls = DiagonalLaggedMoments if diagonal else LaggedMoments
        self.moments = cls(n_features, shift=shift, lag=self.lag)
        self.n_frames = 0
        self._buffer = np.zeros((0, self.moments.n_features))
        self._buffer_w = np.zeros(0)

    def feed(self, x_chunk, weights=None):
        """Add the next chunk of the current series and return self.

        Parameters
        ----------
        x_chunk : array-like of shape (n_frames, n_features)
            Frames following those fed before (since the last
            :meth:`break_series`), in time order.
        weights : array-like of shape (n_frames,), default=None
            Frame weights (all 1 when None); a pair gets the weight of its
            earlier frame.

        Returns
        -------
        self
        """
        x = _as_2d(x_chunk, self.moments.n_features, "x_chunk")
        w = _weights(weights, x.shape[0])
        if x.shape[0] == 0:
            return self
        w = np.ones(x.shape[0]) if w is None else w
        frames = np.concatenate([self._buffer, x])
        fw = np.concatenate([self._buffer_w, w])
        lag = self.lag
        if frames.shape[0] > lag:
            # Every pair here ends in the new chunk (the buffer holds at most `lag`
            # frames), so none was counted before.
            self.moments.add_pairs(frames[:-lag], frames[lag:], fw[:-lag])
        self._buffer = frames[-lag:].copy()
        self._buffer_w = fw[-lag:].copy()
        self.n_frames += x.shape[0]
        return self

    def break_series(self):
        """End the current series: no pair will span this point. Returns self."""
        self._buffer = self._buffer[:0]
        self._buffer_w = self._buffer_w[:0]
        return self
