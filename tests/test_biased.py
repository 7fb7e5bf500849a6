"""Biased runs as input (issue 12, item 4): bias-energy files, weights, rescaled time.

* the bias-energy file format and its refusals (file and line named, nothing written);
* weights: normalized over every file of a state with one constant, Kish effective sample
  size; integer multiplicities equal the statistics of the repeated frames (moments, lagged
  moments, histograms, and through the pass engine);
* the pass engine on biased runs: identical bytes for any task split, chunk size and order
  of arrival, and a direct per-frame reference for the weighted statistics and the pairs in
  rescaled time;
* exact answers: reweighting i.i.d. samples of a biased double well recovers the unbiased
  populations and well means; the rescaled-time TICA timescale of biased runs matches that
  of unbiased runs (and the plain one does not);
* the pipeline and the command: notes, a zero bias giving the unbiased results.
"""

import json
import math
import re
import tempfile
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cvdesign import TICA, InputError, Source, Spec, suggest
from cvdesign.bias.hints import spec_hints
from cvdesign.cli import main
from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.io.bias import kish_ess, read_bias_file
from cvdesign.parallel import ProcessExecutor
from cvdesign.passes import (BlockPass, CardPass, CoordinateFeaturizer, FoldMomentsPass,
                             HistogramPass, LaggedPass, LagGridPass, ScreeningPass, plan_tasks,
                             reference_features, run_pass)
from cvdesign.score.univariate import Histograms, bin_counts
from cvdesign.stats.moments import (DiagonalLaggedMoments, DiagonalMoments, LaggedMoments, Moments,
                                    merge_all)
from cvdesign.testbed.wells import DoubleWell, write_well_runs

KT = BOLTZMANN_KJ_MOL_K * 300.0
ATOMS = np.array([0, 2])
N_BINS = 6


def _topology(n_atoms=3):
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(n_atoms):
        top.add_atom(f"C{i}", md.element.carbon, res)
    return top


def _write_dcd(path, xyz):
    md.Trajectory(np.asarray(xyz, dtype=np.float32), _topology(xyz.shape[1])).save(str(path))
    return str(path)


def _write_bias(path, values, header="bias"):
    text = "# bias energies, kJ/mol\n" + (f"{header}\n" if header else "")
    Path(path).write_text(text + "".join(f"{float(v)!r}\n" for v in values))
    return str(path)


# ---------------------------------------------------------------------------- the file format
def test_bias_file_reads_one_column_or_the_named_or_chosen_column(tmp_path):
    one = tmp_path / "one.txt"
    one.write_text("# from the engine\n\n1.5\n-2.0\n 3e-1 \n")
    csv = tmp_path / "two.csv"
    csv.write_text("time_ps, Bias\n0.0, 1.0\n0.2, 2.5\n")
    cols = tmp_path / "cols.dat"
    cols.write_text("t v other\n0 4.0 9\n1 5.0 9\n")
    assert read_bias_file(one).tolist() == [1.5, -2.0, 0.3]
    assert read_bias_file(csv).tolist() == [1.0, 2.5]  # the column named 'bias' (any case)
    assert read_bias_file(cols, "v").tolist() == [4.0, 5.0]
    assert read_bias_file(cols, 3).tolist() == [9.0, 9.0]


@pytest.mark.parametrize("text, column, message", [
    (None, None, r"bias-energy file '.*b\.txt' does not exist; check the path"),
    ("# nothing\n\n", None, r"'.*b\.txt' holds no values \(only blank or comment lines\)"),
    ("bias\n", None, r"'.*b\.txt' holds a header line and no values"),
    ("1.0\n2.0\nabc\n", None, r"'.*b\.txt', line 3, column 1: 'abc' is not a number"),
    ("1.0\nnan\n", None, r"'.*b\.txt', line 2: bias energy 'nan' is not a finite number"),
    ("bias\n1.0\n-inf\n", None, r"'.*b\.txt', line 3: bias energy '-inf' is not a finite"),
    ("a,bias\n1,2\n3\n", None, r"'.*b\.txt', line 3: 1 column, but the header has 2"),
    ("t v\n0 1\n", None, r"'.*b\.txt' has 2 columns and none named 'bias' \('t', 'v'\); say "
                         r"which column .*--bias-column"),
    ("0 1\n1 2\n", None, r"'.*b\.txt' has 2 columns and no header line naming a 'bias' column"),
    ("t v\n0 1\n", "w", r"'.*b\.txt' has no column named 'w'; its columns are \('t', 'v'\)"),
    ("0 1\n1 2\n", 3, r"bias column 3 of bias-energy file '.*b\.txt' does not exist: the file "
                      r"has 2 columns"),
    ("0 1\n1 2\n", "v", r"bias column 'v' names a column, but bias-energy file '.*b\.txt' has "
                        r"no header line"),
])
def test_bad_bias_files_are_refused_naming_file_and_line(tmp_path, text, column, message):
    path = tmp_path / "b.txt"
    if text is not None:
        path.write_text(text)
    before = sorted(p.name for p in tmp_path.iterdir())
    with pytest.raises(InputError, match=message):
        read_bias_file(path, column)
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_a_binary_bias_file_is_refused(tmp_path):
    path = tmp_path / "b.bin"
    path.write_bytes(b"\x00\xff\xfe" * 10)
    with pytest.raises(InputError, match=r"'.*b\.bin' is not UTF-8 text"):
        read_bias_file(path)


def test_source_refuses_a_bias_file_of_another_length_and_one_without_temperature(tmp_path):
    traj = _write_dcd(tmp_path / "run.dcd", np.zeros((5, 3, 3)))
    top = _topology()
    short = _write_bias(tmp_path / "run.bias", np.zeros(4))
    with pytest.raises(InputError, match=r"bias-energy file '.*run\.bias' holds 4 bias energies, "
                                         r"but trajectory '.*run\.dcd' has 5 frames"):
        Source(top, temperature=300.0).add(traj, "a", bias=short)
    good = _write_bias(tmp_path / "good.bias", np.zeros(5))
    with pytest.raises(InputError, match=r"needs the temperature of the biased run: give "
                                         r"temperature=K to Source"):
        Source(top).add(traj, "a", bias=good)
    with pytest.raises(InputError, match=r"temperature=-1 must be a positive temperature in K"):
        Source(top, temperature=-1)


def test_a_state_mixing_biased_and_unbiased_runs_combines_the_groups_by_their_sample_sizes(
        tmp_path):
    """State 's': two biased files (one reference) and an unbiased one; 't': unbiased only;
    'u': biased only. The biased group keeps its relative weights exp(V/kT), each group's
    share of the state is its Kish effective size over the sum (Kish, Survey Sampling, Wiley,
    1965), the state's weights average 1, and the other states keep the weights (bytes) they
    have without the mixed state."""
    rng = np.random.default_rng(8)
    top = _topology()
    src = Source(top, temperature=300.0)
    alone = Source(top, temperature=300.0)
    v = {}
    for name, n, state, biased in (("a", 7, "s", True), ("b", 5, "s", True),
                                   ("c", 9, "s", False), ("d", 4, "t", False),
                                   ("e", 6, "u", True)):
        traj = _write_dcd(tmp_path / f"{name}.dcd", rng.normal(size=(n, 3, 3)))
        v[name] = rng.normal(0.0, 2.0 * KT, n)
        bias = _write_bias(tmp_path / f"{name}.bias", v[name]) if biased else None
        src.add(traj, state, bias=bias, frames=(1, None) if name == "c" else None)
        if name == "e":
            alone.add(traj, state, bias=bias)
    rw = src.reweighting()
    a = np.concatenate([v["a"], v["b"]]) / KT
    wb = np.exp(a - a.max())
    e_b = kish_ess(wb)
    n_u = 8  # frames 1..8 of c
    got_b = np.concatenate([rw.weights[0], rw.weights[1]])
    np.testing.assert_allclose(got_b / got_b.sum(), wb / wb.sum(), rtol=1e-12)
    assert got_b.sum() == pytest.approx(20 * e_b / (e_b + n_u), rel=1e-12)
    assert rw.weights[2][0] == 0.0  # outside the frame range
    np.testing.assert_allclose(rw.weights[2][1:], 20 / (e_b + n_u), rtol=1e-12)
    assert got_b.sum() + rw.weights[2].sum() == pytest.approx(20.0, rel=1e-12)
    assert rw.ess[0] == pytest.approx(kish_ess(np.concatenate([got_b, rw.weights[2]])),
                                      rel=1e-12) == pytest.approx(e_b + n_u, rel=1e-12)
    assert rw.frames.tolist() == [20, 0, 6]
    assert rw.groups == {0: {"biased": (12, pytest.approx(e_b)), "unbiased": (8, 8.0)}}
    assert 3 not in rw.weights  # 't' has no biased run: no weights, unweighted statistics
    np.testing.assert_array_equal(rw.weights[4], alone.reweighting().weights[0])
    layouts = plan_tasks(src).layouts
    assert layouts[2].weight is not None and layouts[2].clock is None  # c keeps its own clock
    assert layouts[3].weight is None and layouts[0].clock is not None
    notes, _ = rw.describe()
    text = "\n".join(notes)
    assert "two groups are normalized apart and combined in proportion to their effective " \
        "sample sizes" in text
    assert (f"effective sample size (Kish) of state 's': {e_b + n_u:.1f} of 20 frames "
            f"({(e_b + n_u) / 20:.1%}): biased runs {e_b:.1f} of 12 frames, unbiased runs 8 of 8 "
            "frames") in text


def test_states_without_a_mix_keep_their_bytes_next_to_a_mixed_state(tmp_path, assert_same):
    """An unbiased-only state keeps the unweighted arithmetic (the bytes of a source without
    any biased run) and a biased-only state the weights it has alone, whatever other state
    mixes biased and unbiased runs."""
    rng = np.random.default_rng(12)
    files = {}
    for name, n in (("t1", 23), ("t2", 17), ("u", 19), ("m1", 11), ("m2", 13)):
        files[name] = _write_dcd(tmp_path / f"{name}.dcd", rng.normal(2.0, 0.5, (n, 3, 3)))
        _write_bias(tmp_path / f"{name}.bias", rng.normal(0.0, 2.0 * KT, n))
    bias = {k: str(tmp_path / f"{k}.bias") for k in files}
    full = Source(_topology(), temperature=300.0)
    full.add(files["t1"], "t")
    full.add(files["u"], "u", bias=bias["u"])
    full.add(files["m1"], "m", bias=bias["m1"])
    full.add(files["t2"], "t")
    full.add(files["m2"], "m")
    plain, alone = Source(_topology()), Source(_topology(), temperature=300.0)
    plain.add(files["t1"], "t").add(files["t2"], "t")
    alone.add(files["u"], "u", bias=bias["u"])
    assert set(full.reweighting().groups) == {full.states.index("m")}
    np.testing.assert_array_equal(full.reweighting().weights[1], alone.reweighting().weights[0])
    f = CoordinateFeaturizer(ATOMS)
    results = {}
    for name, src in (("full", full), ("plain", plain), ("alone", alone)):
        results[name] = run_pass(FoldMomentsPass(f, center=np.full(6, 2.0)), src,
                                 tasks=plan_tasks(src, leaf_frames=8))
    assert_same(results["full"][full.states.index("t")], results["plain"][0])
    assert_same(results["full"][full.states.index("u")], results["alone"][0])


def test_a_mixed_state_reweighted_recovers_the_exact_well_mean_and_variance(tmp_path):
    """The left well (x < 0) sampled twice: i.i.d. samples of exp(-(U + V)/kT) with their
    bias energies and i.i.d. samples of exp(-U/kT) without; one state of both files. Its
    weighted mean and variance of x, from the pass engine, match those of exp(-U/kT) on x < 0
    by quadrature (scipy.integrate.quad) within four standard errors (delta method for the
    ratio estimators, Kish 1965 for the weights); the unweighted pool is far off."""
    from scipy.integrate import quad

    well = DoubleWell()
    xb = well.samples(20_000, biased=True, seed=31)
    xu = well.samples(8_000, biased=False, seed=32)
    pdb, (tb,), (bb,) = write_well_runs(tmp_path, xb[None, :], frame_step_ps=1.0, well=well,
                                        prefix="b")
    _, (tu,), _ = write_well_runs(tmp_path, xu[None, :], frame_step_ps=1.0, prefix="u")
    src = Source(str(pdb), temperature=well.temperature)
    xs = []
    for t, b in ((tb, bb), (tu, None)):
        x = md.load(str(t), top=str(pdb)).xyz[:, 1, 0].astype(np.float64)
        src.add_labelled(str(t), np.where(x < 0, "left", None), bias=None if b is None
                         else str(b))
        xs.append(x)
    rw = src.reweighting()
    assert set(rw.groups[0]) == {"biased", "unbiased"}
    w = np.concatenate([rw.weights[0], rw.weights[1]])
    x = np.concatenate(xs)
    sel = np.concatenate([xs[0] < 0, xs[1] < 0])
    w, x = w[sel], x[sel]
    m = float(w @ x / w.sum())
    var = float(w @ (x - m) ** 2 / w.sum())
    se_m = math.sqrt(np.sum(w**2 * (x - m) ** 2)) / w.sum()
    se_v = math.sqrt(np.sum(w**2 * ((x - m) ** 2 - var) ** 2)) / w.sum()
    got = run_pass(FoldMomentsPass(CoordinateFeaturizer([1]), columns=[0]), src)[0][0]
    assert got.mean[0] == pytest.approx(m, rel=1e-9)
    assert got.covariance[0, 0] == pytest.approx(var, rel=1e-9)
    dens = lambda y: math.exp(-float(well.potential(np.array([y]))[0]) / well.kt)  # noqa: E731
    z = quad(dens, -3.0, 0.0, epsrel=1e-12)[0]
    mu = quad(lambda y: y * dens(y), -3.0, 0.0, epsrel=1e-12)[0] / z
    sigma2 = quad(lambda y: (y - mu) ** 2 * dens(y), -3.0, 0.0, epsrel=1e-12)[0] / z
    assert abs(m - mu) < 4 * se_m + 5e-4, (m, mu, se_m)  # XTC stores x to 1e-3 nm
    assert abs(var - sigma2) < 4 * se_v + 1e-5, (var, sigma2, se_v)
    assert abs(x.var() - sigma2) > 10 * se_v  # without the weights the variance is far off


# ---------------------------------------------------------------------------- weights
def test_weights_are_normalized_over_every_file_of_a_state_with_one_constant(tmp_path):
    rng = np.random.default_rng(3)
    top = _topology()
    src = Source(top, temperature=300.0)
    energies = {}
    for name, n, shift in (("a", 7, 0.0), ("b", 5, 40.0), ("c", 6, -900.0)):
        traj = _write_dcd(tmp_path / f"{name}.dcd", np.zeros((n, 3, 3)))
        v = rng.normal(shift, 3.0, n)  # 'b' far above 'a'; 'c' would underflow exp(V/kT)
        energies[name] = v
        src.add(traj, "s" if name != "c" else "t", bias=_write_bias(tmp_path / f"{name}.bias", v))
    rw = src.reweighting()
    # state 's' (files a, b): w = N exp(V/kT) / sum exp(V/kT) over both files
    a = np.concatenate([energies["a"], energies["b"]]) / KT
    want = a.size * np.exp(a - a.max()) / np.exp(a - a.max()).sum()
    np.testing.assert_allclose(np.concatenate([rw.weights[0], rw.weights[1]]), want, rtol=1e-12)
    assert rw.weights[1].sum() > 100 * rw.weights[0].sum()  # the higher bias weighs more
    # state 't' alone: its own constant, so no underflow; weights average 1
    c = energies["c"] / KT
    np.testing.assert_allclose(rw.weights[2], c.size * np.exp(c - c.max()) /
                               np.exp(c - c.max()).sum(), rtol=1e-12)
    assert rw.ess[0] == pytest.approx(kish_ess(want)) and rw.frames.tolist() == [12, 6]
    assert rw.populations() is None  # no biased file holds two states


def test_kish_effective_sample_size_of_equal_and_of_concentrated_weights():
    # Kish (Survey Sampling, Wiley, 1965): (sum w)^2 / sum w^2
    assert kish_ess(np.full(50, 3.0)) == pytest.approx(50.0)
    assert kish_ess([1.0, 1.0, 2.0]) == pytest.approx(16.0 / 6.0)
    assert kish_ess(np.array([1e300, 1e300])) == pytest.approx(2.0)  # no overflow
    assert kish_ess([0.0, 0.0]) == 0.0


def test_integer_weights_give_the_moments_of_the_repeated_frames():
    rng = np.random.default_rng(11)
    x = rng.normal(size=(40, 3))
    m = rng.integers(0, 4, size=40)
    rep = np.repeat(x, m, axis=0)
    for cls in (Moments, DiagonalMoments):
        a, b = cls.from_data(x, m), cls.from_data(rep)
        assert a.count == b.count
        np.testing.assert_allclose(a.mean, b.mean, rtol=1e-12)
        np.testing.assert_allclose(a.scatter if cls is Moments else a.m2,
                                   b.scatter if cls is Moments else b.m2, rtol=1e-11)
    np.testing.assert_array_equal(DiagonalMoments.from_data(x, m).minimum, rep.min(axis=0))
    # lagged pairs: a pair weighs as its first frame
    x0, xt = x[:-2], x[2:]
    w = m[:-2]
    for cls in (LaggedMoments, DiagonalLaggedMoments):
        a = cls(3, shift=x.mean(axis=0)).add_pairs(x0, xt, w)
        b = cls(3, shift=x.mean(axis=0)).add_pairs(np.repeat(x0, w, axis=0),
                                                   np.repeat(xt, w, axis=0))
        assert a.count == b.count
        for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
            np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-11)
    # histograms
    states = rng.integers(0, 2, size=40)
    lo, hi = x.min(axis=0), x.max(axis=0)
    h = Histograms(lo, hi, n_states=2, n_bins=N_BINS)
    h.add(x, states, m.astype(float))
    np.testing.assert_array_equal(
        h.counts, bin_counts(rep, lo, hi, N_BINS, np.repeat(states, m), 2))


def test_integer_multiplicities_through_the_pass_engine_equal_the_repeated_frames(tmp_path):
    """V = kT ln(m) reweights each frame m times: the weighted statistics of the run equal
    those of the run with each frame repeated m times (weights are normalized per state, so
    means, covariances and normalized histograms agree; counts are scaled)."""
    rng = np.random.default_rng(5)
    top = _topology()
    xyz = rng.normal(2.0, 0.5, size=(60, 3, 3))
    mult = rng.integers(1, 5, size=60)
    rep = np.repeat(xyz, mult, axis=0)
    biased = Source(top, temperature=300.0)
    biased.add(_write_dcd(tmp_path / "b.dcd", xyz), "a",
               bias=_write_bias(tmp_path / "b.bias", KT * np.log(mult)))
    repeated = Source(top)
    repeated.add(_write_dcd(tmp_path / "r.dcd", rep), "a")
    f = CoordinateFeaturizer(ATOMS)
    lo, hi = np.full(6, 0.5), np.full(6, 3.5)
    results = []
    for src in (biased, repeated):
        results.append(run_pass((FoldMomentsPass(f), ScreeningPass(f),
                                 HistogramPass(f, lo, hi, n_bins=N_BINS)), src,
                                tasks=plan_tasks(src, leaf_frames=16, n_tasks=3)))
    (fm_b, sc_b, h_b), (fm_r, sc_r, h_r) = results
    mb, mr = fm_b[0][0], fm_r[0][0]
    assert mb.count == pytest.approx(60.0) and mr.count == mult.sum()
    np.testing.assert_allclose(mb.mean, mr.mean, rtol=1e-12)
    np.testing.assert_allclose(mb.covariance, mr.covariance, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(sc_b.diagonal[0].variance, sc_r.diagonal[0].variance,
                               rtol=1e-10)
    np.testing.assert_allclose(h_b.counts / h_b.counts.sum(axis=2, keepdims=True),
                               h_r.counts / h_r.counts.sum(axis=2, keepdims=True), rtol=1e-12)
    assert sc_b.segment_counts.tolist() == [[60]]  # frames stay frames


# ---------------------------------------------------------------------------- the engine
SETTINGS = settings(max_examples=25, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow])


@st.composite
def biased_scenarios(draw):
    segments = []
    for _ in range(draw(st.integers(1, 3))):
        n = draw(st.integers(2, 40))
        if draw(st.booleans()):
            labels = draw(st.lists(st.sampled_from([None, "a", "b"]), min_size=n, max_size=n))
            if all(x is None for x in labels):
                labels[0] = "a"
            segments.append({"n": n, "labels": labels})
        else:
            start = draw(st.integers(0, n - 1))
            stop = draw(st.integers(start + 1, n + 3))
            segments.append({"n": n, "state": draw(st.sampled_from(["a", "b"])),
                             "start": start, "stop": stop})
    for seg in segments[1:]:  # unbiased runs too, also in states with biased ones
        seg["unbiased"] = draw(st.booleans())
    return {"segments": segments, "leaf": draw(st.integers(1, 9)),
            "lag": draw(st.integers(1, 6)), "chunk": draw(st.integers(1, 13)),
            "spread": draw(st.sampled_from([0.5, 2.0, 6.0])),  # bias spread, kT
            "block": draw(st.one_of(st.none(), st.integers(1, 6))),
            "seed": draw(st.integers(0, 2**31 - 1))}


def _build_biased(sc, tmp):
    rng = np.random.default_rng(sc["seed"])
    src = Source(_topology(), temperature=300.0)
    data = []
    for i, seg in enumerate(sc["segments"]):
        xyz = rng.normal(2.0, 0.5, size=(seg["n"], 3, 3))
        path = _write_dcd(Path(tmp) / f"s{i}.dcd", xyz)
        v = KT * sc["spread"] * rng.normal(size=seg["n"])
        bias = _write_bias(Path(tmp) / f"s{i}.bias", v, header=None if i % 2 else "bias")
        if seg.get("unbiased"):
            v, bias = None, None
        if "labels" in seg:
            src.add_labelled(path, seg["labels"], bias=bias)
        else:
            src.add(path, seg["state"], frames=(seg["start"], seg["stop"]), bias=bias)
        x = md.load(path, top=_topology()).xyz[:, ATOMS].reshape(seg["n"], -1).astype(float)
        data.append((x, v))
    out = []  # state codes in the source's order of states (first appearance)
    for seg, (x, v) in zip(sc["segments"], data):
        if "labels" in seg:
            codes = np.array([-1 if s is None else src.states.index(s) for s in seg["labels"]])
            hi = seg["n"]
        else:
            codes = np.full(seg["n"], -1)
            hi = min(seg["stop"], seg["n"])
            codes[seg["start"]:hi] = src.states.index(seg["state"])
        out.append((codes, x, v, hi))
    return src, out


def _card_sums(z, key, weights=None):
    """Block sums of the tests (module level: it pickles); weighted when weights are given."""
    w = np.ones(z.shape[0]) if weights is None else weights
    return {"n": np.array([w.sum()]), "s1": w @ z}


def _biased_passes(sc, featurizer, shift):
    lo, hi = np.full(6, 0.5), np.full(6, 3.5)
    return (FoldMomentsPass(featurizer),
            LaggedPass(featurizer, sc["lag"], shift=shift),
            HistogramPass(featurizer, lo, hi, n_bins=N_BINS),
            LagGridPass(featurizer, (1, 3), shift=shift[[2, 5]], columns=[2, 5]),
            ScreeningPass(featurizer, lags=sc["lag"], shift=shift),
            BlockPass(featurizer, block_frames=sc["block"], lags=sc["lag"], lag_shift=shift,
                      pairs_within_block=False, sums=_card_sums),
            CardPass(featurizer, center=shift, low=lo, high=hi, n_bins=N_BINS,
                     block_frames=sc["block"], lags=sc["lag"]))


def _direct_partner(clock, codes, t, lag, hi):
    """The second frame of t's pair in rescaled time, found frame by frame (None: no pair):
    of the frames of the segment's range after t, up to the first whose clock reaches
    clock[t] + lag, the closest to it (a tie goes to the later one); a pair only when every
    frame from t to it is in t's state."""
    target = clock[t] + lag
    for u in range(t + 1, hi):
        if clock[u] >= target:
            if u - 1 > t and target - clock[u - 1] < clock[u] - target:
                u = u - 1
            return u if np.all(codes[t:u + 1] == codes[t]) else None
    return None


def _check_biased_direct(sc, src, data, results, shift):
    fold_m, lagged, hist, grid, screen, blocks, card = results
    rw = src.reweighting()
    rows = {0: [], 1: []}
    pairs = {}
    for si, (codes, x, v, hi) in enumerate(data):
        w = rw.weights.get(si, np.ones(codes.size))  # unbiased states: no weights
        # each file its own clock: rescaled in a biased run, its own frames in an unbiased one
        clock = (np.arange(codes.size + 1.0) if v is None else
                 np.concatenate([[0.0], np.cumsum(np.exp(v / KT))]))
        for t in np.flatnonzero(codes >= 0):
            rows[int(codes[t])].append((w[t], x[t]))
            u = _direct_partner(clock, codes, t, sc["lag"], hi)
            if u is not None:
                pairs.setdefault((si, int(codes[t]), 0), []).append((w[t], x[t], x[u]))
    for s in (0, 1):
        if not rows[s]:
            assert fold_m[s][0].count == 0 if s < len(fold_m) else True
            continue
        ws = np.array([a for a, _ in rows[s]])
        X = np.array([b for _, b in rows[s]])
        m = fold_m[s][0]
        assert m.count == pytest.approx(ws.sum(), rel=1e-12) == pytest.approx(X.shape[0])
        mean = ws @ X / ws.sum()
        np.testing.assert_allclose(m.mean, mean, rtol=1e-12)
        np.testing.assert_allclose(m.scatter, (X - mean).T @ ((X - mean) * ws[:, None]),
                                   rtol=1e-10, atol=1e-12)
        b = np.clip(np.floor((X - 0.5) / 3.0 * N_BINS).astype(int), 0, N_BINS - 1)
        want = np.array([np.bincount(b[:, f], weights=ws, minlength=N_BINS) for f in range(6)])
        np.testing.assert_allclose(hist.counts[s], want, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(screen.diagonal[s].mean, mean, rtol=1e-12)
    assert set(lagged.runs) == set(pairs)
    for key, items in pairs.items():
        m = lagged.runs[key]
        wp = np.array([a for a, _, _ in items])
        x0 = np.array([b for _, b, _ in items]) - shift
        xt = np.array([c for _, _, c in items]) - shift
        assert m.n_pairs == len(items)
        np.testing.assert_allclose(m.count, wp.sum(), rtol=1e-12)
        np.testing.assert_allclose(m.sum_xy, (x0 * wp[:, None]).T @ xt, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(screen.lagged[key[:2]].sum_xy,
                                   wp @ (x0 * xt), rtol=1e-10, atol=1e-12)
    # the lag grid stays in frames: pairs (t, t + lag) within a run, weighted
    for g, lag in enumerate((1, 3)):
        for (si, s, _), m in grid[g].runs.items():
            codes, x, _, _ = data[si]
            w = rw.weights.get(si, np.ones(codes.size))
            ts = [t for t in np.flatnonzero(codes == s)
                  if t + lag < codes.size and np.all(codes[t:t + lag + 1] == s)]
            assert m.n_pairs == len(ts)
            x0, xt = x[ts][:, [2, 5]] - shift[[2, 5]], x[np.add(ts, lag)][:, [2, 5]] - shift[[2, 5]]
            np.testing.assert_allclose(m.sum_xy, w[ts] @ (x0 * xt), rtol=1e-10, atol=1e-12)
    # block sums and the score card's sums are weighted too, and add up to the totals
    for s in (0, 1):
        if rows[s]:
            ws = np.array([a for a, _ in rows[s]])
            total = sum(float(b[2]["n"][0]) for b in blocks[(s, 0)])
            assert total == pytest.approx(ws.sum(), rel=1e-12)
            assert sum(float(b["n"]) for b in card.blocks()[s]) == pytest.approx(ws.sum(),
                                                                                   rel=1e-12)
            n_pairs = sum(len(v) for k, v in pairs.items() if k[1] == s)
            assert sum(b[1].n_pairs for b in blocks[(s, 0)]) == n_pairs


@SETTINGS
@given(sc=biased_scenarios())
def test_biased_passes_give_identical_bytes_for_any_split_and_match_a_direct_reference(
        sc, same_for_any_split):
    featurizer = CoordinateFeaturizer(ATOMS)
    with tempfile.TemporaryDirectory() as tmp:
        src, data = _build_biased(sc, tmp)
        plan = plan_tasks(src, leaf_frames=sc["leaf"])
        shift = reference_features(plan, featurizer)
        passes = _biased_passes(sc, featurizer, shift)
        reference = same_for_any_split(passes, src, plan, sc["seed"] + 1, sc["chunk"])
        _check_biased_direct(sc, src, data, reference, shift)


def test_biased_passes_give_the_same_bytes_in_two_processes(tmp_path, assert_same):
    sc = {"segments": [{"n": 37, "labels": (["a"] * 10 + [None] + ["b"] * 26)},
                       {"n": 30, "state": "a", "start": 3, "stop": 30, "unbiased": True}],
          "leaf": 5, "lag": 4, "chunk": 7, "spread": 2.0, "block": 4, "seed": 8}
    src, _ = _build_biased(sc, tmp_path)
    featurizer = CoordinateFeaturizer(ATOMS)
    plan = plan_tasks(src, leaf_frames=5, n_tasks=5)
    shift = reference_features(plan, featurizer)
    passes = _biased_passes(sc, featurizer, shift)
    serial = run_pass(passes, src, tasks=plan)
    with ProcessExecutor(2) as ex:
        parallel = run_pass(passes, src, tasks=plan, executor=ex)
    assert_same(serial, parallel)


def test_rescaled_time_overflow_is_refused_naming_the_files(tmp_path):
    traj = _write_dcd(tmp_path / "run.dcd", np.zeros((6, 3, 3)))
    v = np.zeros(6)
    v[2] = 2000.0 * KT
    src = Source(_topology(), temperature=300.0)
    src.add(traj, "a", bias=_write_bias(tmp_path / "run.bias", v))
    rw = src.reweighting()
    assert np.isfinite(rw.weights[0]).all()  # weights are formed in a safe way
    with pytest.raises(InputError, match=r"bias-energy file '.*run\.bias' reaches .* kJ/mol "
                                         r"\(2000 kT at 300 K\) at frame 2: the rescaled time "
                                         r"step exp\(V/kT\) overflows"):
        rw.check_rescaled_time({0: 1})
    with pytest.raises(InputError, match=r"rescaled time of trajectory '.*run\.dcd' overflows "
                                         r"at frame 2 \(exp\(V/kT\) of its bias there"):
        run_pass(LaggedPass(CoordinateFeaturizer(ATOMS), 1), src)


def test_a_huge_bias_outside_the_frames_used_leaves_the_clock_finite(tmp_path):
    """A huge bias before and after the frame range given for a state adds no rescaled time:
    the clock over the range is the sum of exp(V/kT) of the range's frames, slowness is
    measured and the pass engine pairs its frames. In a labelled file every frame is part of
    the run, so a huge bias between the states is refused naming that frame and energy."""
    rng = np.random.default_rng(4)
    traj = _write_dcd(tmp_path / "run.dcd", rng.normal(size=(40, 3, 3)))
    v = rng.uniform(0.0, 2.0, 40) * KT
    v[:5] = v[30:] = 2000.0 * KT
    bias = _write_bias(tmp_path / "run.bias", v)
    other = _write_dcd(tmp_path / "b.dcd", rng.normal(size=(40, 3, 3)))
    src = Source(_topology(), temperature=300.0)
    src.add(traj, "a", frames=(10, 25), bias=bias).add(other, "b")
    rw = src.reweighting()
    rw.check_rescaled_time({0: 2, 1: 2})
    a = read_bias_file(bias) / KT
    np.testing.assert_allclose(np.diff(rw.clocks[0][10:26]), np.exp(a[10:25]), rtol=1e-12)
    assert rw.max_exponent[0] == (pytest.approx(a[10:25].max(), rel=1e-12),
                                  10 + int(np.argmax(a[10:25])))
    lagged = run_pass(LaggedPass(CoordinateFeaturizer(ATOMS), 1), src)
    assert lagged is not None
    labels = ["a"] * 12 + [None] * 3 + ["b"] * 25
    v2 = np.zeros(40)
    v2[13] = 1500.0 * KT
    src2 = Source(_topology(), temperature=300.0)
    src2.add_labelled(traj, labels, bias=_write_bias(tmp_path / "lab.bias", v2))
    with pytest.raises(InputError, match=r"bias-energy file '.*lab\.bias' reaches .* kJ/mol "
                                         r"\(1500 kT at 300 K\) at frame 13: the rescaled"):
        src2.reweighting().check_rescaled_time({0: 1})


def test_the_clock_comes_from_the_clock_bias_column_and_the_weights_from_the_bias_column(
        tmp_path):
    """A bias given minus a time-dependent offset c(t) weighs the frames as the raw bias
    does only up to c(t), but the rescaled clock needs the bias as felt (its zero matters:
    exp(V/kT) per frame spacing). With a 'clock_bias' column the clock is the raw bias's,
    the weights the bias column's; without it the clock follows the bias column, and the
    notes say so (found in review: a shifted file changed a timescale from 412 to 0.24 ps
    with no word)."""
    rng = np.random.default_rng(4)
    n = 40
    traj = _write_dcd(tmp_path / "run.dcd", rng.normal(size=(n, 3, 3)))
    felt = rng.uniform(0.0, 3.0, n) * KT  # the bias each frame felt, kJ/mol
    offset = np.linspace(0.0, 2.0, n) * KT  # c(t), growing during the run
    (tmp_path / "both.bias").write_text(
        "bias clock_bias\n" + "".join(f"{float(a)!r} {float(b)!r}\n"
                                     for a, b in zip(felt - offset, felt)))
    both = Source(_topology(), temperature=300.0).add(traj, "a", bias=tmp_path / "both.bias")
    raw = Source(_topology(), temperature=300.0).add(
        traj, "a", bias=_write_bias(tmp_path / "raw.bias", felt))
    shifted = Source(_topology(), temperature=300.0).add(
        traj, "a", bias=_write_bias(tmp_path / "shifted.bias", felt - offset))
    rw_both, rw_raw, rw_shifted = both.reweighting(), raw.reweighting(), shifted.reweighting()
    assert np.array_equal(rw_both.clocks[0], rw_raw.clocks[0])
    assert np.array_equal(rw_both.weights[0], rw_shifted.weights[0])
    assert not np.allclose(rw_shifted.clocks[0], rw_raw.clocks[0])
    expect = np.concatenate([[0.0], np.cumsum(np.exp(felt / KT))])
    np.testing.assert_allclose(rw_both.clocks[0], expect, rtol=1e-12)
    notes_both = " ".join(rw_both.describe({0: 2})[0])
    notes_shifted = " ".join(rw_shifted.describe({0: 2})[0])
    assert "rescaled clock from the 'clock_bias' column" in notes_both
    assert "rescaled clock from the bias column itself" in notes_shifted
    assert "add a 'clock_bias' column" in notes_shifted
    # the named column is also refused like the bias column when it is not a number
    (tmp_path / "bad.bias").write_text("bias clock_bias\n1.0 x\n" + "1.0 1.0\n" * (n - 1))
    with pytest.raises(InputError, match=r"bad\.bias', line 2, column 2: 'x' is not a number"):
        Source(_topology(), temperature=300.0).add(traj, "a", bias=tmp_path / "bad.bias")


# ---------------------------------------------------------------------------- exact answers
def test_reweighting_biased_samples_recovers_the_exact_populations_and_well_means(tmp_path):
    """I.i.d. samples of exp(-(U + V)/kT) of the tilted double well, labelled by well and
    reweighted by exp(V/kT), give the populations and the mean position in each well of
    exp(-U/kT), by quadrature (scipy.integrate.quad), within four standard errors (delta
    method of the ratio estimators; Kish 1965 for the weights)."""
    well = DoubleWell()
    x = well.samples(20_000, biased=True, seed=21)
    pdb, (traj,), (bias,) = write_well_runs(tmp_path, x[None, :], frame_step_ps=1.0, well=well)
    stored = md.load(str(traj), top=str(pdb)).xyz[:, 1, 0].astype(np.float64)
    labels = np.where(stored < 0, "left", "right")
    src = Source(str(pdb), temperature=well.temperature)
    src.add_labelled(str(traj), labels, bias=str(bias))
    rw = src.reweighting()
    exact = well.populations()
    w = np.exp(well.bias(stored) / well.kt)
    ind = (labels == "left").astype(float)
    p = float(w @ ind / w.sum())
    se = math.sqrt(np.sum(w**2 * (ind - p) ** 2)) / w.sum()
    left = src.states.index("left")  # states are numbered in order of first appearance
    got = rw.populations()[left]
    assert got == pytest.approx(p, rel=1e-12)
    assert abs(got - exact[0]) < 4 * se, (got, exact, se)
    assert abs(ind.mean() - exact[0]) > 10 * se  # the unweighted fraction is far off
    # every statistic is weighted: the mean position in each well, from the pass engine
    means = run_pass(FoldMomentsPass(CoordinateFeaturizer([1]), columns=[0]), src)
    from scipy.integrate import quad

    for s, (a, b) in enumerate(((-3.0, 0.0), (0.0, 3.0))):
        dens = lambda y: math.exp(-float(well.potential(np.array([y]))[0]) / well.kt)  # noqa: E731
        mu = quad(lambda y: y * dens(y), a, b, epsrel=1e-12)[0] / quad(dens, a, b,
                                                                      epsrel=1e-12)[0]
        sel = (labels == ("left", "right")[s])
        ws = w[sel]
        m = float(ws @ stored[sel] / ws.sum())
        se = math.sqrt(np.sum(ws**2 * (stored[sel] - m) ** 2)) / ws.sum()
        assert means[src.states.index(("left", "right")[s])][0].mean[0] == pytest.approx(
            m, rel=1e-9)
        assert abs(m - mu) < 4 * se + 5e-4, (s, m, mu, se)  # XTC stores x to 1e-3 nm


def _timescale(items, lag, dt):
    """TICA timescale (ps) of the merged lagged moments of some runs, one feature."""
    return float(TICA.from_moments(merge_all(items), lag=lag).timescales_[0]) * dt


def _jackknife(items, lag, dt):
    """(estimate, jackknife standard error over the runs) of the TICA timescale, ps."""
    k = len(items)
    full = _timescale(items, lag, dt)
    vals = np.array([_timescale(items[:i] + items[i + 1:], lag, dt) for i in range(k)])
    return full, math.sqrt((k - 1) / k * np.sum((vals - vals.mean()) ** 2))


def test_rescaled_time_tica_timescale_of_biased_runs_matches_the_unbiased_one(tmp_path):
    """Overdamped runs of the double well with and without a static bias that raises the
    wells (barrier 4 kT seen from the wells becomes about 2.7 kT) and vanishes around the
    barrier: in rescaled time dt' = dt exp(V/kT) (McCarty and Parrinello, J. Chem. Phys.
    2017) the TICA timescale of x matches the unbiased one within the statistical error of
    both (jackknife over 16 files of 16 independent walkers each); rescaling is exact here
    only up to a few percent, since the bias vanishes around, not only at, the barrier
    (Voter, J. Chem. Phys. 1997). Without rescaling the biased runs look twice as fast."""
    well = DoubleWell()
    dt, lag = 0.05, 20  # frame spacing ps; lag 1 ps, far beyond the in-well relaxation
    labels = np.array(["well"] * 16_000, dtype=object)
    labels[::1000] = None  # walkers are concatenated: no pair spans two of them
    estimates = {}
    for biased, seed in ((False, 1), (True, 2)):
        x = well.run(256, 1000, md_step_ps=2e-3, stride=25, biased=biased, seed=seed)
        pdb, trajs, biases = write_well_runs(tmp_path, x.reshape(16, 16_000),
                                             frame_step_ps=dt, well=well if biased else None,
                                             prefix="b" if biased else "u")
        src = Source(str(pdb), temperature=well.temperature)
        for i, t in enumerate(trajs):
            src.add_labelled(str(t), labels, bias=str(biases[i]) if biased else None)
        result = run_pass(LaggedPass(CoordinateFeaturizer([1]), lag, columns=[0],
                                     shift=[0.0]), src)
        items = [m for _, m in sorted(result.by_run().items())]
        estimates[biased] = _jackknife(items, lag, dt)
        if biased:  # the same runs read without their bias energies
            plain = Source(str(pdb))
            for t in trajs:
                plain.add_labelled(str(t), labels)
            result = run_pass(LaggedPass(CoordinateFeaturizer([1]), lag, columns=[0],
                                         shift=[0.0]), plain)
            estimates["plain"] = _jackknife([m for _, m in sorted(result.by_run().items())],
                                            lag, dt)
    (t_u, se_u), (t_b, se_b) = estimates[False], estimates[True]
    both = math.sqrt(se_u**2 + se_b**2)
    assert abs(t_b - t_u) < 2 * both, estimates
    t_p, se_p = estimates["plain"]
    assert t_u - t_p > 5 * math.sqrt(se_u**2 + se_p**2), estimates


# ---------------------------------------------------------------------------- pipeline, CLI
@pytest.fixture(scope="module")
def zero_bias(tmp_path_factory, demo_files):
    """Bias files of zeros for two demo files per state."""
    top, states = demo_files
    d = tmp_path_factory.mktemp("zero")
    files = {s: fs[:2] for s, fs in states.items()}
    bias = {f: _write_bias(d / (Path(f).stem + ".bias"), np.zeros(2000))
            for fs in files.values() for f in fs}
    return top, files, bias


def test_a_bias_of_zero_gives_the_unbiased_suggestions_with_reweighting_notes(zero_bias):
    top, files, bias = zero_bias
    kw = dict(n_bootstrap=0, max_terms=2, n_suggestions=2, lag=1.0, objective="both")
    plain = suggest(Source.from_states(top, files), **kw)
    biased = suggest(Source.from_states(top, files, bias=bias, temperature=300.0), **kw)
    assert [e["spec"] for e in plain.ranking] == [e["spec"] for e in biased.ranking]
    for a, b in zip(plain.ranking, biased.ranking):
        assert [t["descriptor"] for t in a["terms"]] == [t["descriptor"] for t in b["terms"]]
        for key in ("heldout_score", "fisher_ratio_all", "autocorrelation_all", "timescale_ps",
                    "heldout_fisher_ratio", "heldout_fisher_ratio_noise", "integrated_time_ps"):
            assert b[key] == pytest.approx(a[key], rel=1e-9), key
        assert b["integrated_time_decayed"] == a["integrated_time_decayed"]
        # the same warnings (the noise level's and the runs-too-short checks are made on
        # reweighted runs too, with their effective frames; they had been left out)
        assert b["warnings"] == a["warnings"]
    assert not any("reweighting" in n for n in plain.notes)
    text = "\n".join(biased.notes)
    assert "effective sample size (Kish) of state 'closed': 4000.0 of 4000 frames" in text
    assert "rescaled time dt' = dt exp(V/kT)" in text and "Voter" in text
    assert "warning" not in text.split("reweighting")[1].split("held-out")[0]
    seg = biased.specs[0]["provenance"]["segments"][0]
    assert seg["bias"]["file"] == "closed-1.bias" and seg["bias"]["temperature_k"] == 300.0
    # the hints say that their time came from biased runs (the spec's hints, and those
    # recomputed from the spec); the unbiased run's hints do not
    said = "measured in those runs' own simulation time"
    assert all(any(said in w for w in e["hints"]["warnings"]) for e in biased.ranking)
    assert not any(said in w for e in plain.ranking for w in e["hints"]["warnings"])
    again = spec_hints(Spec.from_dict(biased.specs[0]), temperature=300.0, md_step_fs=2.0)
    assert any(said in w for w in again["warnings"])
    plain_again = spec_hints(Spec.from_dict(plain.specs[0]), temperature=300.0, md_step_fs=2.0)
    assert not any(said in w for w in plain_again["warnings"])


def test_suggest_command_on_a_state_with_a_zero_bias_run_and_an_unbiased_one(
        zero_bias, tmp_path, capsys):
    """A zero bias on one of the two files of 'closed': the groups weigh by their sizes
    (2000 frames each), every weight is 1, so the ranking is that of the unbiased runs; the
    summary gives both groups' effective sample sizes."""
    top, files, bias = zero_bias
    argv = ["suggest", "--topology", top, "--bootstrap", "0", "--max-terms", "1",
            "--suggestions", "1", "--no-report", "--temperature", "300", "--lag", "1"]
    for s, fs in files.items():
        argv += ["--state", s, *fs]
    assert main(argv + ["--out", str(tmp_path / "plain")]) == 0
    first = files["closed"][0]
    assert main(argv + ["--out", str(tmp_path / "mixed"), "--bias-energy", first,
                        bias[first]]) == 0
    out = capsys.readouterr().out
    plain, mixed = (json.loads((tmp_path / d / "ranking.json").read_text())
                    for d in ("plain", "mixed"))
    for key in ("heldout_score", "fisher_ratio_all", "autocorrelation_all"):
        assert mixed["ranking"][0][key] == pytest.approx(plain["ranking"][0][key], rel=1e-9)
    summary = (tmp_path / "mixed" / "summary.md").read_text()
    for text in (out, summary):
        assert ("effective sample size (Kish) of state 'closed': 4000.0 of 4000 frames "
                "(100.0%): biased runs 2000.0 of 2000 frames, unbiased runs 2000 of 2000 "
                "frames, weighing 50.0% and 50.0% of the state") in text
    assert "effective sample size (Kish) of state 'open'" not in summary


def test_suggest_command_pairs_trajectories_with_bias_files_and_reports_the_sample_size(
        zero_bias, tmp_path, capsys):
    top, files, _ = zero_bias
    rng = np.random.default_rng(4)
    argv = ["suggest", "--topology", top, "--out", str(tmp_path / "out"), "--bootstrap", "0",
            "--max-terms", "1", "--suggestions", "1", "--no-report", "--temperature", "300"]
    for s, fs in files.items():
        argv += ["--state", s, *fs]
    for f in files["closed"] + files["open"]:
        v = 25.0 * rng.random(2000) ** 8  # a few frames of high bias carry the weight
        argv += ["--bias-energy", f, _write_bias(tmp_path / (Path(f).stem + ".csv"), v,
                                                 header="energy")]
    argv += ["--bias-column", "energy"]
    assert main(argv) == 0
    out, err = capsys.readouterr()
    assert "effective sample size (Kish) of state 'closed'" in out
    assert "cvdesign suggest: warning: state 'closed' has a small effective sample size" in err
    summary = (tmp_path / "out" / "summary.md").read_text()
    assert "effective sample size (Kish) of state 'open'" in summary
    spec = json.loads((tmp_path / "out" / "cv-01.json").read_text())
    assert spec["provenance"]["segments"][0]["bias"]["column"] == "energy"


def test_suggest_on_labelled_biased_runs_reports_the_reweighted_populations(tmp_path):
    """Biased double-well runs that cross between the wells, labelled by well: the summary
    gives the reweighted populations and free-energy difference of the two states (those of
    Reweighting.populations, checked against the exact answer above)."""
    well = DoubleWell()
    x = well.run(4, 1000, md_step_ps=2e-3, stride=25, biased=True, seed=3)
    pdb, trajs, biases = write_well_runs(tmp_path, x, frame_step_ps=0.05, well=well)
    src = Source(str(pdb), temperature=well.temperature)
    for t, b in zip(trajs, biases):
        xs = md.load(str(t), top=str(pdb)).xyz[:, 1, 0]
        src.add_labelled(str(t), np.where(xs < -0.3, "left", np.where(xs > 0.3, "right", None)),
                         bias=str(b))
    result = suggest(src, n_bootstrap=0, cutoff=10.0, lag=1.0, objective="both")
    pops = src.reweighting().populations()
    left, right = src.states.index("left"), src.states.index("right")
    df = -well.kt * math.log(pops[right] / pops[left])
    note = next(n for n in result.notes if n.startswith("reweighted state populations"))
    assert f"'left' {pops[left]:.3g}" in note and f"'right' {pops[right]:.3g} (dF = {df:.3g} " \
        "kJ/mol)" in note, note
    assert result.ranking[0]["timescale_ps"] is not None


# ---------------------------------------------------------------------------- states from runs
@pytest.fixture(scope="module")
def biased_well_runs(tmp_path_factory):
    """128 biased runs of the double well (overdamped, each walker started from the
    biased equilibrium), 1000 frames 0.2 ps apart, with their bias-energy files."""
    well = DoubleWell()
    x = well.run(128, 1000, md_step_ps=2e-3, stride=100, biased=True, seed=3)
    d = tmp_path_factory.mktemp("wellruns")
    pdb, trajs, biases = write_well_runs(d, x, frame_step_ps=0.2, well=well)
    return well, str(pdb), [str(t) for t in trajs], [str(b) for b in biases]


def test_states_proposed_from_biased_runs_are_the_two_wells_with_their_exact_populations(
        biased_well_runs):
    """propose_states on biased runs of the tilted double well: the proposed states are the
    two wells (a threshold in x within 0.1 nm of the barrier top), and the reweighted
    population of each matches the exact population of exp(-U/kT) on its side of the
    threshold, by quadrature (scipy.integrate.quad), within four jackknife standard errors
    over the 128 independent runs (Efron, The Jackknife, the Bootstrap and Other Resampling
    Plans, SIAM, 1982, from memory); the unweighted frame
    fraction is far off. Rescaled time (McCarty and Parrinello, J. Chem. Phys. 2017) and its
    caveat (Voter, J. Chem. Phys. 1997) are in the notes."""
    from scipy.integrate import quad

    from cvdesign.pipeline.explore import propose_states

    well, pdb, trajs, biases = biased_well_runs
    src = Source(pdb, temperature=well.temperature)
    for t, b in zip(trajs, biases):
        src.add(t, "runs", bias=b)
    ex = propose_states(src, lag=1.0, cutoff=10.0)
    assert len(ex.states) == 2
    xs = [md.load(t, top=pdb).xyz[:, 1, 0].astype(np.float64) for t in trajs]
    labels = [ex.labels[t] for t in trajs]
    x, lab = np.concatenate(xs), np.concatenate(labels)
    left = ex.states[int(np.argmin([x[lab == s].mean() for s in ex.states]))]
    right = next(s for s in ex.states if s != left)
    assert x[lab == left].max() < x[lab == right].min()  # a threshold in x
    cut = 0.5 * (x[lab == left].max() + x[lab == right].min())
    top = 1.0 / (4.0 * well.barrier / well.tilt)  # the barrier top, x ~ s / (4 h)
    assert abs(cut - top) < 0.1, cut
    dens = lambda y: math.exp(-float(well.potential(np.array([y]))[0]) / well.kt)  # noqa: E731
    lo_part = quad(dens, -3.0, cut, epsrel=1e-12, limit=200)[0]
    exact = lo_part / (lo_part + quad(dens, cut, 3.0, epsrel=1e-12, limit=200)[0])
    w = [np.exp(well.bias(xi) / well.kt) for xi in xs]
    num = np.array([wi[li == left].sum() for wi, li in zip(w, labels)])
    den = np.array([wi.sum() for wi in w])
    p = num.sum() / den.sum()
    assert ex.populations[left] == pytest.approx(p, rel=1e-6)  # the reweighted population
    k = len(trajs)
    jack = np.array([(num.sum() - num[i]) / (den.sum() - den[i]) for i in range(k)])
    se = math.sqrt((k - 1) / k * np.sum((jack - jack.mean()) ** 2))
    assert abs(p - exact) < 4 * se, (p, exact, se)
    assert abs(np.mean(lab == left) - exact) > 10 * se  # without the weights: far off
    assert ex.kinetics.metastable.all() and not ex.warnings
    text = "\n".join(ex.notes)
    assert "effective sample size (Kish) of state 'runs'" in text
    assert "McCarty and Parrinello" in text and "Voter" in text
    assert "k-means centres" in text
    # the labelled source for suggest keeps the bias files, so the CVs are reweighted too
    lab_src = ex.labelled_source(pdb)
    assert lab_src.biased and lab_src.temperature == well.temperature
    np.testing.assert_allclose(lab_src.reweighting().populations()[lab_src.states.index(left)],
                               p, rtol=1e-9)


def test_suggest_command_proposes_states_from_biased_runs_and_says_they_were_reweighted(
        biased_well_runs, tmp_path, capsys):
    well, pdb, trajs, biases = biased_well_runs
    argv = ["suggest", "--topology", pdb, "--runs", *trajs[:16], "--lag", "1", "--cutoff", "10",
            "--bootstrap", "0", "--no-report", "--temperature", "300", "--out",
            str(tmp_path / "out")]
    for t, b in zip(trajs[:16], biases[:16]):
        argv += ["--bias-energy", t, b]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "proposed states: S1" in out and "caution:" in out
    summary = (tmp_path / "out" / "summary.md").read_text()
    assert "## Proposed states (unlabelled runs)" in summary
    assert "proposed states from biased runs" in summary
    assert "effective sample size (Kish) of state 'runs'" in summary  # the proposal's
    assert "effective sample size (Kish) of state 'S1'" in summary  # the suggestions'
    assert "rescaled time dt' = dt exp(V/kT)" in summary and "Voter" in summary
    assert "starting points" in summary
    spec = json.loads((tmp_path / "out" / "cv-01.json").read_text())
    assert spec["provenance"]["segments"][0]["bias"]["temperature_k"] == 300.0


def test_states_proposed_from_biased_runs_are_the_same_bytes_in_two_processes(
        short_leaves, biased_well_runs):
    from cvdesign.pipeline.explore import propose_states

    well, pdb, trajs, biases = biased_well_runs
    src = Source(pdb, temperature=well.temperature)
    for t, b in zip(trajs[:13], biases[:13]):
        src.add(t, "runs", bias=b)
    one = propose_states(src, lag=1.0, cutoff=10.0, n_states=2)
    with ProcessExecutor(2) as ex:
        two = propose_states(src, lag=1.0, cutoff=10.0, n_states=2, executor=ex)
    assert one.populations == two.populations
    np.testing.assert_array_equal(one.kinetics.counts, two.kinetics.counts)
    assert one.kinetics.counts.dtype == np.float64  # weighted pair counts
    for t in trajs[:13]:
        np.testing.assert_array_equal(one.labels[t], two.labels[t])


def test_a_pass_with_several_lags_reads_the_halo_of_every_lag_in_a_biased_run(tmp_path):
    """A run whose bias drops near its end: the last frames of the high-bias stretch have no
    partner at the longest lag (the rescaled clock barely moves afterwards) but do at a
    shorter one, farther away in frames. The halo read after each task must hold those
    pairs too (it once held only the longest lag's, and the pass stopped with "lag 4 is
    longer than the halo"); the sums equal a direct computation over the partners."""
    from cvdesign.passes import Folds
    from cvdesign.pipeline.report_data import CVPlan, CVReportPass

    rng = np.random.default_rng(0)
    traj = _write_dcd(tmp_path / "run.dcd", rng.normal(1.0, 0.1, (40, 1, 3)))
    v = np.zeros(40)
    v[:30] = 8 * KT  # kJ/mol: high for 30 frames, then none
    src = Source(_topology(1), temperature=300.0)
    src.add(traj, "a", bias=_write_bias(tmp_path / "run.bias", v))
    plan = plan_tasks(src, leaf_frames=8)
    lay = plan.layouts[0]
    spans = [lay.lag_span(lag) for lag in range(1, 17)]
    assert spans == sorted(spans)  # never shrinks as the lag grows
    cv = CVPlan(np.array([0]), np.array([1.0]), [np.array([1.0])], [(1.0, 0.0)], -3.0, 3.0, 10)
    lags = [4, 16]
    make = lambda: CVReportPass(CoordinateFeaturizer([0]), [cv], Folds(1), {0: 1},  # noqa
                                lags, [1.0], columns=np.array([0]), center=np.zeros(1),
                                scale=np.ones(1))
    got = run_pass(make(), src, tasks=plan)
    assert run_pass(make(), src, tasks=plan.split(n_tasks=5))["lagged"][0].n_pairs == \
        got["lagged"][0].n_pairs
    x = md.load(traj, top=_topology(1)).xyz[:, 0, 0].astype(np.float64) - 1.0
    frames = np.arange(40)
    w = lay.weights_of(frames)
    for lag, m in zip(lags, got["lagged"]):
        u = lay.partners(frames, lag)
        t = np.flatnonzero(u >= 0)
        assert m.n_pairs == t.size > 0
        np.testing.assert_allclose([m.count, m.sum_x[0], m.sum_xy[0], m.sum_yy[0]],
                                   [w[t].sum(), w[t] @ x[t], w[t] @ (x[t] * x[u[t]]),
                                    w[t] @ x[u[t]] ** 2], rtol=1e-12)


def test_the_bias_module_describes_the_rescaled_time_pair_that_partners_takes(tmp_path):
    """cvdesign.io.bias says which frame a rescaled-time pair takes; SegmentLayout.partners
    decides it. A clock where the frame before the first one reaching clock[t] + lag is the
    closer: the pair goes to that one, and the module's text says so (it once said "the
    first frame u whose clock reaches clock[t] + L")."""
    import cvdesign.io.bias as bias_module

    traj = _write_dcd(tmp_path / "run.dcd", np.ones((5, 1, 3)))
    # clock steps exp(V/kT) of 1, 2.4, 0.2, 1: clock 0, 1, 3.4, 3.6, 4.6 frame spacings
    v = KT * np.log([1.0, 2.4, 0.2, 1.0, 1.0])
    src = Source(_topology(1), temperature=300.0)
    src.add(traj, "a", bias=_write_bias(tmp_path / "run.bias", v))
    lay = plan_tasks(src, leaf_frames=8).layouts[0]
    np.testing.assert_allclose(lay.clock[:5], [0.0, 1.0, 3.4, 3.6, 4.6], rtol=1e-9)
    # t=0: frame 3 (clock 3.6) is the first to reach 3.45 and 3.55; frame 2 (3.4) is closer
    # to 3.45, frame 3 to 3.55. t=1, lag 1: frame 2 is the first to reach 2, and the frame
    # before it is t itself.
    assert lay.partners(np.array([0]), 3.45).tolist() == [2]
    assert lay.partners(np.array([0]), 3.55).tolist() == [3]
    assert lay.partners(np.array([1]), 1.0).tolist() == [2]
    doc = " ".join(bias_module.__doc__.split())
    assert "closest to ``clock[t] + L``" in doc and "the frame before it" in doc
    assert "with the first frame ``u`` whose clock reaches" not in doc


def test_populations_leave_out_a_biased_run_that_stays_in_one_state(tmp_path):
    """A crossing biased run of the double well, plus a run of the same bias that stayed in
    the left well (given for state 'left'): the populations come from the crossing run alone
    (the left-only run's frames are left by construction and would inflate 'left'), and the
    note names the run used and the one left out."""
    well = DoubleWell()
    x = well.samples(20_000, biased=True, seed=21)
    pool = well.samples(60_000, biased=True, seed=22)
    stay = pool[pool < 0][:20_000]
    pdb, (cross, left_run), (b_cross, b_left) = write_well_runs(
        tmp_path, np.stack([x, stay]), frame_step_ps=1.0, well=well)
    stored = md.load(str(cross), top=str(pdb)).xyz[:, 1, 0].astype(np.float64)
    labels = np.where(stored < 0, "left", "right")
    alone = Source(str(pdb), temperature=well.temperature)
    alone.add_labelled(str(cross), labels, bias=str(b_cross))
    both = Source(str(pdb), temperature=well.temperature)
    both.add_labelled(str(cross), labels, bias=str(b_cross))
    both.add(str(left_run), "left", bias=str(b_left))
    left = both.states.index("left")
    expected = alone.reweighting().populations()
    got = both.reweighting().populations()
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert abs(got[left] - well.populations()[0]) < 0.03
    notes, _ = both.reweighting().describe()
    note = next(n for n in notes if n.startswith("reweighted state populations"))
    assert f"over the frames of 1 biased run that visits two or more states ({cross})" in note
    assert f"left out: 1 biased run that stays in one state ({left_run})" in note
    # the left-only run is still reweighted with the state's other frames
    assert both.reweighting().frames[left] == int((labels == "left").sum()) + stay.size
    # a third state that no crossing run visits has no population, and the note says so
    # (it had listed the other two as if they were all)
    three = Source(str(pdb), temperature=well.temperature)
    three.add_labelled(str(cross), labels, bias=str(b_cross))
    three.add(str(left_run), "far", bias=str(b_left))
    notes, _ = three.reweighting().describe()
    note = next(n for n in notes if n.startswith("reweighted state populations"))
    assert "; no population for 'far': those runs never visit it" in note


def test_a_file_split_by_frame_ranges_into_two_states_counts_as_a_crossing_run(tmp_path):
    """One biased run given as two frame ranges, one per state: the file visits both states,
    so the populations are taken over it (the same as the file given with per-frame labels)."""
    well = DoubleWell()
    x = np.sort(well.samples(4_000, biased=True, seed=5))  # left frames first, then right
    pdb, (traj,), (bias,) = write_well_runs(tmp_path, x[None, :], frame_step_ps=1.0, well=well)
    stored = md.load(str(traj), top=str(pdb)).xyz[:, 1, 0]
    cut = int(np.searchsorted(stored, 0.0))
    ranges = Source(str(pdb), temperature=well.temperature)
    ranges.add(str(traj), "left", frames=(0, cut), bias=str(bias))
    ranges.add(str(traj), "right", frames=(cut, None), bias=str(bias))
    labelled = Source(str(pdb), temperature=well.temperature)
    labelled.add_labelled(str(traj), np.where(np.arange(x.size) < cut, "left", "right"),
                          bias=str(bias))
    assert sorted(ranges.reweighting().population_runs) == [0, 1]
    np.testing.assert_allclose(ranges.reweighting().populations(),
                               labelled.reweighting().populations(), rtol=1e-12)


def test_frame_ranges_of_one_file_with_different_bias_files_are_refused(tmp_path):
    """One run felt one bias: its frame ranges cannot be given with another bias file, or
    with none (the second range's frames were used unweighted, without a word)."""
    traj = _write_dcd(tmp_path / "run.dcd", np.zeros((10, 3, 3)))
    one = _write_bias(tmp_path / "one.bias", np.zeros(10))
    other = _write_bias(tmp_path / "other.bias", np.ones(10))
    for first, second, said in [(one, None, r"and for state 'b' with no bias-energy file"),
                                (None, one, r"no bias-energy file and for state 'b' with "
                                            r"bias-energy file '.*one\.bias'"),
                                (one, other, r"and for state 'b' with bias-energy file "
                                             r"'.*other\.bias'")]:
        src = Source(_topology(), temperature=300.0)
        src.add(traj, "a", frames=(0, 5), bias=first)
        with pytest.raises(InputError, match=r"trajectory '.*run\.dcd' is given for state 'a' "
                                             r"with .*" + said + r": the frames of one run felt "
                                             r"one bias"):
            src.add(traj, "b", frames=(5, None), bias=second)
    src = Source(_topology(), temperature=300.0)  # the same file (another spelling): fine
    src.add(traj, "a", frames=(0, 5), bias=one)
    src.add(traj, "b", frames=(5, None), bias=str(tmp_path / "." / "one.bias"))
    assert len(src.segments) == 2


def test_a_bias_file_saved_with_a_byte_order_mark_keeps_its_first_column_name(tmp_path):
    path = tmp_path / "bom.csv"
    path.write_bytes("time_ps,bias\n0.0,1.5\n0.2,2.5\n".encode("utf-8-sig"))
    assert read_bias_file(path, "time_ps").tolist() == [0.0, 0.2]
    assert read_bias_file(path).tolist() == [1.5, 2.5]


def test_suggest_takes_the_temperature_of_a_biased_source_and_refuses_another(tmp_path):
    """A source of biased runs at 350 K: suggest's hints, parameters and report use 350 K
    when no temperature is given; another temperature is refused naming both; an unbiased
    source keeps the 300 K default."""
    well = DoubleWell()
    x = well.samples(1_200, biased=True, seed=8).reshape(2, 600)
    pdb, trajs, biases = write_well_runs(tmp_path, x, frame_step_ps=1.0, well=well)
    src = Source(str(pdb), temperature=350.0)
    plain = Source(str(pdb))
    for t, b in zip(trajs, biases):
        xs = md.load(str(t), top=str(pdb)).xyz[:, 1, 0]
        labels = np.where(xs < 0, "left", "right")
        src.add_labelled(str(t), labels, bias=str(b))
        plain.add_labelled(str(t), labels)
    kw = dict(n_bootstrap=0, cutoff=10.0, max_terms=1, n_suggestions=1)
    result = suggest(src, **kw)
    assert result.report_data["temperature_k"] == 350.0
    assert result.specs[0]["provenance"]["parameters"][
        "temperature_k"] == 350.0
    hints = result.ranking[0]["hints"]
    assert hints["inputs"]["temperature_k"] == 350.0, hints
    assert suggest(src, temperature=350.0, **kw).report_data == result.report_data
    with pytest.raises(InputError, match=r"temperature=300\.0 \(K, for the bias hints and the "
                                         r"report's -kT ln p\) differs from the source's "
                                         r"temperature=350\.0 \(K\), at which its biased runs"):
        suggest(src, temperature=300.0, **kw)
    unweighted = suggest(plain, **kw).report_data
    assert unweighted["temperature_k"] == 300.0
    # the held-out histograms of the biased states are weights (the caption says so)
    assert result.report_data["cvs"][0]["heldout"]["weighted"] == ["left", "right"]
    assert "weighted" not in unweighted["cvs"][0]["heldout"]


def test_a_clock_bias_slower_than_simulation_time_is_warned_about(tmp_path):
    """A bias column holding V - c(t) (mostly negative) without a clock_bias column, or a
    clock_bias column of the wrong sign, makes the rescaled clock run slower than simulation
    time: describe() warns (at a lag; a clock_bias column always) naming the file and what to
    give; the bias as felt gives no warning."""
    rng = np.random.default_rng(11)
    v = rng.uniform(0.0, 3.0, 200) * KT  # a bias as felt: never negative
    traj = _write_dcd(tmp_path / "run.dcd", rng.normal(size=(200, 3, 3)))
    other = _write_dcd(tmp_path / "b.dcd", rng.normal(size=(200, 3, 3)))

    def warnings_of(bias, lags):
        src = Source(_topology(), temperature=300.0).add(traj, "a", bias=bias).add(other, "b")
        return src.reweighting().describe(lags)[1]

    felt = _write_bias(tmp_path / "felt.bias", v)
    shifted = _write_bias(tmp_path / "shifted.bias", v - 4.0 * KT)
    (tmp_path / "flipped.bias").write_text(
        "bias clock_bias\n" + "".join(f"{float(a)!r} {-float(a)!r}\n" for a in v))
    assert not [w for w in warnings_of(felt, {0: 2}) if "slower" in w]
    assert not [w for w in warnings_of(shifted, None) if "slower" in w]  # weights only
    expected = (r"^the rescaled clock runs slower than simulation time in .*run\.dcd \(bias "
                r"file .*{} clock from its {} column: [0-9.]+ frame spacings of rescaled "
                r"time over 200 simulated, {}% of its clock energies negative\): no bias that "
                r"accelerates .* shifted .* or sign-flipped; give a 'clock_bias' column with "
                r"the bias each frame felt, in kJ/mol, positive where the bias pushes the "
                r"system away")
    (w,) = [w for w in warnings_of(shifted, {0: 2}) if "slower" in w]
    assert re.match(expected.format(r"shifted\.bias,", "bias", int(round(
        100 * np.mean(v < 4.0 * KT)))), w), w
    for lags in (None, {0: 2}):
        (w,) = [w for w in warnings_of(tmp_path / "flipped.bias", lags) if "slower" in w]
        assert re.match(expected.format(r"flipped\.bias,", "'clock_bias'", int(round(
            100 * np.mean(v > 0)))), w), w


def test_a_clock_that_stops_is_named_when_no_lagged_pairs_are_left(zero_bias, tmp_path):
    """A bias column of -1000 kJ/mol on every frame (energies about a far reference): the
    weights are unchanged, but the rescaled clock stops, so no pair is left at any lag; the
    refusal (objective both) and the note (separate) name the clock as the cause, not only
    the lag."""
    top, files, _ = zero_bias
    bias = {f: _write_bias(tmp_path / (Path(f).stem + ".bias"), np.full(2000, -1000.0))
            for fs in files.values() for f in fs}
    src = Source.from_states(top, files, bias=bias, temperature=300.0)
    kw = dict(n_bootstrap=0, max_terms=1, n_suggestions=1, lag=1.0)
    with pytest.raises(InputError, match=r"longer than every run .*; but first: the rescaled "
                                         r"clock runs slower than simulation time in "
                                         r".*closed-1\.xtc \(bias file .*closed-1\.bias"):
        suggest(src, objective="both", **kw)
    res = suggest(src, objective="separate", **kw)
    note = next(n for n in res.notes if n.startswith("slowness not measured"))
    assert "; but first: the rescaled clock runs slower than simulation time" in note


def test_suggest_command_warns_on_standard_error_about_a_sign_flipped_bias(tmp_path, capsys):
    """Two double-well runs, one per well, the left one's bias given with the wrong sign:
    `cvdesign suggest --lag` warns on standard error and in summary.md that its clock runs
    slower than simulation time; with the right sign there is no such warning."""
    well = DoubleWell()
    x = well.samples(3_000, biased=True, seed=13)
    runs = np.stack([x[x < 0][:600], x[x > 0][:600]])
    pdb, trajs, biases = write_well_runs(tmp_path, runs, frame_step_ps=1.0, well=well)
    flipped = tmp_path / "flipped.bias"
    flipped.write_text("bias\n" + "".join(f"{-float(a)!r}\n" for a in read_bias_file(biases[0])))
    argv = ["suggest", "--topology", str(pdb), "--state", "left", str(trajs[0]), "--state",
            "right", str(trajs[1]), "--bootstrap", "0", "--max-terms", "1", "--suggestions",
            "1", "--no-report", "--temperature", str(well.temperature), "--lag", "5",
            "--cutoff", "10", "--bias-energy", str(trajs[1]), str(biases[1])]
    assert main(argv + ["--out", str(tmp_path / "good"), "--bias-energy", str(trajs[0]),
                        str(biases[0])]) == 0
    assert "slower than simulation time" not in capsys.readouterr().err
    assert main(argv + ["--out", str(tmp_path / "bad"), "--bias-energy", str(trajs[0]),
                        str(flipped)]) == 0
    err = capsys.readouterr().err
    assert "warning: the rescaled clock runs slower than simulation time in " in err
    assert f"{trajs[0]} (bias file {flipped}, clock from its bias column" in err
    assert err.count("slower than simulation time") == 1
    summary = (tmp_path / "bad" / "summary.md").read_text()
    assert "warning: the rescaled clock runs slower than simulation time" in summary


def test_a_biased_group_of_small_effective_size_beside_unbiased_runs_is_warned_about():
    """State 'a': a biased run of 10,000 frames whose weight sits on one frame (Kish size
    about 1) and an unbiased run of 2,000 frames. The state's combined size (about 2,001) is
    not small, but its biased group's is: describe() warns about that group; a biased run of
    equal weights beside the same unbiased run gets no warning."""
    from cvdesign.io.bias import reweight
    from cvdesign.io.source import Segment

    rng = np.random.default_rng(17)
    v = rng.uniform(0.0, 1.0, 10_000) * KT
    v[1234] = 60.0 * KT
    plain = Segment(Path("plain.xtc"), "a")
    for bias, warned in ((v, True), (np.zeros(10_000), False)):
        seg = Segment(Path("biased.xtc"), "a", bias=bias, bias_path=Path("biased.bias"))
        rw = reweight([seg, plain], ["a"], 300.0, count_frames=lambda path: 2_000)
        (_, eb), _ = rw.groups[0]["biased"], rw.groups[0]["unbiased"]
        assert rw.ess[0] > 2_000  # the combined size alone would not warn
        _, warnings = rw.describe()
        if not warned:
            assert warnings == []
            continue
        assert eb < 1.01
        (w,) = warnings
        assert w == (f"the biased runs of state 'a' have a small effective sample size after "
                     f"reweighting ({eb:.1f} of 10000 frames): a few frames of high bias carry "
                     f"most of their weight, so they weigh {eb / rw.ess[0]:.1%} of the state "
                     "and its statistics come almost only from its 2000 unbiased frames; give "
                     "longer biased runs or runs with a smaller bias in that state")


def _timed_bias(path, times, values, header="time_ps, bias", fmt="{!r}"):
    """A bias-energy file with a time column (comma-separated)."""
    rows = "".join(f"{fmt.format(float(t))}, {float(v)!r}\n" for t, v in zip(times, values))
    Path(path).write_text(f"{header}\n" + rows)
    return str(path)


def test_a_bias_file_whose_times_are_shifted_by_a_frame_is_refused_when_given(tmp_path):
    """A bias file with a time column one frame off the XTC's stored times is refused by
    Source.add, naming both files, the frame and both times; matching times (also written
    with few digits, or in ns) are accepted, and a trajectory without stored times (DCD) is
    not compared."""
    well = DoubleWell()
    x = well.samples(400, biased=True, seed=31).reshape(2, 200)
    pdb, (traj, other), (bias, _) = write_well_runs(tmp_path, x, frame_step_ps=0.25, well=well)
    v = read_bias_file(bias)
    t = np.arange(200) * 0.25
    src = Source(str(pdb), temperature=well.temperature)
    shifted = _timed_bias(tmp_path / "shifted.bias", t + 0.25, v)
    with pytest.raises(InputError, match=r"bias-energy file '.*shifted\.bias' and trajectory "
                                         r"'.*run-0\.xtc' disagree on the time of frame 0: the "
                                         r"bias file's row of that frame \(value row 1\) says "
                                         r"0\.25 ps in column 'time_ps', the trajectory stores "
                                         r"0 ps; the bias energies must be those of the "
                                         r"trajectory's frames"):
        src.add(str(traj), "left", bias=shifted)
    assert src.segments == []
    src.add(str(traj), "left", bias=_timed_bias(tmp_path / "ok.bias", t, v, fmt="{:.1f}"))
    assert src.segments[0].bias_times.resolution_ps == pytest.approx(0.05)
    np.testing.assert_array_equal(src.segments[0].bias, v)
    ns = _timed_bias(tmp_path / "ns.bias", t / 1000.0, v, header="time_ns, bias")
    Source(str(pdb), temperature=well.temperature).add(str(traj), "left", bias=ns)
    dcd = _write_dcd(tmp_path / "run.dcd", np.zeros((200, 3, 3)))
    Source(_topology(), temperature=300.0).add(dcd, "a", bias=shifted)  # no stored times


def test_suggest_refuses_a_bias_file_whose_times_differ_from_the_trajectory_mid_run(tmp_path):
    """The first two frames and the last agree (those Source.add compares), frames 150 to
    299 do not (a row dropped there and one repeated later): the even-spacing pass of
    suggest, which reads every frame's stored time anyway, refuses it naming frame 150 and
    both times; the matching file gives the same ranking as no times."""
    well = DoubleWell()
    x = well.samples(1_200, biased=True, seed=8).reshape(2, 600)
    pdb, trajs, biases = write_well_runs(tmp_path, x, frame_step_ps=1.0, well=well)
    kw = dict(n_bootstrap=0, cutoff=10.0, max_terms=1, n_suggestions=1)

    def source(times):
        src = Source(str(pdb), temperature=well.temperature)
        for i, (traj, bias) in enumerate(zip(trajs, biases)):
            xs = md.load(str(traj), top=str(pdb)).xyz[:, 1, 0]
            if times is not None and i == 1:
                bias = _timed_bias(tmp_path / "timed.bias", times, read_bias_file(bias))
            src.add_labelled(str(traj), np.where(xs < 0, "left", "right"), bias=str(bias))
        return src

    t = np.arange(600, dtype=np.float64)
    bad = t.copy()
    bad[150:300] -= 1.0  # row 149 dropped, row 299 repeated
    with pytest.raises(InputError, match=r"bias-energy file '.*timed\.bias' and trajectory "
                                         r"'.*run-1\.xtc' disagree on the time of frame 150: "
                                         r".* says 149 ps in column 'time_ps', the trajectory "
                                         r"stores 150 ps"):
        suggest(source(bad), **kw)
    assert suggest(source(t), **kw).ranking == suggest(source(None), **kw).ranking


def test_a_labels_file_saved_with_a_byte_order_mark_keeps_its_first_label(tmp_path):
    from cvdesign.io.source import read_labels_file

    path = tmp_path / "run.labels"
    path.write_bytes("closed\n-\nopen\n".encode("utf-8-sig"))
    assert read_labels_file(path).tolist() == ["closed", None, "open"]


def test_the_coarse_lag_warning_says_when_the_lag_is_the_default():
    from cvdesign.io.bias import reweight
    from cvdesign.io.source import Segment

    # every frame at 3 kT: rescaled steps of e^3 = 20 frame spacings, over half a lag of 10
    seg = Segment(Path("run.xtc"), "a", bias=np.full(50, 3.0 * KT))
    rw = reweight([seg], ["a"], 300.0)
    chosen = [w for w in rw.describe({0: 10})[1] if "the lag is short" in w]
    default = [w for w in rw.describe({0: 10}, default_lag=True)[1] if "the lag is short" in w]
    assert len(chosen) == len(default) == 1
    assert "default" not in chosen[0]
    assert default[0].endswith("(this lag is the default of 10 frames, not one chosen; with "
                               "objective 'separate' it sizes only the slowness columns)")
