"""What the report draws, gathered by the pipeline (issue 11): the report-data pass against a
direct computation, for any task split, chunk size, arrival order and executor; the
thinning rules; the stored size at two trajectory lengths; the thinned TICA picture of
``--runs`` and the funnel's positions."""

import json
import math
import os

import mdtraj as md
import numpy as np
import pytest
from scipy.signal import lfilter

import cvdesign.bias.funnel as funnel_mod
import cvdesign.pipeline.explore as explore
from cvdesign import Source, suggest
from cvdesign.bias.funnel import size_funnel, size_funnel_from_source
from cvdesign.io.source import select_atoms
from cvdesign.passes import Folds, PoolFeaturizer, frame_keys, plan_tasks, run_pass
from cvdesign.passes import thinning_stride
from cvdesign.pipeline.explore import propose_states
from cvdesign.pipeline.suggest import terms_featurizer
from cvdesign.passes import CoordinateFeaturizer, LagGridPass
from cvdesign.pipeline.report_data import (MAX_BINS, MAX_TRACE_POINTS, CVGridPass,
                                           CVLaggedPass, CVPlan, CVReportPass,
                                           affine_to_cv_units, cv_integrated_times,
                                           _within_runs, histogram_bins, trace_stride)
from cvdesign.pipeline.timing import integrated_time, local_autocorrelation
from cvdesign.pool import Descriptor, Pool


# ------------------------------------------------------------- the CVs' own integrated times
def test_a_combination_decorrelates_more_slowly_than_each_of_its_terms(tmp_path):
    """x = S + F and y = -F, with S slow (AR(1), 0.98 per frame) and F fast and large (white
    noise): each term is mostly F and decorrelates within about a frame, while x + y = S has
    the integrated time of an AR(1), (1 + phi) / (2 (1 - phi)) = 49.5 frames (Sokal 1997, in
    *Functional Integration*, Plenum). A CV's time taken from its slowest term would be 50
    times too short; CVGridPass measures the CV itself."""
    rng = np.random.default_rng(5)
    n, phi = 100_000, 0.98
    top = md.Topology()
    _ = top.add_atom("C1", md.element.carbon, top.add_residue("TOY", top.add_chain()))
    src = Source(top, timestep=1.0)
    for k in range(2):
        slow = lfilter([1.0], [1.0, -phi], rng.normal(0.0, 0.05 * np.sqrt(1 - phi * phi), n))
        fast = rng.normal(0.0, 0.5, n)
        xyz = np.zeros((n, 1, 3))
        xyz[:, 0, 0], xyz[:, 0, 1], xyz[:, 0, 2] = 1.0 + slow + fast, 1.0 - fast, 1.0
        path = tmp_path / f"run-{k}.dcd"
        md.Trajectory(xyz.astype(np.float32), top).save_dcd(str(path))
        src.add(str(path), "a")
    grid = np.unique(np.round(np.geomspace(1, 2000, 18)).astype(int))
    feats = CoordinateFeaturizer([0])
    cv = CVPlan([0, 1], [1.0, 1.0], [[1.0, 1.0]], [(1.0, 0.0)], -1.0, 1.0, 10)
    terms, cvs = run_pass((LagGridPass(feats, grid, shift=[1.0, 1.0, 1.0]),
                           CVGridPass(feats, [cv], grid, [2.0])), src)
    rho = np.array([local_autocorrelation(r.by_run().values(), 3)[:2] for r in terms])
    tau_terms, _ = integrated_time(grid, rho, 1.0)
    (tau, decayed, ci, short, state, _), = cv_integrated_times(cvs, grid, 1.0, [2 * n])
    assert decayed and ci[0] < tau < ci[1]
    assert tau_terms.max() < 1.0  # each term: about half a frame plus F's share of S
    # the estimate's relative standard deviation is sqrt(2 (2 M + 1) / N) = 0.07 for the
    # window M of about 250 frames and N = 2e5 frames (Madras and Sokal 1988): 3.5 of them
    assert tau == pytest.approx(49.5, rel=0.25) and state == 0


def test_a_cvs_integrated_time_is_that_of_its_slowest_state(tmp_path):
    """A narrow, slow state (spread 0.01 nm, AR(1) of 0.98 per frame: an integrated time
    of (1 + phi) / (2 (1 - phi)) = 49.5 frames, Sokal 1997, in *Functional Integration*,
    Plenum) beside a broad, fast one (spread 0.1 nm, white noise: half a frame). Pooled
    over the states, weighted by their variances, the time was about 1 frame, and the
    deposition interval sized from it would fill the slow basin far faster than it relaxes;
    the CV's time is now the slow state's, with that state's frames for its interval."""
    rng = np.random.default_rng(8)
    n, phi = 40_000, 0.98
    top = md.Topology()
    _ = top.add_atom("C1", md.element.carbon, top.add_residue("TOY", top.add_chain()))
    src = Source(top, timestep=1.0)
    for k, state in enumerate(("broad", "narrow")):
        x = (rng.normal(0.0, 0.1, n) if state == "broad" else
             lfilter([1.0], [1.0, -phi], rng.normal(0.0, 0.01 * np.sqrt(1 - phi * phi), n)))
        xyz = np.zeros((n, 1, 3))
        xyz[:, 0, 0] = 1.0 + x + (1.0 if state == "narrow" else 0.0)
        path = tmp_path / f"{state}.dcd"
        md.Trajectory(xyz.astype(np.float32), top).save_dcd(str(path))
        src.add(str(path), state)
    grid = np.unique(np.round(np.geomspace(1, 2000, 18)).astype(int))
    feats = CoordinateFeaturizer([0])
    cv = CVPlan([0], [1.0], [[1.0]], [(1.0, 0.0)], -1.0, 3.0, 10)
    cvs, = run_pass((CVGridPass(feats, [cv], grid, [2.0]),), src)
    (tau, decayed, ci, short, state, _), = cv_integrated_times(cvs, grid, 1.0, [n, n])
    assert state == 1 and decayed and ci[0] < tau < ci[1]
    assert tau == pytest.approx(49.5, rel=0.25)
    # the interval comes from the slow state's frames: the broad state's count does not
    # move it, and four times the slow state's halves its width on log tau (Madras and
    # Sokal 1988: sd(log tau) ~ 1 / sqrt(N))
    (_, _, same, _, _, _), = cv_integrated_times(cvs, grid, 1.0, [7 * n, n])
    (_, _, narrower, _, _, _), = cv_integrated_times(cvs, grid, 1.0, [n, 4 * n])
    assert same == ci
    assert math.log(narrower[1] / narrower[0]) == pytest.approx(
        0.5 * math.log(ci[1] / ci[0]), rel=1e-12)
    # pooled over both states (as before): about a frame
    rho = _within_runs(cvs)[:, 0]
    pooled, _ = integrated_time(grid, rho[:, None], 1.0)
    assert pooled[0] < 2.0


# ------------------------------------------------------------------------ small rules
def test_thinning_stride_is_the_smallest_stride_keeping_at_most_the_limit():
    rng = np.random.default_rng(3)
    for _ in range(200):
        counts = rng.integers(0, 3000, size=rng.integers(1, 6))
        limit = int(rng.integers(max(1, int((counts > 0).sum())), 4000))
        step = int(rng.integers(1, 4))

        def kept(s):
            return sum(len(range(0, int(c), s)) for c in counts)  # ranks r with r % s == 0

        got = thinning_stride(counts, limit, multiple_of=step)
        assert got % step == 0 and kept(got) <= limit
        assert got == step or kept(got - step) > limit  # no smaller multiple fits
    with pytest.raises(ValueError, match=r"limit=1 frames cannot hold one frame of each of "
                                         r"the 2 groups"):
        thinning_stride([5, 5], 1)


def test_a_trace_keeps_at_most_a_thousand_evenly_spaced_frames():
    for n in (1, 999, 1000, 1001, 2000, 8000, 123457):
        stride = trace_stride(n)
        assert len(range(0, n, stride)) <= MAX_TRACE_POINTS
        assert stride == 1 or len(range(0, n, stride - 1)) > MAX_TRACE_POINTS


def test_affine_map_carries_the_training_means_onto_the_cvs():
    a, b = affine_to_cv_units([0.3, 1.7], [-2.0, 5.0])  # two states: exact
    np.testing.assert_allclose([a * 0.3 + b, a * 1.7 + b], [-2.0, 5.0])
    # three states: the least-squares line through (m_s, c_s), as numpy's polyfit gives it
    m, c = np.array([0.0, 1.0, 3.0]), np.array([1.0, 2.5, 6.9])
    np.testing.assert_allclose(affine_to_cv_units(m, c), np.polyfit(m, c, 1))
    # nothing to match along the fold's direction: the spreads are matched instead
    assert affine_to_cv_units([2.0, 2.0], [0.0, 1.0], within_fold=0.25, within_cv=1.0) \
        == (2.0, 0.5 - 4.0)


def test_histogram_bins_resolve_the_narrowest_state_within_bounds():
    assert histogram_bins(0.0, 10.0, 1.0) == 50          # at least MIN_BINS
    assert histogram_bins(0.0, 30.0, 1.0) == 120         # four per standard deviation
    assert histogram_bins(0.0, 1000.0, 1.0) == 400       # at most MAX_BINS


# -------------------------------------------------------------------- the pass itself
@pytest.fixture(scope="module")
def small(demo_files):
    """Two states of the demo (two files each, 700 frames of each), a pool of three
    descriptors (a distance, a dihedral's cos and sin), folds as the pipeline plans them."""
    top, states = demo_files
    src = Source(top)
    for name, files in states.items():
        for f in files[:2]:
            src.add(f, name, frames=(100, 800))
    pool = Pool([Descriptor("distance", (0, 7), "dist C1-C8"),
                 Descriptor("dihedral", (2, 3, 4, 5), "dihedral C3-C4-C5-C6")], src.topology)
    feat = PoolFeaturizer(pool)
    plan = plan_tasks(src, leaf_frames=64)  # several leaves per file
    folds = Folds.plan(plan.layouts, 4)
    rng = np.random.default_rng(11)
    center = np.array([0.6, 0.1, 0.2])
    scale = np.array([0.3, 0.7, 0.6])
    plans = []
    for k in range(2):
        cols = np.array([0, 1, 2][:2 + k])
        w = rng.normal(size=cols.size)
        fold_w = [w + rng.normal(0, 0.1, cols.size) for _ in range(folds.n_folds)]
        maps = [(float(rng.uniform(0.5, 2.0)), float(rng.normal())) for _ in fold_w]
        plans.append(CVPlan(cols, w, fold_w, maps, -3.0, 3.0, 60 + k))
    lags = [1, 4, 25]
    strides = {lay.index: trace_stride(lay.hi - lay.lo) for lay in plan.layouts}
    shift = [0.1, -0.2]
    make = lambda: CVReportPass(feat, plans, folds, strides, lags, shift,  # noqa: E731
                                columns=np.arange(3), center=center, scale=scale)
    return {"src": src, "top": top, "feat": feat, "plan": plan, "folds": folds,
            "plans": plans, "lags": lags, "strides": strides, "center": center,
            "scale": scale, "make": make}


def _direct(small):
    """The pass's result by plain numpy on whole trajectories read with mdtraj."""
    src, feat, plans = small["src"], small["feat"], small["plans"]
    hist = [np.zeros((2, p.n_bins + 2), dtype=np.int64) for p in plans]
    traces, pairs = [], {lag: [] for lag in small["lags"]}
    for lay, seg in zip(small["plan"].layouts, src.segments):
        frames = np.arange(lay.lo, lay.hi)
        traj = md.load(str(seg.path), top=small["top"])[frames]
        z = (feat(traj.atom_slice(feat.atom_indices)) - small["center"]) / small["scale"]
        keys = frame_keys(lay, frames, folds=small["folds"])
        cv = np.stack([z[:, p.cols] @ p.w for p in plans], axis=1)
        for c, p in enumerate(plans):
            edges = p.edges
            for k in range(small["folds"].n_folds):
                a, b = p.maps[k]
                u = a * (z[keys.fold == k][:, p.cols] @ p.fold_w[k]) + b
                hist[c][lay.state, 1:-1] += np.histogram(u, edges)[0]
                hist[c][lay.state, 0] += int(np.sum(u < edges[0]))
                hist[c][lay.state, -1] += int(np.sum(u > edges[-1]))
        kept = (frames - lay.lo) % small["strides"][lay.index] == 0
        traces.append((lay.index, frames[kept], cv[kept]))
        for lag in small["lags"]:
            pairs[lag].append((cv[:-lag], cv[lag:]))
    rho = {}
    for lag, ps in pairs.items():  # reversible estimate, all runs about one mean
        x = np.concatenate([a for a, _ in ps])
        y = np.concatenate([b for _, b in ps])
        m = 0.5 * (x.mean(axis=0) + y.mean(axis=0))
        var0 = 0.5 * (((x - m) ** 2).mean(axis=0) + ((y - m) ** 2).mean(axis=0))
        rho[lag] = ((x - m) * (y - m)).mean(axis=0) / var0
    return hist, traces, rho


def test_report_pass_equals_a_direct_computation(small):
    got = run_pass(small["make"](), small["src"], tasks=small["plan"])
    hist, traces, rho = _direct(small)
    for g, h in zip(got["hist"], hist):
        np.testing.assert_array_equal(g, h)
    assert sum(int(h.sum()) for h in got["hist"]) == 2 * 4 * 700  # each frame once per CV
    by_seg = {}
    for seg, frames, values, states in got["traces"]:
        by_seg.setdefault(seg, []).append((frames, values, states))
    assert sorted(by_seg) == [0, 1, 2, 3]
    for seg, frames, values in traces:
        parts = by_seg[seg]
        np.testing.assert_array_equal(np.concatenate([f for f, _, _ in parts]), frames)
        np.testing.assert_allclose(np.concatenate([v for _, v, _ in parts]), values,
                                   rtol=1e-12, atol=1e-12)
        assert frames.size == 700 and frames[0] == 100  # 700 frames: every one is kept
    for lag, m in zip(small["lags"], got["lagged"]):
        assert m.n_pairs == 4 * (700 - lag)
        np.testing.assert_allclose(m.autocorrelation(), rho[lag], rtol=1e-9)


def _biased(small, tmp_path):
    """`small` with bias energies (kJ/mol, seeded) on its first and third segments, so that
    each state has a biased and an unbiased run."""
    rng = np.random.default_rng(21)
    src = Source(small["top"], temperature=300.0)
    for si, seg in enumerate(small["src"].segments):
        bias = None
        if si in (0, 2):
            n_file = md.load(str(seg.path), top=small["top"]).n_frames
            bias = tmp_path / f"bias-{si}.txt"
            energies = rng.normal(0, 3.0, n_file)  # kJ/mol
            bias.write_text("bias\n" + "".join(f"{float(v)!r}\n" for v in energies))
        src.add(seg.path, seg.state, frames=(seg.start, seg.stop), bias=bias)
    plan = plan_tasks(src, leaf_frames=64)
    return src, plan


def test_report_pass_equals_a_direct_computation_when_leaves_cross_fold_boundaries(small):
    """One run per state: the folds are contiguous blocks, so some leaves hold frames of two
    folds, each counted along its own fold's direction."""
    top, feat = small["top"], small["feat"]
    src = Source(top)
    for seg in small["src"].segments[::2]:  # the first file of each state
        src.add(seg.path, seg.state, frames=(seg.start, seg.stop))
    plan = plan_tasks(src, leaf_frames=64)
    folds = Folds.plan(plan.layouts, 4)
    assert folds.n_folds == 4
    rng = np.random.default_rng(12)
    plans = []
    for k, p in enumerate(small["plans"]):  # the same CVs, a direction and map per fold
        fold_w = [p.w + rng.normal(0, 0.1, p.w.size) for _ in range(4)]
        maps = [(float(rng.uniform(0.5, 2.0)), float(rng.normal())) for _ in range(4)]
        plans.append(CVPlan(p.cols, p.w, fold_w, maps, -3.0, 3.0, 60 + k))
    crossing = 0
    for lay in plan.layouts:
        for leaf in plan.leaves(lay.index):
            frames = np.arange(max(lay.lo, leaf * 64), min(lay.hi, (leaf + 1) * 64))
            crossing += np.unique(frame_keys(lay, frames, folds=folds).fold).size > 1
    assert crossing >= 2
    strides = {lay.index: trace_stride(lay.hi - lay.lo) for lay in plan.layouts}
    other = dict(small, src=src, plan=plan, folds=folds, strides=strides, plans=plans)
    make = lambda: CVReportPass(feat, plans, folds, strides,  # noqa: E731
                                small["lags"], [0.1, -0.2], columns=np.arange(3),
                                center=small["center"], scale=small["scale"])
    got = run_pass(make(), src, tasks=plan)
    hist, _, rho = _direct(other)
    for g, h in zip(got["hist"], hist):
        np.testing.assert_array_equal(g, h)
    for lag, m in zip(small["lags"], got["lagged"]):
        np.testing.assert_allclose(m.autocorrelation(), rho[lag], rtol=1e-9)


def test_report_pass_weighs_the_frames_and_pairs_of_biased_runs(small, tmp_path):
    """A biased run's frames count with their weights in the held-out histograms, and its
    lagged pairs (rescaled time) weigh as their first frame, as in the ranking's slowness;
    checked against a direct computation on whole trajectories, and the per-state sums of
    the histograms equal the states' frame counts (the weights average 1 in each state)."""
    src, plan = _biased(small, tmp_path)
    feat, plans = small["feat"], small["plans"]
    make = lambda: CVReportPass(feat, plans, small["folds"], small["strides"],  # noqa: E731
                                small["lags"], [0.1, -0.2], columns=np.arange(3),
                                center=small["center"], scale=small["scale"])
    got = run_pass(make(), src, tasks=plan)
    hist = [np.zeros((2, p.n_bins + 2)) for p in plans]
    sums = {lag: [] for lag in small["lags"]}
    for lay, seg in zip(plan.layouts, src.segments):
        frames = np.arange(lay.lo, lay.hi)
        traj = md.load(str(seg.path), top=small["top"])[frames]
        z = (feat(traj.atom_slice(feat.atom_indices)) - small["center"]) / small["scale"]
        w = np.ones(frames.size) if lay.weight is None else lay.weights_of(frames)
        keys = frame_keys(lay, frames, folds=small["folds"])
        cv = np.stack([z[:, p.cols] @ p.w for p in plans], axis=1)
        for c, p in enumerate(plans):
            for k in range(small["folds"].n_folds):
                a, b = p.maps[k]
                sel = keys.fold == k
                u = a * (z[sel][:, p.cols] @ p.fold_w[k]) + b
                hist[c][lay.state, 1:-1] += np.histogram(u, p.edges, weights=w[sel])[0]
                hist[c][lay.state, 0] += w[sel][u < p.edges[0]].sum()
                hist[c][lay.state, -1] += w[sel][u > p.edges[-1]].sum()
        for lag in small["lags"]:
            if lay.clock is None:
                t = np.arange(frames.size - lag)
                u = t + lag
            else:
                partner = lay.partners(frames, lag)
                t = np.flatnonzero(partner >= 0)
                u = partner[t] - lay.lo
            sums[lag].append((w[t], cv[t], cv[u]))
    for g, h in zip(got["hist"], hist):
        np.testing.assert_allclose(g, h, rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(g.sum(axis=1), [2 * 700, 2 * 700], rtol=1e-12)
    assert any(not np.allclose(g, np.round(g)) for g in got["hist"])  # weights, not counts
    for lag, m in zip(small["lags"], got["lagged"]):
        w = np.concatenate([a for a, _, _ in sums[lag]])
        x = np.concatenate([b for _, b, _ in sums[lag]])
        y = np.concatenate([c for _, _, c in sums[lag]])
        mean = 0.5 * (w @ x + w @ y) / w.sum()
        var0 = 0.5 * (w @ (x - mean) ** 2 + w @ (y - mean) ** 2) / w.sum()
        rho = (w @ ((x - mean) * (y - mean))) / w.sum() / var0
        assert m.n_pairs == w.size and m.count == pytest.approx(w.sum(), rel=1e-12)
        np.testing.assert_allclose(m.autocorrelation(), rho, rtol=1e-9)


def test_report_lagged_sums_skip_pairs_across_state_changes_gaps_and_files(
        tmp_path, random_tasks, shuffled_executor, assert_same):
    """Labelled runs with frames of no state and changes of state, a plain run and a frame
    range: the report's lagged sums (every lag of a leaf at once) hold exactly the pairs
    ``(t, t + lag)`` whose frames all carry one state, in every leaf length and task split
    (direct computation on the whole files)."""
    from cvdesign.passes import CoordinateFeaturizer

    rng = np.random.default_rng(31)
    top = md.Topology()
    top.add_atom("C", md.element.carbon, top.add_residue("TOY", top.add_chain()))
    n = 150
    labels = [None if i % 37 in (5, 6) else ("A" if (i // 23) % 3 else "B") for i in range(n)]
    src = Source(top)
    files = []
    for k in range(3):
        xyz = np.cumsum(rng.normal(0, 0.05, (n, 1, 3)), axis=0) + 1.0  # a slow wander, nm
        path = tmp_path / f"run{k}.dcd"
        md.Trajectory(xyz.astype(np.float32), top).save(str(path))
        files.append((str(path), md.load(str(path), top=top).xyz[:, 0, 0].astype(np.float64)))
    src.add_labelled(files[0][0], labels)
    src.add_labelled(files[1][0], labels[::-1])
    src.add(files[2][0], "A", frames=(17, 140))
    lags = [1, 3, 8, 20]
    cv = CVPlan(np.array([0]), np.array([1.0]), [np.array([1.0])], [(1.0, 0.0)], -5.0, 5.0, 10)
    make = lambda: CVReportPass(CoordinateFeaturizer([0]), [cv], Folds(1),  # noqa: E731
                                {0: 1, 1: 1, 2: 1}, lags, [1.0], columns=np.array([0]),
                                center=np.zeros(1), scale=np.ones(1))
    want = {lag: [] for lag in lags}
    runs = [(files[0][1], labels), (files[1][1], labels[::-1]),
            (files[2][1][17:140], ["A"] * 123)]
    for x, lab in runs:
        for lag in lags:
            for t in range(len(lab) - lag):
                if lab[t] is not None and all(lab[u] == lab[t] for u in range(t, t + lag + 1)):
                    want[lag].append((x[t] - 1.0, x[t + lag] - 1.0))
    ref = None
    for leaf in (4, 16, 64, 512):
        plan = plan_tasks(src, leaf_frames=leaf)
        got = run_pass(make(), src, tasks=plan)
        for lag, m in zip(lags, got["lagged"]):
            a = np.array(want[lag])
            assert m.n_pairs == len(a) > 0
            np.testing.assert_allclose(
                [m.count, m.sum_x[0], m.sum_y[0], m.sum_xx[0], m.sum_xy[0], m.sum_yy[0]],
                [len(a), a[:, 0].sum(), a[:, 1].sum(), a[:, 0] @ a[:, 0], a[:, 0] @ a[:, 1],
                 a[:, 1] @ a[:, 1]], rtol=1e-10)
        if leaf == 16:
            ref = got
            rng2 = np.random.default_rng(2)
            for trial in range(2):
                again = run_pass(make(), src, tasks=plan.with_tasks(random_tasks(plan, rng2)),
                                 chunk_frames=int(rng2.integers(5, 60)),
                                 executor=shuffled_executor(trial))
                assert_same(ref, again)


def test_report_pass_gives_the_same_bytes_for_any_split_chunk_size_and_order(
        small, assert_same, random_tasks, shuffled_executor):
    ref = run_pass(small["make"](), small["src"], tasks=small["plan"])
    rng = np.random.default_rng(5)
    for trial in range(4):
        plan = small["plan"].with_tasks(random_tasks(small["plan"], rng))
        got = run_pass(small["make"](), small["src"], tasks=plan,
                       chunk_frames=int(rng.integers(7, 400)),
                       executor=shuffled_executor(trial))
        assert_same(ref, got)


def test_report_pass_gives_the_same_bytes_on_every_executor(small, assert_same,
                                                            threaded_dask):
    ref = run_pass(small["make"](), small["src"], tasks=small["plan"])
    for executor in (2, threaded_dask):
        got = run_pass(small["make"](), small["src"],
                       tasks=small["plan"].split(n_tasks=6), executor=executor)
        assert_same(ref, got)


def _wide_and_narrow(small):
    """The report pass of `small` over a wider pool (two more descriptors around the CVs'
    terms), and the lagged pass over the terms' descriptors alone, as suggest runs them."""
    top = small["src"].topology
    wide = Pool([Descriptor("distance", (1, 6), "dist C2-C7"),
                 Descriptor("distance", (0, 7), "dist C1-C8"),
                 Descriptor("angle", (1, 2, 3), "angle C2-C3-C4"),
                 Descriptor("dihedral", (2, 3, 4, 5), "dihedral C3-C4-C5-C6")], top)
    cols = np.array([1, 3, 4])  # the distance C1-C8, the dihedral's cos and sin
    report = CVReportPass(PoolFeaturizer(wide), small["plans"], small["folds"],
                          small["strides"], small["lags"], [0.1, -0.2], columns=cols,
                          center=small["center"], scale=small["scale"])
    narrow, columns = terms_featurizer(wide, cols)  # what suggest's timescales read uses
    assert [d.label for d in narrow.pool.descriptors] == ["dist C1-C8",
                                                          "dihedral C3-C4-C5-C6"]
    assert columns.tolist() == [0, 1, 2]
    lagged = lambda: CVLaggedPass(  # noqa: E731
        narrow, small["plans"], small["lags"], [0.1, -0.2], columns=columns,
        center=small["center"], scale=small["scale"])
    return report, lagged


def test_the_lagged_pass_over_the_terms_alone_gives_the_report_pass_lagged_sums(
        small, assert_same, random_tasks, shuffled_executor, tmp_path):
    # suggest reads the timescales' lagged sums apart, over the CVs' terms only (a
    # 2000-frame halo over every feature of the held-out read held those frames of every
    # feature in memory): the same sums, with biased runs too (rescaled time, pairs
    # weighted by their first frame), for any split, chunk size and order
    report, lagged = _wide_and_narrow(small)
    assert lagged().featurizer.n_features == 3 and report.featurizer.n_features == 5
    biased_src, biased_plan = _biased(small, tmp_path)
    for src, plan in ((small["src"], small["plan"]), (biased_src, biased_plan)):
        ref = run_pass(report, src, tasks=plan)["lagged"]
        got = run_pass(lagged(), src, tasks=plan)
        assert len(got) == len(small["lags"])
        for r, g in zip(ref, got):
            assert (g.lag, g.count, g.n_pairs) == (r.lag, r.count, r.n_pairs)
            for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
                np.testing.assert_array_equal(getattr(g, name), getattr(r, name))
    assert got[0].count != got[0].n_pairs  # the biased pairs were weighted
    got = run_pass(lagged(), small["src"], tasks=small["plan"])
    rng = np.random.default_rng(8)
    for trial in range(3):
        plan = small["plan"].with_tasks(random_tasks(small["plan"], rng))
        assert_same(got, run_pass(lagged(), small["src"], tasks=plan,
                                  chunk_frames=int(rng.integers(7, 400)),
                                  executor=shuffled_executor(trial)))


def test_suggest_reads_the_timescales_apart_so_the_held_out_read_has_no_long_halo(
        demo_files, monkeypatch):
    import cvdesign.pipeline.suggest as pipeline

    seen = {}
    real = pipeline.run_pass

    def recording(passes, source, **kw):
        passes = passes if isinstance(passes, tuple) else (passes,)
        halo = max(p.halo(s) for p in passes for s in range(len(source.segments)))
        seen[kw.get("label")] = (halo, passes[0].featurizer.n_features)
        return real(passes if len(passes) > 1 else passes[0], source, **kw)

    monkeypatch.setattr(pipeline, "run_pass", recording)
    top, states = demo_files
    src = Source.from_states(top, {k: v[:1] for k, v in states.items()})
    res = suggest(src, n_bootstrap=0, max_terms=2, n_suggestions=2, lag=2.0)
    lags = res.report_data["cvs"][0]["timescales"]["lag_ps"]
    held, wide = seen["held-out"]
    longest, narrow = seen["timescales"]
    # without bootstrap the held-out read needs no lagged pair (with it: the main lag);
    # the timescales' read reaches the longest lag of the report (0.2 ps between frames)
    assert held == 0 and longest == round(max(lags) / 0.2) == 1000
    assert narrow <= 2 * 2 * 2 < wide  # two CVs of at most two terms (a dihedral: two)


# ----------------------------------------------------------------- bounded in size
def _two_states(directory, n_frames, seed=4):
    """Four-atom toy, one run per state: the C1-C2 distance near 0.4 nm in state A and
    0.8 nm in state B (AR(1) wiggle), the others fluctuating; 0.1 ps between frames."""
    rng = np.random.default_rng(seed)
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain(), resSeq=1)
    for name in ("C1", "C2", "C3", "C4"):
        top.add_atom(name, md.element.carbon, res)
    paths = {}
    for name, centre in (("A", 0.4), ("B", 0.8)):
        dev = np.zeros(n_frames)
        for t in range(1, n_frames):
            dev[t] = 0.8 * dev[t - 1] + rng.normal(0, 0.02)
        xyz = np.zeros((n_frames, 4, 3))
        xyz[:, 1, 0] = centre + dev
        xyz[:, 2] = [0.0, 0.5, 0.0] + rng.normal(0, 0.03, (n_frames, 3))
        xyz[:, 3] = [0.4, 0.4, 0.3] + rng.normal(0, 0.03, (n_frames, 3))
        path = directory / f"{name}.xtc"
        md.Trajectory(xyz.astype(np.float32), top,
                      time=np.arange(n_frames) * 0.1).save_xtc(str(path))
        paths[name] = [str(path)]
    pdb = directory / "toy.pdb"
    md.Trajectory(xyz[:1].astype(np.float32), top).save_pdb(str(pdb))
    return str(pdb), paths


def test_report_data_size_does_not_grow_with_the_number_of_frames(tmp_path):
    sizes, docs = [], []
    for n in (2000, 8000):  # 2x and 8x a thousand frames per run
        d = tmp_path / str(n)
        d.mkdir()
        top, states = _two_states(d, n)
        res = suggest(Source.from_states(top, states), kinds=("distance",), max_terms=2,
                      n_suggestions=2, n_bootstrap=0, lag=1.0)
        res.write(d / "out")
        sizes.append((d / "out" / "report-data.json").stat().st_size)
        docs.append(json.loads((d / "out" / "report-data.json").read_text()))
    small_doc, big_doc = docs
    for a, b in zip(small_doc["cvs"], big_doc["cvs"]):
        assert [len(t["frame"]) for t in a["traces"]] == [len(t["frame"]) for t in b["traces"]] \
            == [1000, 1000]
        assert b["traces"][0]["frame"][:3] == [0, 8, 16]  # every 8th of 8000 frames
        for doc in (a, b):  # bins from the states' spreads, at most MAX_BINS
            assert len(doc["heldout"]["edges"]) <= MAX_BINS + 1
            assert all(len(v) == 2 for v in doc["heldout"]["outside"].values())
        assert len(a["timescales"]["lag_ps"]) <= 19 and len(b["timescales"]["lag_ps"]) <= 19
        assert sum(map(sum, b["heldout"]["counts"].values())) + sum(
            map(sum, b["heldout"]["outside"].values())) == 2 * 8000  # yet every frame counted
    # four times the frames, about the same bytes (frame numbers get a digit longer)
    assert abs(sizes[1] - sizes[0]) < 0.1 * sizes[0], sizes


def test_traces_of_two_runs_of_one_file_name_are_named_by_their_paths(tmp_path):
    # both traces were named 'run.xtc': the page could not tell which run a trace was
    top, states = _two_states(tmp_path, 400)
    moved = {}
    for name, (path,) in states.items():
        (tmp_path / name).mkdir()
        moved[name] = [str(tmp_path / name / "run.xtc")]
        os.replace(path, moved[name][0])
    res = suggest(Source.from_states(top, moved), kinds=("distance",), max_terms=1,
                  n_suggestions=1, n_bootstrap=0, lag=1.0)
    names = [t["file"] for t in res.report_data["cvs"][0]["traces"]]
    assert names == [moved["A"][0], moved["B"][0]]


# ------------------------------------------------------------------ --runs and funnel
def test_tica_picture_thins_the_clustering_sample_by_rank_and_keeps_its_states(
        tmp_path, hopping_runs, monkeypatch):
    top, paths = hopping_runs(tmp_path)
    monkeypatch.setattr(explore, "MAX_REPORT_FRAMES", 1000)
    src = Source(top)
    for p in paths:
        src.add(p, "runs")
    exp = propose_states(src, lag=1.0, kinds=("distance",))
    tica = exp.report_tica
    # 3 runs of 1500 frames within 1000 points: every 5th frame (3 x 300 = 900)
    assert len(tica["coords"]) == len(tica["state"]) == 900
    assert tica["frame"] == [t for _ in paths for t in range(0, 1500, 5)]
    assert tica["files"] == [p.rsplit("/", 1)[-1] for p in paths]
    labels = [exp.labels[paths[f]][t] for f, t in zip(tica["file"], tica["frame"])]
    assert tica["state"] == labels  # the state the whole run gave that frame
    assert tica["lag_ps"] == 1.0 and len(tica["timescales_ps"]) == 2
    assert tica["timescales_ps"][0] == pytest.approx(exp.timescales_ps[0])


def test_funnel_positions_are_every_stride_th_frame_fitted_onto_the_reference(
        tmp_path, monkeypatch):
    from cvdesign.testbed.host_guest import write_host_guest

    data = write_host_guest(tmp_path, n_runs=1, n_frames=100)
    monkeypatch.setattr(funnel_mod, "MAX_POSITIONS", 30)
    src = Source(data.topology)
    src.add(data.paths[0], "bound")
    pocket = select_atoms(src.topology, data.pocket_selection)
    ligand = select_atoms(src.topology, data.ligand_selection)
    got = size_funnel_from_source(src, pocket, ligand, executor=2)
    traj = md.load(data.paths[0], top=data.topology)
    xyz = traj.xyz.astype(np.float64)
    ref = size_funnel(xyz[:, pocket], xyz[:, ligand])
    # 100 frames within 30 positions: every 4th frame (25), by both routes
    assert len(got["positions"]["z_nm"]) == len(ref["positions"]["z_nm"]) == 25
    for key in ("z_nm", "r_nm"):
        np.testing.assert_allclose(got["positions"][key], ref["positions"][key], atol=1e-9)
    # and they are the ligand centre of those frames in the restraint's frame
    d = xyz[::4][:, ligand].mean(axis=1) - xyz[::4][:, pocket].mean(axis=1)
    r_direct = np.linalg.norm(d, axis=1)
    np.testing.assert_allclose(np.hypot(got["positions"]["z_nm"], got["positions"]["r_nm"]),
                               r_direct, atol=1e-5)


def test_the_score_card_times_and_the_bootstrap_blocks_follow_the_slowest_state(tmp_path):
    """The same narrow, slow state beside a broad, fast one, through `suggest`: the score
    card gave the distance's time pooled over the states (0.55 ps, against the slow state's
    ~50-90 ps in the ranking for the same series), and the bootstrap blocks, sized from the
    card's times, were far shorter than the slow state's time."""
    import re

    rng = np.random.default_rng(8)
    n, phi = 4000, 0.98
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(3):
        top.add_atom(f"C{i + 1}", md.element.carbon, res)
    files = {}
    for state in ("broad", "narrow"):
        for r in range(2):
            x = (rng.normal(0.0, 0.1, n) if state == "broad" else
                 lfilter([1.0], [1.0, -phi], rng.normal(0.0, 0.01 * np.sqrt(1 - phi * phi), n)))
            xyz = np.zeros((n, 3, 3))
            xyz[:, 1, 0] = 1.0 + x + (0.3 if state == "narrow" else 0.0)
            xyz[:, 2, 1] = 0.5 + rng.normal(0, 0.01, n)
            path = tmp_path / f"{state}{r}.xtc"
            md.Trajectory(xyz.astype(np.float32), top, time=np.arange(n) * 1.0).save_xtc(
                str(path))
            files.setdefault(state, []).append(str(path))
    pdb = tmp_path / "top.pdb"
    md.Trajectory(np.array([[[0, 0, 0], [1, 0, 0], [0, 0.5, 0]]], np.float32), top).save_pdb(
        str(pdb))
    result = suggest(Source.from_states(str(pdb), files), kinds=("distance",), max_terms=1,
                     n_suggestions=1, n_bootstrap=20, lag=1.0)
    rank1 = result.ranking[0]
    (term,) = rank1["terms"]
    assert term["descriptor"] == "distance:1-2" and rank1["integrated_time_state"] == "narrow"
    row = next(r for r in result.scorecard if r["id"] == "distance:1-2")
    # the same series (one term, weight 1), the same time, from the same state
    assert row["integrated_time"] == pytest.approx(rank1["integrated_time_ps"], rel=1e-6)
    assert row["integrated_time"] > 20.0  # AR(1) of 0.98: 49.5 frames of 1 ps (Sokal 1997)
    # the bootstrap blocks: at least twice the longest integrated time (frames of 1 ps)
    note = next(x for x in result.notes if x.startswith("uncertainties: block bootstrap"))
    blocks = int(re.search(r"blocks of (\d+) frames", note).group(1))
    assert blocks >= 2 * row["integrated_time"]
