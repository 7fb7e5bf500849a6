"""What the report draws that the tables do not hold: ``report-data.json`` of ``suggest``.

The figures of a ranked CV need, besides the ranking and the specs, three things
gathered from the frames (format: ``docs/report-data-v1.md``):

* **held-out histograms** -- the frames of fold ``k`` projected on the direction
  fitted without fold ``k`` (what the held-out scores measure), on common bins in
  the CV's units. A fold's direction has its own scale and offset, so its values
  are mapped to the CV's units by the affine map ``a_k v + b_k`` that carries the
  *training* state means along the fold's direction onto the training state means
  along the CV (least squares over the states; exact for two). The map uses the
  training frames only, as the direction does; the held-out frames are never used
  to place them. The bins span every state's held-out mean +- :data:`RANGE_STDS`
  standard deviations of every fold (from the fold moments, before the pass),
  :data:`BINS_PER_STD` bins per standard deviation of the narrowest state
  (between :data:`MIN_BINS` and :data:`MAX_BINS` bins, so that states far apart
  along a CV are still drawn with some resolution); frames outside, if any, are
  counted apart (``outside``);
* **traces** -- the CV (the spec's own formula on the pool's features) along each
  input segment, at the frames whose offset from the segment's first frame is a
  multiple of a stride chosen from the segment's length (:func:`trace_stride`), so
  at most :data:`MAX_TRACE_POINTS` points per segment, the same for every split;
* **implied timescales** -- ``-lag / ln rho(lag)`` of the CV on a grid of lags,
  ``rho`` its normalized autocorrelation over lagged pairs within runs, all runs
  about their common mean (reversible estimate, as the ranking's
  ``autocorrelation_all``).

The histograms and traces come from one pass of the engine, :class:`CVReportPass`,
run in the same read as the held-out pass over every feature; the implied
timescales' lagged sums from :class:`CVLaggedPass`, a read of its own over the
CVs' terms only. Its lags reach 2000 frames: in the held-out read, whose leaves
hold every feature, a halo that long kept about 2000 frames of every feature in
memory (0.5 GB for a pool of 10^5 features at 500 frames). Histogram counts add
exactly, traces are kept frames (in frame order), lagged sums merge in the
engine's fixed tree; the CV of a frame is computed term by term with elementwise
arithmetic, so each frame gets the same bits whichever rows share its leaf or
halo. The stored size depends on the number of CVs, segments, bins and lags,
never on the number of frames.
"""

import math

import numpy as np

from ..passes import FeaturePass, LagGridPass, frame_keys, group_rows, thinning_stride
from ..score.card import integrated_time_interval
from ..stats.moments import DiagonalLaggedMoments
from .output import run_file_names
from .timing import (local_autocorrelation, runs_too_short, slowest_state_times,
                     state_integrated_times)

__all__ = ["MAX_TRACE_POINTS", "RANGE_STDS", "BINS_PER_STD", "MIN_BINS", "MAX_BINS", "CVPlan",
           "CVBlockHistograms", "CVReportPass", "CVLaggedPass", "CVGridPass", "cv_plans",
           "cv_integrated_times", "trace_stride", "histogram_bins", "affine_to_cv_units",
           "report_document", "timescale_lags", "funnel_report_document"]

#: Most points of a trace (one input segment).
MAX_TRACE_POINTS = 1000

#: The held-out histograms' bins span each state's held-out mean +- this many of its
#: standard deviations (in every fold); by Chebyshev's inequality at most 1/36 of a
#: state's frames can lie beyond, and for near-Gaussian states none do in practice.
RANGE_STDS = 6.0

#: Bins of a held-out histogram per standard deviation of its narrowest state (our
#: choice: enough to show a state's shape), within MIN_BINS and MAX_BINS bins.
BINS_PER_STD = 4.0
MIN_BINS = 50
MAX_BINS = 400


def histogram_bins(low, high, narrowest_std):
    """Bins of a held-out histogram over ``[low, high]`` (CV units).

    :data:`BINS_PER_STD` per `narrowest_std` (CV units), clipped to
    [:data:`MIN_BINS`, :data:`MAX_BINS`].

    Examples
    --------
    >>> histogram_bins(-1.0, 1.0, 0.5), histogram_bins(-1.2, 1.2, 0.028), histogram_bins(0, 1, 0)
    (50, 343, 50)
    """
    if not narrowest_std > 0:
        return MIN_BINS
    n = math.ceil((float(high) - float(low)) * BINS_PER_STD / float(narrowest_std))
    return int(min(MAX_BINS, max(MIN_BINS, n)))


def trace_stride(n_frames):
    """Stride of a trace: every frame whose offset from the segment's first frame is a
    multiple of it is kept, at most :data:`MAX_TRACE_POINTS` in all.

    Parameters
    ----------
    n_frames : int
        Frames in the segment's frame range (with or without a state).

    Returns
    -------
    int

    Examples
    --------
    >>> trace_stride(800), trace_stride(2000), trace_stride(2001)
    (1, 2, 3)
    """
    return thinning_stride([max(int(n_frames), 1)], MAX_TRACE_POINTS)


def affine_to_cv_units(fold_means, cv_means, within_fold=None, within_cv=None):
    """The map ``a v + b`` from a fold's direction to the CV's units.

    Least squares over the states: ``a m_s + b`` is closest to ``c_s``, with ``m_s``
    the training means along the fold's direction and ``c_s`` those along the CV
    (exact for two states). When the training means along the fold's direction do
    not differ (nothing to match), ``a`` matches the within-state spreads instead
    and ``b`` the mean of the means.

    Parameters
    ----------
    fold_means, cv_means : array-like of shape (n_states,)
        Training state means along the fold's direction and along the CV.
    within_fold, within_cv : float, optional
        Pooled within-state variances along each (for the fallback).

    Returns
    -------
    (float, float)
        ``(a, b)``.

    Examples
    --------
    >>> affine_to_cv_units([0.0, 2.0], [1.0, 5.0])
    (2.0, 1.0)
    >>> affine_to_cv_units([1.0, 1.0], [0.0, 4.0], within_fold=1.0, within_cv=4.0)
    (2.0, 0.0)
    """
    m = np.asarray(fold_means, dtype=np.float64)
    c = np.asarray(cv_means, dtype=np.float64)
    dm = m - m.mean()
    spread = float(dm @ dm)
    scale = max(float(within_fold or 0.0), float(np.max(np.abs(m))) ** 2, 1e-300)
    if spread > 1e-12 * scale:
        a = float(dm @ (c - c.mean())) / spread
    elif within_fold and within_cv and within_fold > 0:
        a = math.sqrt(within_cv / within_fold)
    else:
        a = 1.0
    return a, float(c.mean() - a * m.mean())


class CVPlan:
    """What :class:`CVReportPass` needs of one ranked CV, fixed before the pass.

    Attributes
    ----------
    cols : ndarray of int
        The CV's terms as columns of the pass's values.
    w : ndarray
        Weights of the standardized terms (the spec's ``weight``).
    fold_w : list of ndarray
        Direction fitted without each fold (the same columns).
    maps : list of (float, float)
        Per fold, ``(a, b)`` of :func:`affine_to_cv_units`.
    low, high : float
        Range of the held-out histogram, CV units.
    n_bins : int
        Its bins (:func:`histogram_bins`).
    """

    def __init__(self, cols, w, fold_w, maps, low, high, n_bins):
        self.cols = np.asarray(cols, dtype=np.intp)
        self.w = np.asarray(w, dtype=np.float64)
        self.fold_w = [np.asarray(v, dtype=np.float64) for v in fold_w]
        self.maps = [(float(a), float(b)) for a, b in maps]
        self.low, self.high, self.n_bins = float(low), float(high), int(n_bins)

    @property
    def edges(self):
        """The bin edges, CV units."""
        return np.linspace(self.low, self.high, self.n_bins + 1)


def _along(moments, idx, w):
    """Mean and variance along `w` of the features `idx` of a Moments."""
    if not moments.count:
        return math.nan, math.nan
    mean = float(moments.mean[idx] @ w)
    var = float(w @ (moments.scatter[np.ix_(idx, idx)] / moments.count) @ w)
    return mean, max(var, 0.0)


def cv_plans(fits, fm, local):
    """A :class:`CVPlan` per ranked CV, from the fold moments.

    Parameters
    ----------
    fits : list of cvdesign.pipeline.ranking.Fit
    fm : cvdesign.search.FoldMoments
        Standardized fold moments (the columns of ``fit.idx``).
    local : dict of int to int
        Column of the fold moments -> column of the pass's values.

    Returns
    -------
    list of CVPlan
    """
    plans = []
    for fit in fits:
        idx = np.asarray(fit.idx, dtype=np.intp)
        maps, lo, hi, narrowest = [], math.inf, -math.inf, math.inf
        for k, wk in enumerate(fit.fold_w):
            train = [(_along(m, idx, wk), _along(m, idx, fit.w)) for m in fm.train(k)]
            within_v = float(np.mean([v[1] for v, _ in train]))
            within_c = float(np.mean([c[1] for _, c in train]))
            a, b = affine_to_cv_units([v[0] for v, _ in train], [c[0] for _, c in train],
                                      within_v, within_c)
            maps.append((a, b))
            for m in fm.test(k):
                mean, var = _along(m, idx, wk)
                if math.isnan(mean):
                    continue
                std = abs(a) * math.sqrt(var)
                centre, half = a * mean + b, RANGE_STDS * std
                lo, hi = min(lo, centre - half), max(hi, centre + half)
                if std > 0:
                    narrowest = min(narrowest, std)
        if not hi > lo:  # a CV that does not move within the states
            mid = 0.0 if not math.isfinite(lo) else lo
            lo, hi = mid - 1.0, mid + 1.0
        plans.append(CVPlan([local[int(i)] for i in idx], fit.w, fit.fold_w, maps, lo, hi,
                            histogram_bins(lo, hi, narrowest)))
    return plans


def timescale_lags(grid, lag_frames):
    """The lags (frames) of the implied timescales: a grid plus the pipeline's lag.

    Examples
    --------
    >>> timescale_lags([1, 2, 4, 8], 5).tolist()
    [1, 2, 4, 5, 8]
    >>> timescale_lags(None, 5) is None
    True
    """
    if grid is None:
        return None
    lags = {int(v) for v in grid}
    if lag_frames is not None:
        lags.add(int(lag_frames))
    return np.array(sorted(lags), dtype=np.intp)


def _combine(values, cols, weights):
    """``sum_j values[:, cols[j]] * weights[j]``, term by term: each row's bits depend
    on that row alone (no matrix product, whose rows depend on the matrix's shape)."""
    out = np.zeros(values.shape[0])
    for c, w in zip(cols, weights):
        out += values[:, c] * w
    return out


def _standardized(x, center, scale):
    """``(x - center) / scale`` of columns already selected, as ``FeaturePass.values``."""
    if center is not None:
        x = x - center
    if scale is not None:
        x = x / scale
    return np.ascontiguousarray(x, dtype=np.float64)


class CVBlockHistograms:
    """Block sums ``h``: histograms of each ranked CV (its fold's direction) over a block.

    Picklable, so that workers of a parallel executor can compute them; it lives here, in
    a module the workers import before their first task
    (:data:`cvdesign.parallel.executors.WORKER_PRELOAD`), not beside ``suggest``, whose
    imports (scikit-learn) would cost each worker about half a second when the held-out
    pass reaches it.

    Parameters
    ----------
    plans : list of (ndarray, list of ndarray, list of (float, float))
        Per ranked CV: its columns among the block's values, its direction in each
        held-out fold and each fold's histogram range (CV units).
    n_bins : int
        Bins of each histogram.

    Examples
    --------
    >>> h = CVBlockHistograms([(np.array([0]), [np.array([1.0])], [(0.0, 1.0)])], 4)
    >>> h(np.array([[0.1], [0.6], [0.7]]), (0, 0))["h"].tolist()
    [[1.0, 0.0, 2.0, 0.0]]
    """

    def __init__(self, plans, n_bins):
        self.plans = plans
        self.n_bins = n_bins

    def __call__(self, values, key, weights=None):
        k = key[1]
        h = np.zeros((len(self.plans), self.n_bins))
        for ci, (p_idx, fold_w, ranges) in enumerate(self.plans):
            lo, hi = ranges[k]
            v = values[:, p_idx] @ fold_w[k]
            b = np.clip(np.floor((v - lo) / (hi - lo) * self.n_bins).astype(np.intp), 0,
                        self.n_bins - 1)
            h[ci] = np.bincount(b, weights=weights, minlength=self.n_bins)
        return {"h": h}


class CVReportPass(FeaturePass):
    """Held-out histograms, traces and lagged sums of the ranked CVs, in one pass.

    Parameters
    ----------
    featurizer : Featurizer
    plans : list of CVPlan
    folds : cvdesign.passes.Folds
        The folds of the held-out scoring.
    strides : dict of int to int
        Trace stride of each segment (:func:`trace_stride`).
    lags : array-like of int or None
        Lags in frames of the implied timescales (None: none).
    shift : array-like of shape (n_cvs,)
        Fixed shift of the lagged sums (near each CV's mean).
    columns, center, scale
        As for every :class:`~cvdesign.passes.FeaturePass`: the pool features of the
        CVs' terms and their standardization (the spec's ``center``, ``scale``).

    The result is a dict: ``hist``, per CV a float64 array of shape (n_states,
    n_bins + 2) (column 0 counts frames below the range, the last column those
    above; a biased run's frames count with their weights, so that the
    histograms estimate the unbiased distribution within each state);
    ``traces``, ``(segment, frames, values of shape (n, n_cvs), state codes)`` per
    leaf with kept frames, in frame order; ``lagged``, per lag a
    :class:`~cvdesign.stats.moments.DiagonalLaggedMoments` of the CVs (or None
    without lags), whose pairs weigh as their first frame in a biased run (as
    the ranking's slowness, :class:`~cvdesign.passes.LaggedPass`).
    """

    def __init__(self, featurizer, plans, folds, strides, lags, shift, *, columns, center,
                 scale):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.plans, self.folds = list(plans), folds
        self.strides = dict(strides)
        self.lags = None if lags is None else [int(v) for v in lags]
        self.shift = np.asarray(shift, dtype=np.float64)

    def halo(self, segment_index):
        return max(self.lags) if self.lags else 0

    def map(self, leaf):
        n_cv = len(self.plans)
        if self.lags:  # only the terms' columns of the window (the halo is long)
            z = _standardized(leaf.window_x if self.columns is None
                              else leaf.window_columns(self.columns), self.center, self.scale)
        else:
            z = self.values(leaf.x)
        cv = np.empty((z.shape[0], n_cv))
        for c, p in enumerate(self.plans):
            cv[:, c] = _combine(z, p.cols, p.w)
        keys = frame_keys(leaf.layout, leaf.frames, folds=self.folds)
        w = leaf.weights  # biased runs: each frame counts with its weight
        # the leaf's rows of each held-out fold (usually one), with their z and weights
        groups = [(k, z[rows], keys.states[rows], None if w is None else w[rows])
                  for (k,), rows in group_rows(keys.fold)]
        hist = []
        for p in self.plans:
            nb2 = p.n_bins + 2
            h = np.zeros(leaf.n_states * nb2)
            width = (p.high - p.low) / p.n_bins
            for k, zk, sk, wk in groups:
                a, b = p.maps[k]
                u = a * _combine(zk, p.cols, p.fold_w[k]) + b
                b_idx = np.clip(np.floor((u - p.low) / width), 0, p.n_bins - 1)
                b_idx = b_idx.astype(np.int64) + 1
                b_idx[u < p.low] = 0
                b_idx[u > p.high] = p.n_bins + 1
                h += np.bincount(sk * nb2 + b_idx, weights=wk, minlength=h.size)
            hist.append(h.reshape(leaf.n_states, nb2))
        lay = leaf.layout
        kept = np.flatnonzero((leaf.frames - lay.lo) % self.strides[leaf.segment] == 0)
        traces = ([(leaf.segment, leaf.frames[kept].copy(), cv[kept].copy(),
                    leaf.states[kept].copy())] if kept.size else [])
        lagged = _lag_sums(leaf, cv - self.shift, self.lags) if self.lags else None
        return {"hist": hist, "traces": traces, "lagged": lagged}

    def merge(self, a, b):
        lagged = None if a["lagged"] is None else _add_lag_sums(a["lagged"], b["lagged"])
        return {"hist": [x + y for x, y in zip(a["hist"], b["hist"])],
                "traces": a["traces"] + b["traces"], "lagged": lagged}

    def finish(self, partial, plan):
        n_cv = len(self.plans)
        if partial is None:
            partial = {"hist": [np.zeros((plan.n_states, p.n_bins + 2)) for p in self.plans],
                       "traces": [], "lagged": None if not self.lags else
                       {"count": np.zeros(len(self.lags)),
                        "n_pairs": np.zeros(len(self.lags), dtype=np.int64),
                        "sums": np.zeros((5, len(self.lags), n_cv))}}
        if partial["lagged"] is not None:
            partial = dict(partial, lagged=_lagged_moments(partial["lagged"], self.lags,
                                                           self.shift))
        return partial


def _lagged_moments(stack, lags, shift):
    """One :class:`~cvdesign.stats.moments.DiagonalLaggedMoments` per lag from the summed
    output of :func:`_lag_sums`."""
    out = []
    for g, lag in enumerate(lags):
        m = DiagonalLaggedMoments(stack["sums"].shape[2], shift=shift, lag=lag)
        m.count, m.n_pairs = float(stack["count"][g]), int(stack["n_pairs"][g])
        m.sum_x, m.sum_y, m.sum_xx, m.sum_xy, m.sum_yy = (
            stack["sums"][f, g].copy() for f in range(5))
        out.append(m)
    return out


def _add_lag_sums(a, b):
    """The sums of :func:`_lag_sums` of two disjoint sets of pairs, added."""
    return {k: a[k] + b[k] for k in a}


class CVLaggedPass(FeaturePass):
    """The lagged sums of the ranked CVs at the implied timescales' lags, alone.

    The part of :class:`CVReportPass` that needs a halo of the longest lag (up
    to 2000 frames), for a read of its own whose featurizer computes the CVs'
    terms only: in the held-out read over every feature, that halo would keep
    its frames of every feature in memory.

    Parameters
    ----------
    featurizer : Featurizer
        Features that include the CVs' terms (e.g. a
        :class:`~cvdesign.passes.PoolFeaturizer` of their descriptors).
    plans : list of CVPlan
        The ranked CVs; only ``cols`` and ``w`` are used.
    lags : array-like of int
        Lags in frames.
    shift : array-like of shape (n_cvs,)
        Fixed shift of the lagged sums (near each CV's mean).
    columns, center, scale
        As for every :class:`~cvdesign.passes.FeaturePass`: the CVs' terms among
        the featurizer's columns, and their standardization.

    The result is a list, per lag, of
    :class:`~cvdesign.stats.moments.DiagonalLaggedMoments` of the CVs, whose
    pairs weigh as their first frame in a biased run; the same as the
    ``lagged`` entry of :class:`CVReportPass` with these lags.

    Examples
    --------
    >>> import os, tempfile
    >>> import mdtraj as md
    >>> from cvdesign import Source
    >>> from cvdesign.passes import CoordinateFeaturizer, run_pass
    >>> top = md.Topology(); r = top.add_residue("TOY", top.add_chain())
    >>> _ = top.add_atom("C1", md.element.carbon, r)
    >>> x = np.cos(np.arange(200) / 10.0)[:, None, None] * np.ones((1, 1, 3))
    >>> path = os.path.join(tempfile.mkdtemp(), "run.dcd")
    >>> md.Trajectory(x.astype(np.float32), top).save_dcd(path)
    >>> src = Source(top).add(path, "a")
    >>> cv = CVPlan([0], [1.0], [[1.0]], [(1.0, 0.0)], -1.0, 1.0, 10)
    >>> m = run_pass(CVLaggedPass(CoordinateFeaturizer([0]), [cv], [1, 5], [0.0]), src)
    >>> [round(float(v.autocorrelation()[0]), 2) for v in m]
    [1.0, 0.88]
    """

    def __init__(self, featurizer, plans, lags, shift, *, columns=None, center=None,
                 scale=None):
        super().__init__(featurizer, columns=columns, center=center, scale=scale)
        self.plans = list(plans)
        self.lags = [int(v) for v in lags]
        if not self.lags:
            raise ValueError("CVLaggedPass needs at least one lag")
        self.shift = np.asarray(shift, dtype=np.float64)

    def halo(self, segment_index):
        return max(self.lags)

    def map(self, leaf):
        z = _standardized(leaf.window_x if self.columns is None
                          else leaf.window_columns(self.columns), self.center, self.scale)
        cv = np.empty((z.shape[0], len(self.plans)))
        for c, p in enumerate(self.plans):
            cv[:, c] = _combine(z, p.cols, p.w)
        return _lag_sums(leaf, cv - self.shift, self.lags)

    def merge(self, a, b):
        return _add_lag_sums(a, b)

    def finish(self, partial, plan):
        if partial is None:
            partial = {"count": np.zeros(len(self.lags)),
                       "n_pairs": np.zeros(len(self.lags), dtype=np.int64),
                       "sums": np.zeros((5, len(self.lags), len(self.plans)))}
        return _lagged_moments(partial, self.lags, self.shift)


class CVGridPass(LagGridPass):
    """The ranked CVs' per-run lagged moments on the integrated times' grid of lags.

    :class:`~cvdesign.passes.LagGridPass` with the CVs in place of features: per
    run (segment, state), diagonal lagged moments of each CV at every lag of the
    grid, in frames (also in a biased run, as the descriptors' integrated times).
    From them :func:`cv_integrated_times` gives each CV's own integrated time
    within the states. A CV's time is not its slowest term's: a combination can
    cancel its terms' fast parts (the within-state noise they share, which is what
    a discriminant does) and decorrelate more slowly than any of them.

    Parameters
    ----------
    featurizer : Featurizer
        Features that include the CVs' terms.
    plans : list of CVPlan
        The ranked CVs; only ``cols`` and ``w`` are used.
    lags : sequence of int
        Lags in frames (:func:`cvdesign.pipeline.timing.iat_lags`).
    shift : array-like of shape (n_cvs,)
        Fixed shift of the sums (near each CV's mean).
    columns, center, scale
        The CVs' terms among the featurizer's columns, and their standardization
        (as :class:`CVLaggedPass`).

    Returns a list of :class:`~cvdesign.passes.LaggedResult`, one per lag, over the
    CVs (``n_features`` is the number of CVs).

    Examples
    --------
    >>> from cvdesign.passes import CoordinateFeaturizer
    >>> cv = CVPlan([0, 1], [1.0, -1.0], [[1.0, -1.0]], [(1.0, 0.0)], -1.0, 1.0, 10)
    >>> p = CVGridPass(CoordinateFeaturizer([0]), [cv], [1, 5], [0.5])  # the CV x - y
    >>> p.n_features, p.shifted(np.array([[3.0, 1.0, 0.0]]), p.shift).tolist()
    (1, [[1.5]])
    """

    def __init__(self, featurizer, plans, lags, shift, *, columns=None, center=None,
                 scale=None):
        self.plans = list(plans)
        super().__init__(featurizer, lags, shift=np.zeros(len(self.plans)), columns=columns,
                         center=center, scale=scale)
        self.n_features = len(self.plans)  # the CVs (the columns are their terms)
        self.shift = np.asarray(shift, dtype=np.float64).reshape(-1)
        if self.shift.size != self.n_features:
            raise ValueError(f"shift has {self.shift.size} entries for {self.n_features} CVs")

    def shifted(self, x, shift, name="shifted"):
        """The CVs of the rows of `x` (the window's features) minus `shift`."""
        z = _standardized(x if self.columns is None else x[:, self.columns], self.center,
                          self.scale)
        cv = np.empty((z.shape[0], len(self.plans)))
        for c, p in enumerate(self.plans):
            cv[:, c] = _combine(z, p.cols, p.w)
        return np.subtract(cv, shift, out=cv)


def _within_runs(results):
    """Autocorrelation of each CV within the runs (each about its own mean) at each lag of
    :class:`CVGridPass`'s result: shape (n_lags, n_cvs), NaN where undefined."""
    n = results[0].n_features if results else 0
    by_lag = [r.by_run() for r in results]
    return np.array([local_autocorrelation(runs.values(), n)
                     for runs in by_lag]).reshape(len(results), n)


def cv_integrated_times(results, lags, dt_ps, state_frames, *, grid=None, effective=None):
    """Each CV's integrated time within the states, from :class:`CVGridPass`: that of the
    state in which it is longest.

    Every run (segment, state) is taken about its own mean
    (:func:`~cvdesign.pipeline.timing.local_autocorrelation`); each state's runs give
    :func:`~cvdesign.pipeline.timing.integrated_time`, as for the descriptors of the score
    card, and the CV's time is the longest of them, with the asymptotic interval of that
    state's frames (:func:`~cvdesign.score.card.integrated_time_interval`). A time pooled
    over the states weighs each by its variance along the CV: a narrow, slow state (spread
    0.01, 100 frames) beside a broad, fast one (spread 0.1, 1 frame) pooled to about 2
    frames, and the deposition interval sized from it would fill the slow basin far faster
    than it relaxes.

    Parameters
    ----------
    results : list of LaggedResult
        :class:`CVGridPass`'s result, one per lag.
    lags : array-like of int
        Its lags, frames.
    dt_ps : float
        Time between frames, ps.
    state_frames : array-like of shape (n_states,)
        Frames of each state (the effective sample size of a reweighted one), for the
        interval.
    grid : array-like of int, optional
        The lags (among `lags`) to integrate over, e.g. the descriptors' grid when the
        pass also has the pipeline's lag; None: all.
    effective : dict of (int, int) to float, default=None
        Kish effective frames of reweighted runs, per (segment, state), for the test of runs
        too short for the time (:func:`~cvdesign.pipeline.timing.runs_too_short`).

    Returns
    -------
    list of (float, bool, list or None, bool, int, list of float) or None
        Per CV: the time (ps), whether the autocorrelation decayed within the
        window (False: the time is a lower bound; also when the runs are too short
        for it, :func:`~cvdesign.pipeline.timing.runs_too_short`), the 95 %
        interval (ps; None when it did not decay), whether the runs were too short
        for it, the state it is the time of, and per state its own time (frames; NaN for
        a state without runs); None for a CV without pairs at the first lag.
    """
    lags = np.asarray(lags, dtype=np.intp)
    by_lag = [r.by_run() for r in results]  # (folds merged once per lag)
    n = results[0].n_features if results else 0
    keep = (np.ones(lags.size, dtype=bool) if grid is None
            else np.isin(lags, np.asarray(grid, dtype=np.intp)))
    lags = lags[keep]
    kept = [runs for runs, k in zip(by_lag, keep) if k]
    per_state = state_integrated_times(kept, lags, n, dt=dt_ps, return_window=True)
    tau, decayed, window, state = slowest_state_times(per_state, n)
    short = np.zeros(n, dtype=bool)
    in_frames = {s: v[0] / dt_ps for s, v in per_state.items()}
    own = np.full((len(state_frames), n), np.nan)  # per state, frames
    for s, t in in_frames.items():
        own[s] = t
    if len(lags) and int(lags[0]) == 1:  # runs too short for the time: a lower bound
        short = runs_too_short(kept[0], in_frames, n, effective=effective) & decayed
        decayed = decayed & ~short
    frames = np.asarray(state_frames, dtype=np.float64)[np.maximum(state, 0)]
    lo, hi = integrated_time_interval(tau, window, np.maximum(frames, 1.0))
    return [None if not np.isfinite(tau[c]) else
            (float(tau[c]), bool(decayed[c]), [float(lo[c]), float(hi[c])] if decayed[c] else None,
             bool(short[c]), int(state[c]), own[:, c].tolist())
            for c in range(n)]


def _lag_sums(leaf, d, lags):
    """Sums of the lagged pairs of a leaf at every lag: ``{"count": (n_lags,), "n_pairs":
    (n_lags,), "sums": (5, n_lags, n_cv)}``, the sums (``x``, ``y``, ``xx``, ``xy``, ``yy``)
    of :class:`~cvdesign.stats.moments.DiagonalLaggedMoments` about its shift.

    `d` holds the shifted values of the leaf's window (the leaf's rows first). The pairs
    are :meth:`cvdesign.passes.Leaf.pairs`'s; a pair weighs as its first frame in a biased
    run (as :class:`cvdesign.passes.LaggedPass`). An unbiased leaf takes every lag at once:
    its pair ``(t, t + lag)`` is valid when the run of frames of one state starting at ``t``
    reaches ``t + lag``, and then the second frame is ``lag`` rows after the first in the
    window (every frame between them is there).
    """
    lags = np.asarray(lags, dtype=np.intp)
    n, n_cv = leaf.n, d.shape[1]
    sums = np.zeros((5, lags.size, n_cv))
    w = leaf.weights
    if w is None and leaf.layout.clock is None:
        t = leaf.frames
        valid = leaf.layout.run_end_of(t)[None, :] > t[None, :] + lags[:, None]
        rows = np.minimum(np.arange(n)[None, :] + lags[:, None], d.shape[0] - 1)
        y = d[rows] * valid[:, :, None]          # (n_lags, n, n_cv), zero where not valid
        x = d[:n]
        v = valid.astype(np.float64)
        count = v.sum(axis=1)
        sums[0] = v @ x
        sums[1] = y.sum(axis=1)
        sums[2] = v @ (x * x)
        sums[3] = np.einsum("ltc,tc->lc", y, x)
        sums[4] = np.einsum("ltc,ltc->lc", y, y)
        return {"count": count, "n_pairs": valid.sum(axis=1).astype(np.int64), "sums": sums}
    count = np.zeros(lags.size)
    n_pairs = np.zeros(lags.size, dtype=np.int64)
    for g, lag in enumerate(lags.tolist()):
        i, j = leaf.pairs(lag)
        if i.size == 0:
            continue
        # the sums of DiagonalLaggedMoments (d is already shifted), a pair weighing as its
        # first frame
        m = DiagonalLaggedMoments(n_cv).add_shifted(d[i], d[j], None if w is None else w[i])
        count[g], n_pairs[g] = m.count, m.n_pairs
        sums[:, g] = m.sum_x, m.sum_y, m.sum_xx, m.sum_xy, m.sum_yy
    return {"count": count, "n_pairs": n_pairs, "sums": sums}


def _implied(rho, lag, dt):
    """``-lag dt / ln rho``, or None when rho is not in (0, 1)."""
    return -lag * dt / math.log(rho) if 0.0 < rho < 1.0 else None


def _timescales(lagged, c, lags, dt, within=None):
    """``{"lag_ps", "timescale_ps", "timescale_within_runs_ps"}`` of CV `c`, or None when
    none is defined; `within` (shape (n_lags, n_cvs)): the autocorrelations within runs
    (None: ``timescale_within_runs_ps`` is None)."""
    out = [_implied(float(m.autocorrelation()[c]) if m.count > 0 else math.nan, lag, dt)
           for lag, m in zip(lags, lagged)]
    local = None if within is None else [_implied(float(within[g, c]), lag, dt)
                                         for g, lag in enumerate(lags)]
    if all(v is None for v in out + (local or [])):
        return None
    return {"lag_ps": [float(lag * dt) for lag in lags], "timescale_ps": out,
            "timescale_within_runs_ps": local}


def _counts(values):
    """Frame counts as ints; sums of the weights of a state's biased frames (not whole) as
    floats."""
    if np.all(values == np.round(values)):
        return [int(v) for v in values]
    return [float(v) for v in values]


def report_document(result, plans, ranking, *, source, states, steps, lags, temperature_k,
                    lag_ps, within_states=True):
    """The ``report-data.json`` document of a ``suggest`` run (its ``tica`` is None).

    Parameters
    ----------
    result : dict
        What :class:`CVReportPass` returned.
    plans : list of CVPlan
    ranking : list of dict
        The ranking entries (rank, spec), in the order of `plans`.
    source : cvdesign.io.source.Source
        For the segments' file names.
    states : list of str
    steps : dict of int to float or None
        Time step of each segment, ps (None: unknown).
    lags : array-like of int or None
        The pass's lags, frames (the same for every segment).
    temperature_k, lag_ps : float or None
    within_states : bool, default=True
        Add the implied timescales within the states (``result["cv_grid"]``, each run
        about its own mean, lags in frames); False for biased runs, whose pooled
        timescales take their pairs in rescaled time.

    Returns
    -------
    dict
        The document (format ``cvdesign-report-data``, version 1, kind ``suggest``).
    """
    names = np.array(states, dtype=object)
    by_segment = {}
    for seg, frames, values, codes in result["traces"]:
        by_segment.setdefault(seg, []).append((frames, values, codes))
    dt_all = {round(v, 9) for v in steps.values() if v is not None}
    dt = next(iter(steps.values())) if len(dt_all) == 1 and None not in steps.values() else None
    within = None
    if within_states and result.get("cv_grid") is not None:
        within = _within_runs(result["cv_grid"])
    reweighting = source.reweighting()  # states with biased runs count weights, not frames
    weighted = None if reweighting is None else [states[s] for s in reweighting.biased_states]
    file_names = run_file_names(seg.path for seg in source.segments)
    cvs = []
    for c, (p, entry) in enumerate(zip(plans, ranking)):
        hist = result["hist"][c]
        heldout = {"edges": p.edges.tolist(),
                   "counts": {s: _counts(hist[i, 1:-1]) for i, s in enumerate(states)},
                   "outside": {s: _counts(hist[i, [0, -1]]) for i, s in enumerate(states)}}
        if weighted is not None:
            heldout["weighted"] = weighted
        traces = []
        for seg in sorted(by_segment):
            parts = by_segment[seg]
            frames = np.concatenate([f for f, _, _ in parts])
            step = steps.get(seg)
            traces.append({"file": file_names[str(source.segments[seg].path)], "frame": frames.tolist(),
                           "time_ps": None if step is None else (frames * step).tolist(),
                           "value": np.concatenate([v[:, c] for _, v, _ in parts]).tolist(),
                           "state": names[np.concatenate([s for _, _, s in parts])].tolist()})
        timescales = None
        if lags is not None and result["lagged"] is not None and dt is not None:
            timescales = _timescales(result["lagged"], c, lags, dt, within)
        cvs.append({"rank": entry["rank"], "spec": entry["spec"], "units": "CV units",
                    "heldout": heldout, "traces": traces, "timescales": timescales})
    return {"format": "cvdesign-report-data", "version": 1, "kind": "suggest",
            "states": list(states), "temperature_k": float(temperature_k),
            "lag_ps": lag_ps, "cvs": cvs, "tica": None}


def funnel_report_document(positions, spec_name):
    """The ``NAME-report-data.json`` document of ``cvdesign funnel``.

    Parameters
    ----------
    positions : dict
        ``{"z_nm": [...], "r_nm": [...]}``: the ligand centre in the restraint's frame
        (``positions`` of :func:`cvdesign.bias.funnel.size_funnel_from_source`), nm.
    spec_name : str
        The funnel spec's file name, written beside it.

    Returns
    -------
    dict

    Examples
    --------
    >>> doc = funnel_report_document({"z_nm": [0.1], "r_nm": [0.05]}, "site.json")
    >>> doc["kind"], doc["spec"], doc["positions"]["z_nm"]
    ('funnel', 'site.json', [0.1])
    """
    return {"format": "cvdesign-report-data", "version": 1, "kind": "funnel",
            "positions": {"z_nm": list(positions["z_nm"]), "r_nm": list(positions["r_nm"])},
            "spec": str(spec_name)}
