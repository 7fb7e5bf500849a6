"""End to end with a ranked CV of two descriptors: a dihedral (its cos and sin) and a distance.

The other end-to-end tests have ranked CVs of one descriptor each, where a mistake in
mapping a CV's terms to the pool's columns (terms in another order than the pool's, a
dihedral's second column, a weight on the wrong term) cannot show. Here an invented
six-atom toy (written below with numpy and mdtraj) has two states that only a
combination separates: a dihedral C1-C2-C3-C4 and a distance C5-C6 each overlap
strongly between the states (their state means differ by less than a within-state
standard deviation), and within each state the distance moves with ``-sin(phi -
pi/3)``, so ``sin(phi - pi/3) + 4 d56`` (linear in the dihedral's cos and sin and the
distance) separates them cleanly. The bond angles fluctuate widely, so the C1-C4
distance (a function of cos phi and the angles) is no substitute for the dihedral.

The rank-1 CV's terms are asserted (dihedral cos and sin, then the distance: pool
columns 4, 5, 1, not in pool order), then its outputs are checked against the spec's
reference evaluator on every frame: the observed per-state ranges, the traces, the
implied timescales (from a plain numpy computation of the lagged pairs), the held-out
histograms, and the same bytes from two local worker processes.
"""

import json
import math
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Source, load_spec, suggest
from cvdesign.pipeline.timing import iat_lags, integrated_time

SETTINGS = dict(n_bootstrap=0, n_suggestions=3, seed=0)
FRAME_PS = 0.5  # DCD stores no times: the source's timestep
PHI0 = math.pi / 3  # rad, the dihedral's centre in both states
#: Per-term float32 error allowance of the pipeline's features (mdtraj's float32 distances,
#: the float32 cos and sin of a dihedral) against the spec's float64 evaluation of the same
#: float32 coordinates: about 16 float32 ulps at 1.0 (2**-24 = 6e-8), our choice; the CV's
#: allowance is this times sum_t |weight_t| / scale_t.
FEATURE_TOL = 1e-6


@pytest.fixture(scope="module", autouse=True)
def _short_leaves(short_leaves_module):
    """Several leaves per file (see conftest's ``short_leaves``): the terms cross leaf and
    halo boundaries, and the two workers split the files differently from one process."""


def _write_toy(out, *, seed=11, n_runs=2, n_frames=800):
    """Write the toy: topology and ``A-k.dcd``, ``B-k.dcd``; return (topology, {state:
    [paths]}, {state: (phi, d56)}), the dihedral (rad) and distance (nm) the frames were
    built with (before the 0.001 nm noise on every coordinate)."""
    rng = np.random.default_rng(seed)
    top = md.Topology()
    rot = top.add_residue("ROT", top.add_chain(), resSeq=1)
    atoms = [top.add_atom(f"C{i + 1}", md.element.carbon, rot) for i in range(4)]
    for i in range(3):
        top.add_bond(atoms[i], atoms[i + 1])
    par = top.add_residue("PAR", top.add_chain(), resSeq=2)
    for name in ("C5", "C6"):  # unbonded: their distance is a candidate
        top.add_atom(name, md.element.carbon, par)
    bond, angle = 0.15, np.deg2rad(110.0)  # nm, rad

    def ar1(sd):  # a slow wiggle (AR(1), 0.9 per frame) of standard deviation sd
        x, v = np.empty(n_frames), rng.normal(0, sd)
        for t in range(n_frames):
            v = 0.9 * v + math.sqrt(1 - 0.81) * rng.normal(0, sd)
            x[t] = v
        return x

    files, truth = {}, {}
    for state, side in (("A", -1.0), ("B", 1.0)):
        for k in range(n_runs):
            phi = PHI0 + 0.15 * side + ar1(0.3)
            d56 = 0.6 - 0.25 * np.sin(phi - PHI0) + 0.05 * side + ar1(0.004)
            th1 = angle + rng.normal(0, 0.14, n_frames)  # bond angles, about 8 degrees
            th2 = angle + rng.normal(0, 0.14, n_frames)
            xyz = np.zeros((n_frames, 6, 3))
            xyz[:, 0, 0], xyz[:, 0, 1] = bond * np.cos(th1), bond * np.sin(th1)
            xyz[:, 2, 0] = bond
            xyz[:, 3] = np.stack([bond - bond * np.cos(th2), bond * np.sin(th2) * np.cos(phi),
                                  bond * np.sin(th2) * np.sin(phi)], axis=1)
            xyz[:, 4, 0] = 2.0  # far (> 1 nm) from the chain: no distances to it
            xyz[:, 5, 0] = 2.0 + d56
            xyz += rng.normal(0, 0.001, xyz.shape)
            path = out / f"{state}-{k + 1}.dcd"
            md.Trajectory(xyz.astype(np.float32), top).save_dcd(str(path))
            files.setdefault(state, []).append(str(path))
            old = truth.get(state, (np.zeros(0), np.zeros(0)))
            truth[state] = (np.concatenate([old[0], phi]), np.concatenate([old[1], d56]))
    return top, files, truth


def _source(top, files):
    src = Source(top, timestep=FRAME_PS)
    for state, paths in files.items():
        for p in paths:
            src.add(p, state)
    return src


def _written(result, out):
    result.write(out)
    return {p.name: p.read_bytes() for p in sorted(out.iterdir())}


@pytest.fixture(scope="module")
def toy(tmp_path_factory):
    d = tmp_path_factory.mktemp("twoterm")
    top, files, truth = _write_toy(d)
    out = d / "out"
    result = suggest(_source(top, files), **SETTINGS)
    written = _written(result, out)
    ranking = json.loads((out / "ranking.json").read_text())
    data = json.loads((out / "report-data.json").read_text())
    spec = load_spec(out / "cv-01.json")
    # the spec's reference evaluator on every frame of every run, in file order
    values = {p: spec.evaluate(md.load(p, top=top)) for paths in files.values() for p in paths}
    return dict(top=top, files=files, truth=truth, out=out, written=written, ranking=ranking,
                data=data, spec=spec, values=values, pool=result.pool)


def _tolerance(spec):
    """The float32 allowance of a CV value (see FEATURE_TOL)."""
    return FEATURE_TOL * sum(abs(t["weight"]) / t["scale"] for t in spec.terms)


def test_the_toy_separates_its_states_only_by_the_combination(toy):
    # the frames as built: each descriptor alone overlaps between the states (the state
    # means differ by less than a within-state standard deviation), the combination does
    # not (the state ranges are disjoint)
    (phi_a, d_a), (phi_b, d_b) = toy["truth"]["A"], toy["truth"]["B"]
    for a, b in ((np.sin(phi_a - PHI0), np.sin(phi_b - PHI0)), (d_a, d_b)):
        assert abs(a.mean() - b.mean()) < min(a.std(), b.std())
    comb_a, comb_b = np.sin(phi_a - PHI0) + 4 * d_a, np.sin(phi_b - PHI0) + 4 * d_b
    assert comb_a.max() < comb_b.min()


def test_rank_1_cv_is_the_dihedral_and_the_distance_not_in_pool_order(toy):
    spec, ranking = toy["spec"], toy["ranking"]["ranking"]
    assert [(t["descriptor"], t["transform"]) for t in spec.terms] == [
        ("dihedral:0-1-2-3", "cos"), ("dihedral:0-1-2-3", "sin"),
        ("distance:4-5", "identity")]
    # both columns of the dihedral and the distance carry weight (a mistake in any of them
    # moves the CV by far more than the float32 allowance)
    assert all(abs(t["weight"]) > 0.1 for t in spec.terms)
    # the pool's columns: distances 0-3, 4-5, two angles, the dihedral's cos and sin, so the
    # terms are columns 4, 5, 1; the lower ranks bring the C1-C4 distance (column 0) into
    # the report's reads, so the CVs' columns there are not the pool's either
    pool = toy["pool"]
    ids = [d.id for d in pool.descriptors]
    assert ids == ["distance:0-3", "distance:4-5", "angle:0-1-2", "angle:1-2-3",
                   "dihedral:0-1-2-3"]
    assert np.concatenate([pool.features_of([ids.index(i)]) for i in
                           ("dihedral:0-1-2-3", "distance:4-5")]).tolist() == [4, 5, 1]
    labels = [[t["descriptor"] for t in r["terms"]] for r in ranking]
    assert "distance:0-3" in {d for r in labels[1:] for d in r}
    # the CV separates the states, each alone does not (held-out overlaps)
    assert ranking[0]["heldout_overlap"] < 0.01
    singles = [r for r in ranking if len({t["descriptor"] for t in r["terms"]}) == 1]
    assert singles and all(r["heldout_overlap"] > 0.3 for r in singles)


def test_observed_ranges_and_state_statistics_are_the_spec_evaluators_on_every_frame(toy):
    # min and max come from ProjectionRangePass (the held-out read), mean and std from the
    # fold moments: two more mappings of the terms to columns. A per-frame error of at most
    # tol moves each of them by at most tol (the std included: |std(v + e) - std(v)| <=
    # std(e)).
    spec, files, values = toy["spec"], toy["files"], toy["values"]
    tol = _tolerance(spec)
    entry = toy["ranking"]["ranking"][0]
    for state, paths in files.items():
        v = np.concatenate([values[p] for p in paths])
        for where in (spec.states[state], entry["states"][state]):
            assert where["min"] == pytest.approx(v.min(), abs=tol), state
            assert where["max"] == pytest.approx(v.max(), abs=tol), state
            assert where["mean"] == pytest.approx(v.mean(), abs=tol), state
            assert where["std"] == pytest.approx(v.std(), abs=tol), state  # biased, / n
            assert where["n_frames"] == v.size
    every = np.concatenate(list(values.values()))
    assert spec.observed_range == pytest.approx((every.min(), every.max()), abs=tol)
    assert entry["observed_range"] == {"lower": spec.observed_range[0],
                                       "upper": spec.observed_range[1]}
    # disjoint: the states do not overlap along the CV
    assert spec.states["A"]["max"] < spec.states["B"]["min"]


def test_reachable_range_of_the_two_descriptors_is_their_closed_form(toy):
    # per descriptor: the dihedral's a cos + b sin reaches -+hypot(a, b); the distance
    # (weight > 0) reaches its lower bound at 0 nm and is unbounded above
    (cos_t, sin_t, dist_t) = toy["spec"].terms
    a, b = cos_t["weight"] / cos_t["scale"], sin_t["weight"] / sin_t["scale"]
    const = -a * cos_t["center"] - b * sin_t["center"]
    c = dist_t["weight"] / dist_t["scale"]
    assert c > 0
    low, high = toy["spec"].reachable_range
    assert high is None
    assert low == pytest.approx(const - math.hypot(a, b) + c * (0.0 - dist_t["center"]),
                                rel=1e-12)


def test_report_traces_are_the_spec_evaluator_on_the_traced_frames(toy):
    cv = toy["data"]["cvs"][0]
    by_name = {Path(p).name: p for p in toy["values"]}
    tol = _tolerance(toy["spec"])
    assert sorted(tr["file"] for tr in cv["traces"]) == sorted(by_name)
    for tr in cv["traces"]:
        ref = toy["values"][by_name[tr["file"]]][tr["frame"]]
        assert tr["frame"] == list(range(800))  # 800 frames: every one is traced
        np.testing.assert_allclose(tr["value"], ref, rtol=0, atol=tol)


def _direct_timescale(runs, lag, dt):
    """``-lag dt / ln rho``: rho the reversible lagged autocorrelation of the pairs (t, t +
    lag) within each run, all runs about their common mean (as docs/report-data-v1.md
    describes); None when rho is not in (0, 1)."""
    x = np.concatenate([v[:-lag] for v in runs])
    y = np.concatenate([v[lag:] for v in runs])
    m = 0.5 * (x.mean() + y.mean())
    var0 = 0.5 * (np.mean(x * x) + np.mean(y * y)) - m * m
    rho = (np.mean(x * y) - m * m) / var0
    return -lag * dt / math.log(rho) if 0.0 < rho < 1.0 else None


def test_implied_timescales_are_a_direct_computation_on_the_evaluated_runs(toy):
    ts = toy["data"]["cvs"][0]["timescales"]
    runs = list(toy["values"].values())
    assert len(ts["lag_ps"]) >= 3
    for lag_ps, got in zip(ts["lag_ps"], ts["timescale_ps"]):
        lag = round(lag_ps / FRAME_PS)
        assert lag * FRAME_PS == lag_ps
        ref = _direct_timescale(runs, lag, FRAME_PS)
        if ref is None:
            assert got is None, lag
            continue
        # the states are far apart along the CV and every run stays in one, so rho is near 1
        # and the timescale amplifies rho's float32 error by 1 / (1 - rho): relative 1e-5
        # leaves room for that (seen: below 4e-7) and is far below what a term on the wrong
        # column changes
        assert got == pytest.approx(ref, rel=1e-5), lag


def _within_runs(runs, lag):
    """The reversible lagged autocorrelation with each run about its own mean, the runs
    weighted by their pairs (as docs/report-data-v1.md and docs/ranking-v1.md describe)."""
    c0 = ct = 0.0
    for v in runs:
        x, y = v[:-lag], v[lag:]
        m = 0.5 * (x.mean() + y.mean())
        c0 += x.size * (0.5 * (np.mean(x * x) + np.mean(y * y)) - m * m)
        ct += x.size * (np.mean(x * y) - m * m)
    return ct / c0


def test_implied_timescales_within_states_are_a_direct_computation_on_the_evaluated_runs(
        toy):
    """The report's second curve: each run about its own mean (reversible, the runs
    weighted by their pairs), the relaxation inside the states."""
    ts = toy["data"]["cvs"][0]["timescales"]
    runs = list(toy["values"].values())
    got_any = False
    for lag_ps, got in zip(ts["lag_ps"], ts["timescale_within_runs_ps"]):
        lag = round(lag_ps / FRAME_PS)
        rho = _within_runs(runs, lag)
        if not 0.0 < rho < 1.0:
            assert got is None, lag
            continue
        got_any = True
        # rho is far from 1 here (the CV relaxes within a few frames in a state), so the
        # float32 features move the timescale by about their relative error
        assert got == pytest.approx(-lag * FRAME_PS / math.log(rho), rel=1e-4), lag
    assert got_any
    # at the shortest lag, the CV relaxes inside the states far faster than the pooled
    # curve, which the offset between the states keeps correlated, says
    assert ts["timescale_within_runs_ps"][0] < ts["timescale_ps"][0] / 10


def test_integrated_time_is_the_cvs_own_from_a_direct_computation_on_the_evaluated_runs(
        toy):
    """``integrated_time_ps`` of a ranked CV is the CV's own (not its slowest term's):
    Sokal's estimator on the autocorrelation within runs (each run about its own mean,
    reversible, the runs weighted by their pairs) on the descriptors' grid of lags, in the
    state where it is longest, computed here with numpy from the spec's evaluator on every
    frame."""
    entry = toy["ranking"]["ranking"][0]
    runs = list(toy["values"].values())
    grid = iat_lags(np.array([[v.size] for v in runs]))
    by_state = {}
    for state, paths in toy["files"].items():
        rho = [_within_runs([toy["values"][p] for p in paths], lag) for lag in grid]
        by_state[state] = integrated_time(grid, np.array(rho)[:, None], FRAME_PS)
    slowest = max(by_state, key=lambda s: float(by_state[s][0][0]))
    tau, decayed = by_state[slowest]
    assert entry["integrated_time_state"] == slowest
    assert entry["frame_spacing_ps"] == FRAME_PS
    assert entry["integrated_time_decayed"] is bool(decayed[0]) is True
    # float32 features against the evaluator's float64: rho differs by about 1e-6
    assert entry["integrated_time_ps"] == pytest.approx(float(tau[0]), rel=1e-4)
    lo, hi = entry["integrated_time_ci_ps"]
    assert lo < entry["integrated_time_ps"] < hi
    spec = json.loads((toy["out"] / "cv-01.json").read_text())
    assert spec["scores"]["integrated_time_ps"] == entry["integrated_time_ps"]
    assert spec["scores"]["frame_spacing_ps"] == FRAME_PS
    assert spec["scores"]["integrated_time_decayed"] == 1


def test_held_out_histograms_hold_every_frame_near_the_evaluators_histogram(toy):
    # CVReportPass bins each frame of fold k along the direction fitted without fold k, mapped
    # to CV units by the training states' means (report_data.affine_to_cv_units): not the
    # spec's direction, so its counts differ from the evaluator's histogram by what the
    # folds' directions differ. Checked: every frame of a state is counted once (in the bins
    # or outside them), the held-out mean lies within half a bin of the evaluated mean, and
    # the two histograms on the same bins differ by at most 0.1 of the frames (total
    # variation; our bounds: seen 0.01 of a bin and 0.02 of the frames); a term on a wrong
    # column, even in one fold, moves far more.
    cv = toy["data"]["cvs"][0]
    edges = np.array(cv["heldout"]["edges"])
    centres, width = 0.5 * (edges[1:] + edges[:-1]), edges[1] - edges[0]
    for state, paths in toy["files"].items():
        v = np.concatenate([toy["values"][p] for p in paths])
        held = np.array(cv["heldout"]["counts"][state], dtype=float)
        assert held.sum() + sum(cv["heldout"]["outside"][state]) == v.size
        assert sum(cv["heldout"]["outside"][state]) == 0
        ref, _ = np.histogram(v, bins=edges)
        assert ref.sum() == v.size
        assert abs(held @ centres / held.sum() - v.mean()) < 0.5 * width, state
        assert 0.5 * np.abs(held - ref).sum() / v.size < 0.1, state


def test_two_local_processes_write_the_bytes_of_the_serial_run(toy, tmp_path):
    got = _written(suggest(_source(toy["top"], toy["files"]), executor=2, **SETTINGS),
                   tmp_path / "out")
    assert {"cv-01.json", "ranking.json", "report-data.json"} <= got.keys()
    assert got == toy["written"]


@pytest.mark.parametrize("method", ["hlda", "lda"])
def test_with_objective_separate_the_heldout_score_is_the_heldout_fisher_ratio(toy, method):
    # the same quantity from the same computation: equal to the last bit (the ratio had
    # come from a one-at-a-time refit of the fold directions, the score from the
    # searches' stacked fits, and the two differed in the last bits)
    result = suggest(_source(toy["top"], toy["files"]), objective="separate", method=method,
                     n_bootstrap=0, n_suggestions=5, seed=0)
    assert len(result.ranking) == 5
    for row in result.ranking:
        assert row["heldout_fisher_ratio"] == row["heldout_score"]
        assert row["heldout_fisher_ratio_se"] == row["heldout_score_se"]
