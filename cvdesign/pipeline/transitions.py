"""Slowness from the transition data: lagged pairs along runs that cross between states.

Basin-only runs never leave their states, so their lagged pairs cannot show
how slowly a CV crosses; the objective ``both`` then measures slowness within
the states (:func:`cvdesign.search.within_states`). A *crossing run* -- a
labelled run whose labels visit two or more states, typically a biased run
fed back with :meth:`cvdesign.io.source.Source.add_labelled` -- holds what
they miss. Here every frame of each crossing run is read, those between the
basin cores (labelled None) included, and lagged pairs are formed along the
whole run at the lag (in rescaled time for a biased run, weighted by
``exp(V/kT)`` normalized over that run: :mod:`cvdesign.io.bias`), spanning
the state changes; each run's pairs are taken about that run's own
(reweighted) mean, and the autocorrelation of a CV along them is its
*transition slowness*. Lag membership stays a pure function of (file,
absolute frame): the pairs are those of :class:`~cvdesign.passes.LaggedPass`
on a source in which each crossing run is one state
(:meth:`~cvdesign.io.source.Source.runs_as_states`).

**Held-out folds.** Each crossing run is cut into ``n_folds`` contiguous
blocks of frames (by frame number: fold ``frame * n_folds // n_frames``); the
held-out transition slowness of fold ``k`` uses only the pairs with both
frames in block ``k`` of each run, about that block's own mean, along the
direction fitted without fold ``k`` of the *state* data. That direction is
fitted on the states' means and covariances only (never on lagged pairs or the
frames between the states), but the basin-core frames of a crossing run are
part of the state data too, and their state folds (by rank within each state,
or by file) are not the run's blocks: some core frames of block ``k`` may be
among the frames the direction was fitted on. What is strictly held out is
the time order (the pairs) and the transition frames.

**Enough crossings.** A crossing is a change of state between successive visits
of the states (stretches of labelled frames in one state, unlabelled frames inside
them left aside), each visit lasting at least the lag in frames (a flicker across a
boundary is not a crossing; the proposal of ``--runs`` counts its transitions the same
way); in a biased run every visit counts (its lag is in rescaled time). The transition
slowness ranks (objective ``both``) only when every held-out fold holds at
least :data:`MIN_CROSSINGS_PER_FOLD` crossings inside its blocks; otherwise the
ranking falls back to within-state slowness, says so in the notes, and still
reports the transition measure.

**Intervals.** Each fold's block is cut into up to :data:`BLOCKS_PER_FOLD`
sub-blocks (pairs within a sub-block only, for the point estimates too), which
the block bootstrap resamples within each (run, fold), the ranked CVs'
directions held fixed.
"""

from dataclasses import dataclass

import numpy as np

from ..fit import timescales_from_eigenvalues
from ..passes import LaggedPass, plan_tasks, run_pass
from ..passes.keys import Folds
from ..search import (autocorrelation_along, heldout_autocorrelation, pooled_autocorrelation,
                      scaled_fold_directions, within_states)
from ..search.folds import standardize_lagged
from ..stats.bootstrap import MIN_INTERVAL_BLOCKS, block_bootstrap
from ..stats.moments import LaggedMoments, merge_all
from .ranking import _finite

__all__ = ["MIN_CROSSINGS_PER_FOLD", "BLOCKS_PER_FOLD", "MIN_BLOCK_LAGS", "crossings",
           "TransitionData", "gather_transitions", "transition_columns",
           "transition_intervals"]

#: Fewest crossings inside each held-out fold's blocks for the transition slowness to rank
#: (common practice: an autocorrelation across a barrier needs several crossings in each
#: piece of data it is measured on; below that it is mostly the noise of one or two events).
MIN_CROSSINGS_PER_FOLD = 3

#: Most bootstrap sub-blocks per held-out fold of a crossing run.
BLOCKS_PER_FOLD = 8

#: Fewest lags a sub-block spans (fewer sub-blocks when the runs are short).
MIN_BLOCK_LAGS = 10


def crossings(labels, min_visit=1):
    """Changes of state along a run: (last frame in one state, first frame in the next).

    A *visit* is a stretch of labelled frames in one state (frames in no state inside it
    do not end it); visits of fewer than `min_visit` labelled frames are left out (a flicker
    across a boundary is not a crossing), and a crossing is a change of state between
    successive visits that are kept.

    Parameters
    ----------
    labels : sequence
        State name of every frame, None for a frame in no state.
    min_visit : int, default=1
        Fewest labelled frames of a visit that counts (the lag in frames, for states
        assigned to every frame).

    Returns
    -------
    list of (int, int)
        Frame numbers, in order.

    Examples
    --------
    >>> crossings(["a", "a", None, "b", "b", None, None, "b", "a"])
    [(1, 3), (7, 8)]
    >>> crossings(["a", "a", "a", "b", "a", "a", "b", "b", "b"], min_visit=2)  # one flicker
    [(5, 6)]
    """
    visits = []  # [label, first frame, last frame, labelled frames]
    for f, x in enumerate(labels):
        if x is None:
            continue
        if visits and visits[-1][0] == x:
            visits[-1][2] = f
            visits[-1][3] += 1
        else:
            visits.append([x, f, f, 1])
    out, last = [], None
    for label, first, end, n in visits:
        if n < min_visit:
            continue
        if last is not None and label != last[0]:
            out.append((last[2], first))
        last = (label, first, end)
    return out


@dataclass
class TransitionData:
    """The crossing runs' lagged pairs and crossings, from :func:`gather_transitions`.

    Attributes
    ----------
    runs : list of int
        Segments of the source that are crossing runs.
    paths : list of str
    n_crossings : list of int
        Crossings of each run.
    per_fold : ndarray of int, shape (n_folds,)
        Crossings inside each held-out fold's sub-blocks (both frames in one).
    blocks_per_fold : int
    blocks : list of list of list of LaggedMoments
        ``blocks[run][fold]``: the sub-blocks with pairs (features as read).
    ranks : bool
        Whether the transition slowness ranks (enough crossings, pairs in every fold).
    notes : list of str
        What was measured (see :meth:`ranking_notes` for what the ranking does with it).
    """

    runs: list
    paths: list
    n_crossings: list
    per_fold: np.ndarray
    blocks_per_fold: int
    blocks: list
    ranks: bool
    notes: list

    def ranking_notes(self, objective):
        """What the ranking does with the transition slowness, for the summary.

        Parameters
        ----------
        objective : {'separate', 'slow', 'both'}

        Returns
        -------
        list of str
            A note (a warning for ``both`` when it falls back to within-state slowness).
        """
        per_fold = ", ".join(str(int(v)) for v in self.per_fold)
        if objective != "both":
            return [f"transition slowness reported, not ranked on (objective {objective!r}; "
                    f"objective 'both' ranks on it; crossings per held-out fold: {per_fold})"]
        if self.ranks:
            return ["objective 'both' ranks on the transition slowness (crossings per "
                    f"held-out fold: {per_fold})"]
        why = (f"fewer than {MIN_CROSSINGS_PER_FOLD} crossings inside some held-out fold "
               f"(per fold: {per_fold})" if self.per_fold.min() < MIN_CROSSINGS_PER_FOLD
               else "a held-out fold has no lagged pairs along the crossing runs")
        return [f"warning: transition slowness not used for ranking: {why}; objective "
                "'both' falls back to within-state slowness, and the transition columns are "
                "reported for information only; give longer runs with more crossings"]

    def by_fold(self, n_features):
        """``[run][fold]`` lagged moments (sub-blocks merged; empty where none)."""
        return [[merge_all(b) if b else LaggedMoments(n_features) for b in row]
                for row in self.blocks]

    def standardized_blocks(self, center, scale):
        """:attr:`blocks` with features ``(x - center) / scale``."""
        return [[[standardize_lagged(m, center, scale) for m in b] for b in row]
                for row in self.blocks]


def _sub_blocks(n_frames, n_folds, lags):
    """Sub-blocks per fold: at most BLOCKS_PER_FOLD, each at least MIN_BLOCK_LAGS lags long
    (a function of the frame counts and lags only)."""
    fit = min(n // max(1, n_folds * MIN_BLOCK_LAGS * int(lag or 1))
              for n, lag in zip(n_frames, lags))
    return int(max(1, min(BLOCKS_PER_FOLD, fit)))


def gather_transitions(source, featurizer, shift, lags, n_folds, *, executor=None):
    """Lagged pairs along the crossing runs of a source, per run, fold and sub-block.

    Parameters
    ----------
    source : cvdesign.io.source.Source
    featurizer : Featurizer
        The features (those of the statistics pass).
    shift : array-like of shape (n_features,)
        Fixed shift of the lagged sums.
    lags : dict of int to int
        Lag of each segment of `source`, frame spacings (rescaled time in a biased run).
    n_folds : int
        Held-out folds (those of the state data).
    executor : optional
        As in :func:`cvdesign.passes.run_pass`.

    Returns
    -------
    TransitionData or None
        None when the source has no crossing run (a run that makes no crossing, its
        labels changing only in visits shorter than the lag, is left out).

    Examples
    --------
    One unbiased run of one particle hopping along x between two states, every 50 frames:

    >>> import os, tempfile
    >>> import mdtraj as md
    >>> from cvdesign import Source
    >>> from cvdesign.passes import CoordinateFeaturizer
    >>> top = md.Topology(); _ = top.add_atom("C", md.element.carbon,
    ...     top.add_residue("X", top.add_chain()))
    >>> x = np.repeat(np.tile([0.5, 1.5], 10), 50)
    >>> labels = np.where(x < 1.0, "a", "b")
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = os.path.join(d, "run.xtc")
    ...     md.Trajectory(np.stack([x, 0 * x, 0 * x], 1)[:, None].astype(np.float32),
    ...                   top).save_xtc(path)
    ...     src = Source(top).add_labelled(path, labels)
    ...     data = gather_transitions(src, CoordinateFeaturizer([0]), np.zeros(3), {0: 5}, 2)
    >>> data.n_crossings, data.blocks_per_fold  # sub-blocks of 62 or 63 frames
    ([19], 8)
    >>> data.per_fold.tolist(), data.ranks  # the crossings inside a sub-block of each fold
    ([8, 8], True)
    """
    runs = source.crossing_runs()
    if not runs or lags is None:
        return None
    paths = [str(source.segments[si].path) for si in runs]
    tsrc = source.runs_as_states(runs, [f"run {i + 1}" for i in range(len(runs))])
    plan = plan_tasks(tsrc)
    n_frames = [lay.hi - lay.lo for lay in plan.layouts]
    run_lags = [lags.get(si) for si in runs]
    b = _sub_blocks(n_frames, n_folds, run_lags)
    folds = Folds(n_folds * b)
    result = run_pass(LaggedPass(featurizer, {i: v for i, v in enumerate(run_lags)},
                                 shift=shift, folds=folds, within_fold=True),
                      tsrc, executor=executor,
                      tasks=plan.for_features(featurizer.n_features,
                                              getattr(executor, "n_workers", 1) or 1),
                      label="transitions")
    blocks = [[[result.runs[(r, r, k * b + j)] for j in range(b)
                if (r, r, k * b + j) in result.runs and result.runs[(r, r, k * b + j)].count > 0]
               for k in range(n_folds)] for r in range(len(runs))]
    per_fold = np.zeros(n_folds, dtype=np.int64)
    n_cross = []
    for r, si in enumerate(runs):
        # a visit shorter than the lag is a flicker across a boundary (states proposed from
        # --runs label every frame), as for the proposal's own transitions; a biased run
        # keeps every visit: its lag is in rescaled time, not a number of its frames
        seg = source.segments[si]
        events = crossings(list(seg.labels),
                           1 if seg.bias is not None else max(1, int(lags.get(si) or 1)))
        n_cross.append(len(events))
        for a, c in events:
            fa, fc = (a * n_folds * b) // n_frames[r], (c * n_folds * b) // n_frames[r]
            if fa == fc:
                per_fold[fa // b] += 1
    # a run whose labels visit two states only in visits shorter than the lag never
    # crosses: its pairs, within one state, would pass for transition slowness
    left_out = [paths[r] for r in range(len(runs)) if n_cross[r] == 0]
    kept = [r for r in range(len(runs)) if n_cross[r] > 0]
    if not kept:
        return None
    runs, paths = [runs[r] for r in kept], [paths[r] for r in kept]
    n_cross, blocks = [n_cross[r] for r in kept], [blocks[r] for r in kept]
    has_pairs = all(any(blocks[r][k] for r in range(len(runs))) for k in range(n_folds))
    ranks = bool(per_fold.min() >= MIN_CROSSINGS_PER_FOLD and has_pairs)
    counts = ", ".join(f"{p!r}: {c}" for p, c in zip(paths, n_cross))
    what = (f"{len(runs)} run{'s' if len(runs) != 1 else ''} crossing between the states "
            f"(crossings {counts}; {sum(n_cross)} in all"
            + ("" if not left_out else
               f"; left out, labelled with two states but never crossing, the other's "
               f"visits shorter than the lag: {', '.join(repr(p) for p in left_out)}")
            + ")")
    notes = [f"transition slowness: {what}: lagged pairs along each whole run (the frames "
             "between the states included, pairs spanning the crossings"
             + (", in rescaled time, weighted by exp(V/kT) over the run" if tsrc.biased else "")
             + ") about the run's own mean; held out: each run cut into "
             f"{n_folds} contiguous blocks, fold k's pairs within block k (and within "
             f"{b} sub-block{'s' if b != 1 else ''} of it, which the bootstrap resamples); the "
             "direction of fold k is fitted on the other folds of the state data, which may "
             "share basin-core frames with block k (the pairs and the frames between the "
             "states are held out)"]
    return TransitionData(runs, paths, n_cross, per_fold, b, blocks, ranks, notes)


def transition_columns(fit, fm, lag_ps):
    """The ranking's transition-slowness values of one ranked CV.

    Parameters
    ----------
    fit : cvdesign.pipeline.ranking.Fit
    fm : FoldMoments
        Standardized, with ``transitions``.
    lag_ps : float

    Returns
    -------
    dict
        ``heldout_autocorrelation_transitions`` (the fold directions' autocorrelation
        on the held-out blocks, the folds' pairs pooled: :func:`~cvdesign.search.
        heldout_autocorrelation`),
        ``autocorrelation_transitions`` (the CV's, on all pairs) and
        ``timescale_transitions_ps``.
    """
    rho = heldout_autocorrelation(fm, fit.idx, fit.fold_w, fm.transition_test)
    rho_all = autocorrelation_along(fit.w, fm.transition_pooled(), fit.idx)
    ts = float(timescales_from_eigenvalues([rho_all], lag_ps)[0])
    return {"heldout_autocorrelation_transitions": _finite(rho),
            "autocorrelation_transitions": _finite(rho_all),
            "timescale_transitions_ps": _finite(ts)}


def transition_intervals(blocks, fits, fm, lag_ps, *, n_boot, seed):
    """Bootstrap intervals of the transition slowness of the ranked CVs.

    The sub-blocks are resampled within each (run, fold); the CVs' directions
    (all data and per fold) are held fixed.

    Parameters
    ----------
    blocks : list of list of list of LaggedMoments
        Standardized sub-blocks ``[run][fold][block]``.
    fits : list of Fit
    fm : FoldMoments
        Standardized (its training folds scale the fold directions, as the held-out
        scores do).
    lag_ps : float
    n_boot, seed : int

    Returns
    -------
    list of dict or None
        Per CV: ``autocorrelation_transitions_ci``,
        ``heldout_autocorrelation_transitions_ci``,
        ``timescale_transitions_ci_ps``; None when some (run, fold) with pairs
        has fewer than :data:`~cvdesign.stats.bootstrap.MIN_INTERVAL_BLOCKS` sub-blocks
        (intervals from so few cover the truth far less often than they say).
    """
    n_runs, n_folds = len(blocks), fm.n_folds
    keys = [(r, k) for r, row in enumerate(blocks) for k in range(n_folds) if row[k]]
    if not keys or any(len(blocks[r][k]) < MIN_INTERVAL_BLOCKS for r, k in keys):
        return None
    scaled = [scaled_fold_directions(fm, fit.idx, fit.fold_w) for fit in fits]

    def stat(merged):
        got = dict(zip(keys, merged))
        pooled = within_states(merge_all(got[(r, k)] for k in range(n_folds) if (r, k) in got)
                               for r in range(n_runs))
        per_fold = [within_states(got.get((r, k)) for r in range(n_runs))
                    for k in range(n_folds)]
        out = []
        for fit, directions in zip(fits, scaled):
            out.append(autocorrelation_along(fit.w, pooled, fit.idx))
            out.append(pooled_autocorrelation(directions, per_fold, fit.idx))
        return np.array(out)

    res = block_bootstrap([blocks[r][k] for r, k in keys], stat, n_boot=n_boot, seed=seed,
                          label="bootstrap (transitions)")
    low, high = res.interval(bounds=(-1.0, 1.0))  # (autocorrelations)
    out = []
    for i in range(len(fits)):
        aci = [_finite(low[2 * i]), _finite(high[2 * i])]
        entry = {"autocorrelation_transitions_ci": aci,
                 "heldout_autocorrelation_transitions_ci": [_finite(low[2 * i + 1]),
                                                            _finite(high[2 * i + 1])]}
        if None not in aci and lag_ps:
            entry["timescale_transitions_ci_ps"] = [
                _finite(v) for v in timescales_from_eigenvalues(np.clip(aci, -1.0, 1.0), lag_ps)]
        out.append(entry)
    return out
