"""Concrete passes: the statistics the pipeline gathers from trajectories.

Each returns the objects the rest of cvdesign works with
(:class:`~cvdesign.stats.moments.Moments`, :class:`~cvdesign.stats.moments.DiagonalMoments`,
:class:`~cvdesign.stats.moments.LaggedMoments`,
:class:`~cvdesign.stats.moments.DiagonalLaggedMoments`,
:class:`~cvdesign.score.univariate.Histograms`, :class:`~cvdesign.stats.bootstrap.ArraySum`):

* :class:`ScreeningPass` -- per-state diagonal moments, frames per (segment,
  state), per-run diagonal lagged moments at per-segment lags, smallest box
  height;
* :class:`FoldMomentsPass` -- per-(state, fold) full moments of some features;
* :class:`LaggedPass` -- lagged moments per run (segment, state, fold), merged
  per fold, per (state, fold) or per run on demand;
* :class:`LagGridPass` -- the same, diagonal, at every lag of a grid (one read);
* :class:`HistogramPass` -- per-state histograms on fixed bins (exact counts);
* :class:`ProjectionRangePass` -- per-state smallest and largest value of linear
  projections of the features (exact);
* :class:`BlockPass` -- per-(state, fold, segment, bootstrap block) moments,
  lagged moments and additive sums, for the block bootstrap;
* :class:`CardPass` -- per-(state, segment, block) sums of many features (moments,
  histograms, lagged sums), for the score card's bootstrap.

Features pass through ``columns`` (a subset, in order), then ``(x - center) /
scale`` when given. Every grouping uses :func:`cvdesign.passes.keys.frame_keys`.
"""

from dataclasses import dataclass

import numpy as np

from ..geometry import box_heights
from ..score.card import CARD_LAG_FIELDS
from ..score.univariate import Histograms, bin_counts, histogram_range
from ..stats.bootstrap import ArraySum, StackedSums
from ..stats.scratch import scratch
from ..stats.moments import (DiagonalLaggedMoments, DiagonalMoments, LaggedMoments, Moments,
                             merge_all, window_sums)
from .engine import Pass, _lag_halo
from .keys import frame_keys

__all__ = ["FeaturePass", "ScreeningPass", "ScreeningResult", "FoldMomentsPass", "LaggedPass",
           "LaggedResult", "LagGridPass", "HistogramPass", "ProjectionRangePass", "BlockPass", "CardPass", "CardSums",
           "merge_keyed", "group_rows"]


def _merge_value(a, b):
    if a is None:
        return b
    if b is None:
        return a
    if isinstance(a, tuple):
        return tuple(_merge_value(x, y) for x, y in zip(a, b))
    if isinstance(a, (int, np.integer)):
        return int(a) + int(b)
    return a.merge(b)


def merge_keyed(a, b):
    """Merge two dicts of mergeable values key by key (keys of one side pass through).

    Values may be mergeable objects, ints (added) or tuples of them (merged
    item by item, None standing for nothing).

    Examples
    --------
    >>> merge_keyed({"a": 1, "b": 2}, {"b": 3})
    {'a': 1, 'b': 5}
    """
    out = dict(a)
    for k, v in b.items():
        out[k] = _merge_value(out[k], v) if k in out else v
    return out


def group_rows(*keys):
    """``(key tuple, rows)`` for each distinct combination of keys, sorted; rows increasing.

    Examples
    --------
    >>> [(k, r.tolist()) for k, r in group_rows(np.array([1, 0, 1]), np.array([2, 2, 2]))]
    [((0, 2), [1]), ((1, 2), [0, 2])]
    """
    keys = [np.asarray(k, dtype=np.int64).reshape(-1) for k in keys]
    n = keys[0].size
    if n == 0:
        return []
    if all(k[0] == k[-1] and (k == k[0]).all() for k in keys):  # one group (the usual leaf)
        return [(tuple(int(k[0]) for k in keys), np.arange(n))]
    # one code per row, ordered as the key tuples (lexicographic), from per-key ranks
    code = np.zeros(n, dtype=np.int64)
    for k in keys:
        values, inverse = np.unique(k, return_inverse=True)
        code = code * values.size + inverse.reshape(-1)
    uniq, inverse = np.unique(code, return_inverse=True)
    inverse = inverse.reshape(-1)
    order = np.argsort(inverse, kind="stable")
    bounds = np.cumsum(np.bincount(inverse, minlength=uniq.size))[:-1]
    return [(tuple(int(k[rows[0]]) for k in keys), rows) for rows in np.split(order, bounds)]


def _slice(rows):
    """Non-decreasing row indices as a slice when they are consecutive (a view, not a copy).

    The second frames of pairs in rescaled time may repeat a row (two frames paired with
    one), so consecutive means no repeat as well as no gap."""
    if rows.size and int(rows[-1]) - int(rows[0]) + 1 == rows.size and (
            rows.size < 3 or not (rows[1:] == rows[:-1]).any()):
        return slice(int(rows[0]), int(rows[-1]) + 1)
    return rows


def _take(x, rows):
    """``x[rows]`` for increasing row indices, a view when they are consecutive."""
    return x[_slice(rows)]


def _dot(a, b):
    """Column sums of ``a * b`` (2-D arrays) without forming the product array."""
    return np.einsum("ij,ij->j", a, b)


def _square(a):
    """Column sums of ``a * a``."""
    return _dot(a, a)


def _wtake(w, rows):
    """Weights of some rows (None for unweighted frames)."""
    return None if w is None else w[_slice(rows)]


def _wsum(w, a):
    """Column sums of `a`, weighted by `w` when given."""
    return a.sum(axis=0) if w is None else w @ a


def _wdot(w, a, b):
    """Column sums of ``a * b``, weighted by `w` when given."""
    return _dot(a, b) if w is None else w @ (a * b)


def _run_of(i, j):
    """``(a, b, k)`` when the pairs ``(i, j)`` are the rows ``a .. b - 1`` and the rows `k`
    after them (``k >= 1``: consecutive frames, as in an unbiased run), else None."""
    if i.size == 0:
        return None
    si, sj = _slice(i), _slice(j)
    if isinstance(si, slice) and isinstance(sj, slice) and sj.start > si.start:
        return si.start, si.stop, sj.start - si.start
    return None


def _lag_of(lags, segment):
    return _lag_halo(lags, segment) or None


def _unlag(m):
    m = m.copy()
    m.lag = None
    return m


def _merge_lagged(items, n_features, shift, diagonal):
    """Balanced merge of lagged moments of different runs (lags dropped: they may differ)."""
    items = [_unlag(m) for m in items]
    if not items:
        cls = DiagonalLaggedMoments if diagonal else LaggedMoments
        return cls(n_features, shift=shift)
    return merge_all(items)


class FeaturePass(Pass):
    """A pass on some features: a subset of columns, then ``(x - center) / scale``.

    Parameters
    ----------
    featurizer : Featurizer
    columns : array-like of int, default=None
        Feature columns used, in this order (None: all).
    center, scale : array-like of shape (n_columns,), default=None
        Standardization applied after the column selection (None: none).
    """

    def __init__(self, featurizer, *, columns=None, center=None, scale=None):
        self.featurizer = featurizer
        self.columns = None if columns is None else np.asarray(columns, dtype=np.intp)
        if self.columns is not None:
            n_all = int(featurizer.n_features)
            if self.columns.size and not (-n_all <= self.columns.min()
                                          and self.columns.max() < n_all):
                raise ValueError(f"columns must be feature indices below {n_all}")
            self.columns = np.where(self.columns < 0, self.columns + n_all, self.columns)
        if self.columns is not None and np.array_equal(self.columns,
                                                       np.arange(featurizer.n_features)):
            self.columns = None  # every feature in order: no copy
        n = featurizer.n_features if self.columns is None else self.columns.size
        self.n_features = int(n)
        self.center = None if center is None else np.asarray(center, dtype=np.float64)
        self.scale = None if scale is None else np.asarray(scale, dtype=np.float64)

    def values(self, x):
        """Feature values as the pass uses them: columns, then ``(x - center) / scale``."""
        if self.columns is not None:
            x = x[:, self.columns]
        if self.center is not None:
            x = x - self.center
        if self.scale is not None:
            x = x / self.scale
        return np.ascontiguousarray(x, dtype=np.float64)

    def values_in(self, x, out):
        """:meth:`values` written into `out` where anything is done to `x`; returns `out`
        then, else `x` itself (float64 features used as they are). The same numbers."""
        if self.columns is None and self.center is None and self.scale is None and \
                x.dtype == np.float64:
            return x
        if self.columns is not None and x.dtype == np.float64:
            np.take(x, self.columns, axis=1, out=out, mode="clip")  # (checked columns)
            if self.center is not None:
                np.subtract(out, self.center, out=out)
            if self.scale is not None:
                np.divide(out, self.scale, out=out)
            return out
        np.copyto(out, self.values(x))
        return out

    def shifted(self, x, shift, name="shifted"):
        """``values(x) - shift`` in this thread's scratch array `name`
        (:func:`~cvdesign.stats.scratch.scratch`: a temporary, valid until the next call
        with that name)."""
        out = scratch(name, (x.shape[0], self.n_features))
        return np.subtract(self.values_in(x, out), shift, out=out)


@dataclass
class ScreeningResult:
    """What :class:`ScreeningPass` gathers.

    Attributes
    ----------
    diagonal : list of DiagonalMoments
        Per state (empty moments for a state without frames).
    segment_counts : ndarray of shape (n_segments, n_states), int64
        Frames of each state in each segment, as read.
    lagged : dict of (int, int) to DiagonalLaggedMoments, or None
        Per run (segment, state) with pairs, at the segment's lag; None when
        no lags were given.
    min_box_height : float or None
        Smallest height of any frame's periodic box (nm, of the reduced box,
        :func:`cvdesign.geometry.box_heights`); None without a box.
    """

    diagonal: list
    segment_counts: np.ndarray
    lagged: dict | None
    min_box_height: float | None


class ScreeningPass(FeaturePass):
    """Per-state diagonal moments, frame counts, per-run lagged diagonal moments, box height.

    Parameters
    ----------
    featurizer : Featurizer
    lags : int or dict of int to int, default=None
        Lag in frames (one for every segment, or per segment index; a segment
        missing or None gets no pairs); None: no lagged statistics.
    shift : array-like of shape (n_features,), default=None
        Fixed shift of the lagged sums (see
        :func:`cvdesign.passes.reference_features`); zeros when None.
    columns, center, scale : optional
        As in every pass of this module.
    """

    def __init__(self, featurizer, *, lags=None, shift=None, columns=None, center=None,
                 scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.lags = lags
        self.shift = np.zeros(self.n_features) if shift is None else \
            np.asarray(shift, dtype=np.float64)

    def halo(self, segment_index):
        return _lag_halo(self.lags, segment_index)

    def map(self, leaf):
        states = leaf.states
        w = leaf.weights
        lag = _lag_of(self.lags, leaf.segment)
        groups = group_rows(states)
        if w is None and len(groups) == 1:  # the usual leaf: one state, no weights
            (s,), _ = groups[0]
            diag, lagged = self._one_run(leaf, s, lag)
            return {"diag": diag, "counts": {(leaf.segment, s): int(leaf.n)},
                    "lagged": lagged, "min_box": self._min_box(leaf)}
        x = self.values(leaf.x)
        diag, counts, lagged = {}, {}, {}
        if lag is not None:
            i, j = leaf.pairs(lag)
            xt = self.values(leaf.window_x[_slice(j)])
        for (s,), rows in groups:
            diag[s] = DiagonalMoments.from_data(_take(x, rows), _wtake(w, rows))
            counts[(leaf.segment, s)] = int(rows.size)
            if lag is not None:
                sel = np.flatnonzero(states[i] == s)
                if sel.size:
                    m = DiagonalLaggedMoments(self.n_features, shift=self.shift, lag=lag)
                    lagged[(leaf.segment, s)] = m.add_pairs(_take(x, i[sel]), _take(xt, sel),
                                                            _wtake(w, i[sel]))
        return {"diag": diag, "counts": counts, "lagged": lagged, "min_box": self._min_box(leaf)}

    @staticmethod
    def _min_box(leaf):
        box = leaf.box
        return None if box is None else float(box_heights(box.astype(np.float64)).min())

    def _one_run(self, leaf, s, lag):
        """Diagonal and lagged moments of a leaf of one state, unweighted.

        The leaf is shifted once (``x - shift``); its moments are centred on the leaf's
        own mean (two passes, as :meth:`DiagonalMoments.from_data`); when every row has its
        pair ``lag`` rows later, the lagged ``sum_x`` and ``sum_xx`` follow from them
        (``sum_xx = m2 + n mean^2`` about the shift: a sum of non-negative terms, no
        cancellation) and the second frames' sums from the edges
        (:meth:`DiagonalLaggedMoments.add_window`).
        """
        n = int(leaf.n)
        run = None
        if lag is not None:
            i, j = leaf.pairs(lag)
            run = _run_of(i, j)
        rows = n if run is None or run[0] != 0 else max(n, run[1] + run[2])
        d = self.shifted(leaf.window_x[:rows], self.shift)
        x = self.values(leaf.x)
        dn = d[:n]
        sd = dn.sum(axis=0)
        dbar = sd / n
        e = np.subtract(dn, dbar, out=scratch("centred", dn.shape))
        m2 = _dot(e, e)
        diag = {s: DiagonalMoments._of(float(n), self.shift + dbar, m2, x.min(axis=0),
                                       x.max(axis=0))}
        lagged = {}
        if lag is not None and i.size:
            m = DiagonalLaggedMoments(self.n_features, shift=self.shift, lag=lag)
            if run is not None and run[0] == 0:
                a, b, k = run
                if b == n:
                    m.add_window(d, 0, n, k, sum_x=sd, sum_xx=m2 + sd * dbar)
                else:
                    m.add_window(d, 0, b, k)
            else:
                xt = self.values(leaf.window_x[_slice(j)])
                m.add_pairs(_take(x, i), xt)
            lagged[(leaf.segment, s)] = m
        return diag, lagged

    def merge(self, a, b):
        boxes = [v for v in (a["min_box"], b["min_box"]) if v is not None]
        return {"diag": merge_keyed(a["diag"], b["diag"]),
                "counts": merge_keyed(a["counts"], b["counts"]),
                "lagged": merge_keyed(a["lagged"], b["lagged"]),
                "min_box": min(boxes) if boxes else None}

    def finish(self, partial, plan):
        partial = partial or {"diag": {}, "counts": {}, "lagged": {}, "min_box": None}
        counts = np.zeros((plan.n_segments, plan.n_states), dtype=np.int64)
        for (si, s), n in partial["counts"].items():
            counts[si, s] = n
        diag = [partial["diag"].get(s, DiagonalMoments(self.n_features))
                for s in range(plan.n_states)]
        lagged = None if self.lags is None else dict(sorted(partial["lagged"].items()))
        return ScreeningResult(diag, counts, lagged, partial["min_box"])


class FoldMomentsPass(FeaturePass):
    """Full moments of some features per (state, fold).

    Parameters
    ----------
    featurizer : Featurizer
    folds : Folds, default=None
        None: one fold.
    columns, center, scale : optional

    The result is ``moments[state][fold]``, a :class:`~cvdesign.stats.moments.Moments`
    each (empty where a state has no frame in a fold).
    """

    def __init__(self, featurizer, folds=None, *, columns=None, center=None, scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.folds = folds

    def map(self, leaf):
        x = self.values(leaf.x)
        w = leaf.weights
        keys = frame_keys(leaf.layout, leaf.frames, folds=self.folds)
        return {key: Moments.from_data(_take(x, rows), _wtake(w, rows))
                for key, rows in group_rows(keys.states, keys.fold)}

    def merge(self, a, b):
        return merge_keyed(a, b)

    def finish(self, partial, plan):
        partial = partial or {}
        n_folds = 1 if self.folds is None else self.folds.n_folds
        return [[partial.get((s, k), Moments(self.n_features)) for k in range(n_folds)]
                for s in range(plan.n_states)]


@dataclass
class LaggedResult:
    """Lagged moments of every run, from :class:`LaggedPass`.

    Attributes
    ----------
    runs : dict of (int, int, int) to LaggedMoments or DiagonalLaggedMoments
        Per (segment, state, fold) with pairs, at the segment's lag (``lag`` set).
    n_states, n_folds, n_features : int
    shift : ndarray
    diagonal : bool
    """

    runs: dict
    n_states: int
    n_folds: int
    n_features: int
    shift: np.ndarray
    diagonal: bool

    def merged(self, select=None):
        """Runs for which ``select(segment, state, fold)`` is true (all when None), merged.

        Merged in a balanced tree in key order; ``lag`` is None (runs may have
        different lags in frames). Empty moments when no run is selected.
        """
        items = [m for key, m in sorted(self.runs.items()) if select is None or select(*key)]
        return _merge_lagged(items, self.n_features, self.shift, self.diagonal)

    def by_fold(self):
        """Per fold, every state and segment merged: list of length `n_folds`."""
        return [self.merged(lambda si, s, k, f=f: k == f) for f in range(self.n_folds)]

    def by_state_fold(self):
        """``[state][fold]``, segments merged."""
        return [[self.merged(lambda si, s2, k, s=s, f=f: s2 == s and k == f)
                 for f in range(self.n_folds)] for s in range(self.n_states)]

    def by_run(self):
        """Per (segment, state), folds merged, keeping the segment's lag."""
        out = {}
        for (si, s, _), m in sorted(self.runs.items()):
            out.setdefault((si, s), []).append(m)
        return {key: merge_all(items) for key, items in out.items()}


class LaggedPass(FeaturePass):
    """Lagged moments per run (segment, state, fold) at per-segment lags.

    Parameters
    ----------
    featurizer : Featurizer
    lags : int or dict of int to int
        Lag in frames, for every segment or per segment index (a segment
        missing or None contributes no pairs); in frame spacings of rescaled
        time for a biased run (:meth:`cvdesign.passes.Leaf.pairs`).
    shift : array-like of shape (n_features,), default=None
        Fixed shift of the sums; zeros when None.
    folds : Folds, default=None
        None: one fold.
    within_fold : bool, default=True
        A pair counts only when both frames are in the same fold (no pair
        straddles a held-out boundary); False: the pair belongs to the fold
        of its first frame.
    diagonal : bool, default=False
        :class:`~cvdesign.stats.moments.DiagonalLaggedMoments` instead of full matrices.
    columns, center, scale : optional

    Returns a :class:`LaggedResult` from :func:`~cvdesign.passes.run_pass`.
    """

    def __init__(self, featurizer, lags, *, shift=None, folds=None, within_fold=True,
                 diagonal=False, columns=None, center=None, scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.lags = lags
        self.shift = np.zeros(self.n_features) if shift is None else \
            np.asarray(shift, dtype=np.float64)
        self.folds = folds
        self.within_fold = bool(within_fold)
        self.diagonal = bool(diagonal)

    def halo(self, segment_index):
        return _lag_halo(self.lags, segment_index)

    def map(self, leaf):
        lag = _lag_of(self.lags, leaf.segment)
        if lag is None:
            return None
        i, j = leaf.pairs(lag)
        if i.size == 0:
            return None
        first = frame_keys(leaf.layout, leaf.frames[i], folds=self.folds)
        if self.folds is not None and self.within_fold:
            second = frame_keys(leaf.layout, leaf.window_frames[j], folds=self.folds)
            keep = first.fold == second.fold
            i, j = i[keep], j[keep]
            first = frame_keys(leaf.layout, leaf.frames[i], folds=self.folds)
        w0 = _wtake(leaf.weights, i)  # a pair weighs as its first frame
        cls = DiagonalLaggedMoments if self.diagonal else LaggedMoments
        groups = group_rows(first.states, first.fold)
        run = _run_of(i, j) if w0 is None and len(groups) == 1 else None
        if run is not None:  # one run of consecutive pairs: the window shifted once
            a, b, step = run
            d = self.shifted(leaf.window_x[a:b + step], self.shift)
            m = cls(self.n_features, shift=self.shift, lag=lag).add_window(d, 0, b - a, step)
            return {(leaf.segment,) + groups[0][0]: m}
        x0 = self.values(leaf.x[_slice(i)])
        xt = self.values(leaf.window_x[_slice(j)])
        out = {}
        for (s, k), rows in groups:
            m = cls(self.n_features, shift=self.shift, lag=lag)
            out[(leaf.segment, s, k)] = m.add_pairs(_take(x0, rows), _take(xt, rows),
                                                    _wtake(w0, rows))
        return out

    def merge(self, a, b):
        return merge_keyed(a, b)

    def finish(self, partial, plan):
        return LaggedResult(dict(sorted((partial or {}).items())), plan.n_states,
                            1 if self.folds is None else self.folds.n_folds, self.n_features,
                            self.shift, self.diagonal)


class LagGridPass(FeaturePass):
    """Diagonal lagged moments per run (segment, state) at every lag of a grid, in one pass.

    The result equals, byte for byte, one diagonal :class:`LaggedPass` per lag
    (no folds), but a leaf's features are shifted once for all the lags, and
    each lag's pairs are views of them. In a biased run the lags stay in frames
    (``rescaled_time = False``: the grid measures how correlated the saved
    frames are, for integrated times and bootstrap blocks), the pairs weighted.

    Parameters
    ----------
    featurizer : Featurizer
    lags : sequence of int
        Lags in frames (the same for every segment), e.g. the grid of
        :func:`cvdesign.pipeline.timing.iat_lags`.
    shift : array-like of shape (n_features,), default=None
        Fixed shift of the sums; zeros when None.
    columns, center, scale : optional

    Returns a list of :class:`LaggedResult` (one per lag, ``diagonal`` true) from
    :func:`~cvdesign.passes.run_pass`.
    """

    def __init__(self, featurizer, lags, *, shift=None, columns=None, center=None, scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.lags = [int(v) for v in lags]
        if not self.lags or min(self.lags) < 1:
            raise ValueError(f"lags={lags!r} must be lags of at least one frame")
        self.shift = np.zeros(self.n_features) if shift is None else \
            np.asarray(shift, dtype=np.float64)

    rescaled_time = False

    def halo(self, segment_index):
        return max(self.lags)

    def map(self, leaf):
        d = self.shifted(leaf.window_x, self.shift)
        w = leaf.weights
        out = {}
        firsts = {}  # sums over the first frames, shared by the lags with the same ones
        for g, lag in enumerate(self.lags):
            i, j = leaf.pairs(lag, rescaled=False)
            if i.size == 0:
                continue
            first = frame_keys(leaf.layout, leaf.frames[i])
            d0, dt = d[_slice(i)], d[_slice(j)]
            for (s,), rows in group_rows(first.states):
                x0, xt = _take(d0, rows), _take(dt, rows)
                if w is not None:  # weighted pairs: no shared sums
                    m = DiagonalLaggedMoments(self.n_features, shift=self.shift, lag=lag)
                    out[(g, leaf.segment, s, 0)] = m.add_shifted(x0, xt, w[i[rows]])
                    continue
                key = (s, i[rows[0]], i[rows[-1]], rows.size)
                if key not in firsts:  # (rows increasing: first, last and count fix them)
                    firsts[key] = (x0.sum(axis=0), _dot(x0, x0))
                sum_x, sum_xx = firsts[key]
                m = DiagonalLaggedMoments(self.n_features, shift=self.shift, lag=lag)
                run = _run_of(i[rows], j[rows])
                if run is not None:  # as LaggedPass: the second frames' sums from edges
                    out[(g, leaf.segment, s, 0)] = m.add_window(d, *run, sum_x=sum_x,
                                                                sum_xx=sum_xx)
                    continue
                # what add_shifted(x0, xt) does, with the first frames' sums shared
                m.count += float(rows.size)
                m.n_pairs += int(rows.size)
                m.sum_x += sum_x
                m.sum_y += xt.sum(axis=0)
                m.sum_xx += sum_xx
                m.sum_xy += _dot(x0, xt)
                m.sum_yy += _dot(xt, xt)
                out[(g, leaf.segment, s, 0)] = m
        return out or None

    def merge(self, a, b):
        return merge_keyed(a, b)

    def finish(self, partial, plan):
        runs = [{} for _ in self.lags]
        for (g, si, s, k), m in sorted((partial or {}).items()):
            runs[g][(si, s, k)] = m
        return [LaggedResult(r, plan.n_states, 1, self.n_features, self.shift, True)
                for r in runs]


class HistogramPass(FeaturePass):
    """Per-state histograms of features on fixed bins (exact counts: no tree needed).

    Parameters
    ----------
    featurizer : Featurizer
    low, high : array-like of shape (n_features,)
        Range of each feature (after columns/center/scale); values outside
        fall into the edge bins.
    n_bins : int, default=50
    columns, center, scale : optional

    Returns a :class:`~cvdesign.score.univariate.Histograms`.
    """

    exact = True

    def __init__(self, featurizer, low, high, *, n_bins=50, columns=None, center=None,
                 scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.low = np.asarray(low, dtype=np.float64)
        self.high = np.asarray(high, dtype=np.float64)
        self.n_bins = int(n_bins)

    def _empty(self, n_states):
        return Histograms(self.low, self.high, n_states=n_states, n_bins=self.n_bins)

    def accumulate(self, acc, leaf):
        acc = self._empty(leaf.n_states) if acc is None else acc
        acc.add(self.values(leaf.x), leaf.states, leaf.weights)
        return acc

    def map(self, leaf):
        return self.accumulate(None, leaf)

    def merge(self, a, b):
        return a.merge(b)

    def finish(self, partial, plan):
        return self._empty(plan.n_states) if partial is None else partial


class ProjectionRangePass(FeaturePass):
    """Per-state smallest and largest value of linear projections of the features.

    A projection is ``sum_j weights[j] * x[:, positions[j]]`` of the features as
    the pass uses them (after ``columns``, ``center``, ``scale``), summed term by
    term in the order given, so each frame's value is the same whatever leaf it
    is read in; the minimum and maximum are exact, so the result is the same,
    bit for bit, for any split of the frames, order of arrival or executor.

    Parameters
    ----------
    featurizer : Featurizer
    projections : list of (array-like of int, array-like of float)
        ``(positions, weights)`` per projection: feature positions (after
        ``columns``) and their weights, of equal length >= 1.
    columns, center, scale : optional

    Returns an ndarray of shape (2, n_projections, n_states), float64: the
    smallest (``[0]``) and largest (``[1]``) value per projection and state;
    +inf and -inf for a state without frames.

    Examples
    --------
    >>> from cvdesign.passes import CoordinateFeaturizer
    >>> proj = ProjectionRangePass(CoordinateFeaturizer([0]), [([0, 1], [1.0, -1.0])])
    >>> proj.n_features, len(proj.projections)
    (3, 1)
    """

    exact = True

    def __init__(self, featurizer, projections, *, columns=None, center=None, scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.projections = []
        for positions, weights in projections:
            positions = np.asarray(positions, dtype=np.intp).reshape(-1)
            weights = np.asarray(weights, dtype=np.float64).reshape(-1)
            if positions.size == 0 or positions.size != weights.size:
                raise ValueError("a projection needs as many weights as positions, at least one")
            self.projections.append((positions, weights))

    def _empty(self, n_states):
        out = np.empty((2, len(self.projections), n_states))
        out[0], out[1] = np.inf, -np.inf
        return out

    def map(self, leaf):
        x = self.values(leaf.x)
        out = self._empty(leaf.n_states)
        states = leaf.states
        if states.size == 0:
            return out
        for p, (positions, weights) in enumerate(self.projections):
            v = x[:, positions[0]] * weights[0]
            for j, w in zip(positions[1:], weights[1:]):
                v = v + x[:, j] * w
            np.minimum.at(out[0, p], states, v)
            np.maximum.at(out[1, p], states, v)
        return out

    def merge(self, a, b):
        return np.stack([np.minimum(a[0], b[0]), np.maximum(a[1], b[1])])

    def finish(self, partial, plan):
        return self._empty(plan.n_states) if partial is None else partial


class BlockPass(FeaturePass):
    """Per-(state, fold, segment, bootstrap block) statistics for the block bootstrap.

    A block is ``rank // block_frames`` within (segment, state, fold)
    (:func:`~cvdesign.passes.keys.frame_keys`). Each block gets a tuple
    ``(Moments or None, LaggedMoments or None, ArraySum or None)``.

    Parameters
    ----------
    featurizer : Featurizer
    folds : Folds, default=None
        None: one fold.
    block_frames : int, default=None
        Block length in frames; None: one block per (segment, state, fold).
    moments : bool, default=True
        Keep full moments of each block.
    lags : int or dict of int to int, default=None
        Lag in frames (per segment); None: no lagged moments.
    lag_shift : array-like of shape (n_features,), default=None
        Shift of the lagged sums; zeros when None.
    pairs_within_block : bool, default=True
        A pair counts only when both frames are in the same block (as the
        pipeline's held-out blocks); False: a pair belongs to the block of
        its first frame (as the score card's blocks). Pairs never straddle
        folds.
    sums : callable, default=None
        ``sums(values, key) -> dict of name -> ndarray`` with ``values`` the
        block's rows in this leaf and ``key = (state, fold, segment,
        block)``: additive sums kept as an :class:`~cvdesign.stats.bootstrap.ArraySum`
        (e.g. histogram counts of a projection). Must pickle (a module-level
        function or object). With weighted frames (biased runs) it is called
        as ``sums(values, key, weights=...)`` and must weight its sums.
    columns, center, scale : optional

    The result is ``{(state, fold): [(Moments, LaggedMoments, ArraySum), ...]}``,
    the blocks of each group in (segment, block) order.
    """

    def __init__(self, featurizer, *, folds=None, block_frames=None, moments=True, lags=None,
                 lag_shift=None, pairs_within_block=True, sums=None, columns=None,
                 center=None, scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.folds = folds
        self.block_frames = None if block_frames is None else int(block_frames)
        self.moments = bool(moments)
        self.lags = lags
        self.lag_shift = np.zeros(self.n_features) if lag_shift is None else \
            np.asarray(lag_shift, dtype=np.float64)
        self.pairs_within_block = bool(pairs_within_block)
        self.sums = sums

    def halo(self, segment_index):
        return _lag_halo(self.lags, segment_index)

    def _keys(self, leaf, frames):
        return frame_keys(leaf.layout, frames, folds=self.folds, block_frames=self.block_frames)

    def map(self, leaf):
        x = self.values(leaf.x)
        w = leaf.weights
        keys = self._keys(leaf, leaf.frames)
        si = leaf.segment
        out = {}
        for (s, k, b), rows in group_rows(keys.states, keys.fold, keys.block):
            key = (s, k, si, b)
            xr, wr = _take(x, rows), _wtake(w, rows)
            m = Moments.from_data(xr, wr) if self.moments else None
            extra = None
            if self.sums is not None:
                extra = ArraySum(**(self.sums(xr, key) if wr is None else
                                    self.sums(xr, key, weights=wr)))
            out[key] = (m, None, extra)
        lag = _lag_of(self.lags, si)
        if lag is not None:
            i, j = leaf.pairs(lag)
            first = frame_keys(leaf.layout, leaf.frames[i], folds=self.folds,
                               block_frames=self.block_frames)
            second = self._keys(leaf, leaf.window_frames[j])
            keep = first.fold == second.fold
            if self.pairs_within_block:
                keep &= first.block == second.block
            i, j = i[keep], j[keep]
            if w is None and i.size:  # the window shifted once; consecutive pairs share
                d = self.shifted(leaf.window_x[:int(j.max()) + 1], self.lag_shift)
            else:
                x0, xt = x[_slice(i)], self.values(leaf.window_x[_slice(j)])
                w0 = _wtake(w, i)
            for (s, k, b), rows in group_rows(first.states[keep], first.fold[keep],
                                           first.block[keep]):
                m = LaggedMoments(self.n_features, shift=self.lag_shift)
                if w is None:
                    ir, jr = i[rows], j[rows]
                    run = _run_of(ir, jr)
                    if run is not None:
                        m.add_window(d, *run)
                    else:
                        m.add_shifted(d[_slice(ir)], d[_slice(jr)])
                else:
                    m.add_pairs(_take(x0, rows), _take(xt, rows), _wtake(w0, rows))
                a, _, c = out[(s, k, si, b)]
                out[(s, k, si, b)] = (a, m, c)
        return out

    def merge(self, a, b):
        return merge_keyed(a, b)

    def finish(self, partial, plan):
        out = {}
        for (s, k, si, b), (m, lm, extra) in sorted((partial or {}).items()):
            if self.lags is not None and lm is None:
                lm = LaggedMoments(self.n_features, shift=self.lag_shift)
            out.setdefault((s, k), []).append((m, lm, extra))
        return out


@dataclass
class CardSums:
    """Per-block sums of the score card, from :class:`CardPass`.

    Attributes
    ----------
    groups : list of StackedSums
        Per state, its blocks in (segment, block) order (an empty list for a state
        without blocks), each a :class:`~cvdesign.stats.bootstrap.ArraySum`; fields ``n``, ``s1``,
        ``s2`` (sums of ``x - center`` and its square), ``hist`` (counts on the
        score card's bins) and, with a lag, ``n_pairs``, ``sx``, ``sy``, ``sxx``,
        ``sxy``, ``syy`` (lagged sums about ``center``), ``l0`` and ``lt`` (about
        the run's own mean).
    has_lag : bool
    """

    groups: list
    has_lag: bool

    def blocks(self):
        """Per state, the list of blocks (the input of the score card's bootstrap)."""
        return self.groups


class CardPass(FeaturePass):
    """Per-block additive sums of many features, for the score card's bootstrap.

    A block is ``rank // block_frames`` within (segment, state) (whole runs when
    `block_frames` is None); a lagged pair belongs to the block of its first
    frame, so no pair is lost at a block boundary and the sums over all blocks
    give the score card's own values. Every field is a plain sum, merged by
    addition (in the fixed tree of the engine, so bitwise reproducible).

    Parameters
    ----------
    featurizer : Featurizer
    center : array-like of shape (n_columns,)
        Fixed shift of the sums (any value near the data keeps them accurate).
    low, high : array-like of shape (n_columns,)
        Histogram range of each feature.
    n_bins : int
    block_frames : int or None
    lags : int or dict of int to int, default=None
        Lag in frames (per segment); None: no lagged sums.
    run_means : dict of (int, int) to ndarray, default=None
        Mean of each run's (segment, state) lagged pairs, for the autocorrelation
        within runs (``center`` when missing).
    columns : array-like of int, default=None
        Features used (None: all).
    """

    def __init__(self, featurizer, *, center, low, high, n_bins, block_frames, lags=None,
                 run_means=None, columns=None):
        # the columns are read in increasing order (a cheaper gather, none at all for every
        # feature) and the sums put back in the given order by finish (exact)
        order = None if columns is None else np.argsort(np.asarray(columns, dtype=np.intp),
                                                        kind="stable")
        super().__init__(featurizer, columns=None if columns is None else
                         np.asarray(columns, dtype=np.intp)[order])
        self.shift = np.asarray(center, dtype=np.float64)  # (FeaturePass.center standardizes)
        self.low = np.asarray(low, dtype=np.float64)
        self.high = np.asarray(high, dtype=np.float64)
        self.n_bins = int(n_bins)
        self.block_frames = None if block_frames is None else int(block_frames)
        self.lags = lags
        self.run_means = {} if run_means is None else dict(run_means)
        self._order = order
        sort = (lambda v: v) if order is None else (lambda v: np.asarray(v)[order])
        self._shift = sort(self.shift)
        self._low, self._high = histogram_range(sort(self.low), sort(self.high))
        self._means = {k: sort(np.asarray(v, dtype=np.float64))
                       for k, v in self.run_means.items()}

    def halo(self, segment_index):
        return _lag_halo(self.lags, segment_index)

    def map(self, leaf):
        w = leaf.weights
        si = leaf.segment
        keys = frame_keys(leaf.layout, leaf.frames, block_frames=self.block_frames)
        groups = group_rows(keys.states, keys.block)
        if w is None:
            out = self._map_runs(leaf, groups)
            if out is not None:
                return out
        x = self.values(leaf.x)
        code = np.empty(x.shape[0], dtype=np.intp)
        for g, (_, rows) in enumerate(groups):
            code[rows] = g
        # every row binned once, one count per (block, feature, bin)
        hist = bin_counts(x, self._low, self._high, self.n_bins, code, len(groups), w)
        out = {}
        for g, ((s, b), rows) in enumerate(groups):
            d = _take(x, rows) - self._shift
            wr = _wtake(w, rows)
            acc = {"n": float(rows.size) if wr is None else float(wr.sum()),
                   "s1": _wsum(wr, d), "s2": _wdot(wr, d, d), "hist": hist[g]}
            if self.lags is not None:
                acc.update({f: 0.0 if f == "n_pairs" else np.zeros(self.n_features)
                            for f in CARD_LAG_FIELDS})
            out[(s, si, b)] = acc
        lag = _lag_of(self.lags, si)
        if lag is not None:
            i, j = leaf.pairs(lag)
            first = frame_keys(leaf.layout, leaf.frames[i], block_frames=self.block_frames)
            xi, yi = x[_slice(i)], self.values(leaf.window_x[_slice(j)])
            wi = _wtake(w, i)  # a pair weighs as its first frame
            for (s, b), rows in group_rows(first.states, first.block):
                mean = self._means.get((si, s), self._shift)
                xr, yr = _take(xi, rows), _take(yi, rows)
                p, q = xr - self._shift, yr - self._shift
                u, v = xr - mean, yr - mean
                wr = _wtake(wi, rows)
                acc = out[(s, si, b)]
                acc["n_pairs"] = float(rows.size) if wr is None else float(wr.sum())
                acc["sx"] = _wsum(wr, p)
                acc["sy"] = _wsum(wr, q)
                acc["sxx"] = _wdot(wr, p, p)
                acc["sxy"] = _wdot(wr, p, q)
                acc["syy"] = _wdot(wr, q, q)
                acc["l0"] = 0.5 * (_wdot(wr, u, u) + _wdot(wr, v, v))
                acc["lt"] = _wdot(wr, u, v)
        return {key: ArraySum(**acc) for key, acc in out.items()}

    def _map_runs(self, leaf, groups):
        """:meth:`map` for an unweighted leaf whose groups are runs of rows and whose pairs
        (if any) are consecutive rows `k` apart (an unbiased run); None otherwise.

        The window is read once (values, then shifted in place after the binning); each
        group's first-frame sums are its own sums when it holds only first frames, the
        second frames' from the edges (:func:`~cvdesign.stats.moments.window_sums`), and
        the sums about a run's own mean from the window shifted by that mean (no
        re-shift of sums, which could cancel)."""
        n = int(leaf.n)
        spans = [_slice(rows) for _, rows in groups]
        if not all(isinstance(sp, slice) for sp in spans):
            return None
        si = leaf.segment
        lag = _lag_of(self.lags, si)
        run = None
        if lag is not None:
            i, j = leaf.pairs(lag)
            run = _run_of(i, j)
            if i.size and run is None:
                return None
        rows = n if run is None else max(n, run[1] + run[2])
        d = scratch("shifted", (rows, self.n_features))
        xw = self.values_in(leaf.window_x[:rows], d)  # (d itself, or the leaf's rows)
        code = np.empty(n, dtype=np.intp)
        for g, sp in enumerate(spans):
            code[sp] = g
        hist = bin_counts(xw[:n], self._low, self._high, self.n_bins, code, len(groups))
        np.subtract(xw, self._shift, out=d)
        out = {}
        for g, ((s, b), _) in enumerate(groups):
            r0, r1 = spans[g].start, spans[g].stop
            dg = d[r0:r1]
            acc = {"n": float(r1 - r0), "s1": dg.sum(axis=0), "s2": _dot(dg, dg),
                   "hist": hist[g]}
            if self.lags is not None:
                acc.update({f: 0.0 if f == "n_pairs" else np.zeros(self.n_features)
                            for f in CARD_LAG_FIELDS})
            p0, p1 = (0, 0) if run is None else (max(r0, run[0]), min(r1, run[1]))
            if p1 > p0:
                k = run[2]
                whole = p0 == r0 and p1 == r1
                sx, sy, sxx, sxy, syy = window_sums(
                    d, p0, p1, k, _square, _dot, sum_x=acc["s1"] if whole else None,
                    sum_xx=acc["s2"] if whole else None)
                acc.update(n_pairs=float(p1 - p0), sx=sx, sy=sy, sxx=sxx, sxy=sxy, syy=syy)
                mean = self._means.get((si, s))
                if mean is None:  # about the center: the same sums
                    uu, uv, vv = sxx, sxy, syy
                else:
                    u = np.subtract(d[p0:p1 + k], mean - self._shift,
                                    out=scratch("centred", (p1 + k - p0, d.shape[1])))
                    _, _, uu, uv, vv = window_sums(u, 0, p1 - p0, k, _square, _dot)
                acc["l0"] = 0.5 * (uu + vv)
                acc["lt"] = uv
            out[(s, si, b)] = acc
        return {key: ArraySum(**acc) for key, acc in out.items()}

    def merge(self, a, b):
        return merge_keyed(a, b)

    def finish(self, partial, plan):
        # per state, its blocks stacked one row each, in (segment, block) order and the
        # given column order; each block is dropped once copied (the bootstrap resamples
        # the rows as they are: the sums are held once, not as blocks and again as a stack)
        partial = dict(partial or {})
        back = None if self._order is None else np.argsort(self._order)
        keys = sorted(partial)
        groups = []
        for s in range(plan.n_states):
            mine = [k for k in keys if k[0] == s]
            if not mine:
                groups.append([])
                continue
            shapes = {f: v.shape for f, v in partial[mine[0]].arrays.items()}
            fields = {f: np.empty((len(mine), max(1, int(np.prod(shape)))))
                      for f, shape in shapes.items()}
            for r, key in enumerate(mine):
                for f, v in partial.pop(key).arrays.items():
                    row = fields[f][r].reshape(shapes[f])
                    if back is None or v.ndim == 0:
                        row[...] = v
                    else:  # the given column order
                        np.take(v, back, axis=0, out=row)
            groups.append(StackedSums(fields, shapes))
        return CardSums(groups, self.lags is not None)
