"""`cvdesign check`: a spec against a topology, and an engine's values against the evaluator."""

import json
import re

import mdtraj as md
import numpy as np

from cvdesign import Spec, load_spec
from cvdesign.cli import main


def _engine_values(spec, top, traj_path, *, weight_factor=1.0):
    """An independent 'engine': the CV from mdtraj's float32 geometry and the spec terms."""
    traj = md.load(traj_path, top=top)
    descs = {d["id"]: d for d in spec["descriptors"]}
    cv = np.full(traj.n_frames, spec["offset"], dtype=np.float64)
    for k, term in enumerate(spec["terms"]):
        d = descs[term["descriptor"]]
        atoms = [d["atoms"]]
        if d["kind"] == "distance":
            v = md.compute_distances(traj, atoms)[:, 0]
        elif d["kind"] == "angle":
            v = md.compute_angles(traj, atoms)[:, 0]
        else:
            v = md.compute_dihedrals(traj, atoms)[:, 0]
        v = {"identity": v, "cos": np.cos(v), "sin": np.sin(v)}[term["transform"]]
        w = term["weight"] * (weight_factor if k == 0 else 1.0)
        cv += w * (v - term["center"]) / term["scale"]
    return cv


def _write_values(path, values):
    lines = ["file,frame,time_ps,value"] + [f"x.xtc,{i},,{float(v)!r}" for i, v in enumerate(values)]
    path.write_text("\n".join(lines) + "\n")


def test_check_passes_the_right_engine_and_fails_one_weight_off_by_one_percent(
        demo_files, demo_result, tmp_path, capsys):
    top, states = demo_files
    traj = states["open"][0]
    # a two-term CV from the ranking if there is one, else rank 1
    spec = next((s for s in demo_result.specs if len(s["descriptors"]) > 1),
                demo_result.specs[0])
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(spec))
    good = tmp_path / "good.csv"
    _write_values(good, _engine_values(spec, top, traj))
    assert main(["check", str(spec_path), "--topology", top, "--against", str(good), traj]) == 0
    out = capsys.readouterr().out
    assert "valid spec, matches topology" in out and "PASS" in out
    bad = tmp_path / "bad.csv"
    _write_values(bad, _engine_values(spec, top, traj, weight_factor=1.01))
    assert main(["check", str(spec_path), "--topology", top, "--against", str(bad), traj]) == 1
    out = capsys.readouterr().out
    assert "FAIL" in out and "largest |deviation|" in out and "frame " in out


def test_check_tolerates_the_rounding_of_values_written_with_few_decimals(
        demo_files, demo_result, tmp_path, capsys):
    # a right engine that writes its values with 3 decimals is off by up to 5e-4 from the
    # rounding alone, more than the default tolerance here: it failed
    top, states = demo_files
    traj = states["open"][0]
    spec = demo_result.specs[0]
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(spec))
    default = 1e-3 * max(s["std"] for s in spec["states"].values())
    assert default < 5e-4
    vals = _engine_values(spec, top, traj)
    rounded = tmp_path / "rounded.txt"
    rounded.write_text("\n".join(f"{v:.3f}" for v in vals) + "\n")
    assert main(["check", str(spec_path), "--topology", top, "--against", str(rounded),
                 traj]) == 0
    out = capsys.readouterr().out
    assert (f"note: values of {rounded} written with as few as 3 decimals: each value's "
            f"tolerance is the default {default:.3g} plus half a unit in its last decimal (up "
            f"to 0.0005; --tolerance sets one tolerance as given)") in out and "PASS" in out
    # --tolerance is kept as given
    assert main(["check", str(spec_path), "--topology", top, "--against", str(rounded), traj,
                 "--tolerance", f"{default:.6g}"]) == 1
    out = capsys.readouterr().out
    assert "note: values of" not in out and "FAIL" in out
    # values written in full get no note and the default tolerance, also when one of them
    # is short (an exact 1.5 among longer texts: its own rounding, not a loose tolerance)
    full = tmp_path / "full.txt"
    full.write_text("\n".join(repr(float(v)) for v in vals) + "\n")
    assert main(["check", str(spec_path), "--topology", top, "--against", str(full), traj]) == 0
    out = capsys.readouterr().out
    assert "note: values of" not in out and f"tolerance {default:.3g})" in out
    # significant digits (%.4g): values of 3 and of 4 decimals, each with its own rounding
    sig = tmp_path / "sig.txt"
    sig.write_text("\n".join(f"{v:.4g}" for v in vals) + "\n")
    assert main(["check", str(spec_path), "--topology", top, "--against", str(sig), traj]) == 0
    assert "PASS" in capsys.readouterr().out
    # one short value among full ones does not widen the others' tolerance
    off = [repr(float(v)) for v in vals]
    off[0], off[1] = "1.5", repr(float(vals[1]) + 10 * default)
    mixed = tmp_path / "mixed.txt"
    mixed.write_text("\n".join(off) + "\n")
    assert main(["check", str(spec_path), "--topology", top, "--against", str(mixed), traj]) == 1
    out = capsys.readouterr().out
    assert "FAIL" in out and "frame 1:" in out
    # a wrong engine written with 3 decimals still fails: the CV's scale doubled
    wrong = tmp_path / "wrong.txt"
    wrong.write_text("\n".join(f"{2 * v:.3f}" for v in vals) + "\n")
    assert main(["check", str(spec_path), "--topology", top, "--against", str(wrong),
                 traj]) == 1
    assert "FAIL" in capsys.readouterr().out


def test_check_reads_one_number_per_line_and_refuses_wrong_lengths(demo_files, demo_result,
                                                                   tmp_path, capsys):
    top, states = demo_files
    traj = states["closed"][0]
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    vals = _engine_values(demo_result.specs[0], top, traj)
    plain = tmp_path / "plain.txt"
    plain.write_text("\n".join(repr(float(v)) for v in vals) + "\n")
    assert main(["check", str(spec_path), "--topology", top, "--against", str(plain), traj]) == 0
    short = tmp_path / "short.txt"
    short.write_text("\n".join(repr(float(v)) for v in vals[:10]) + "\n")
    assert main(["check", str(spec_path), "--topology", top, "--against", str(short), traj]) == 2
    assert "holds 10 values but" in capsys.readouterr().err


def test_check_without_values_validates_against_the_topology(demo_files, demo_result, tmp_path,
                                                             capsys):
    top, _ = demo_files
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    assert main(["check", str(spec_path), "--topology", top]) == 0
    t = md.load(top).atom_slice(range(11))
    other = tmp_path / "other.pdb"
    t.save_pdb(str(other))
    assert main(["check", str(spec_path), "--topology", str(other)]) == 2
    assert "11 atoms" in capsys.readouterr().err


# ------------------------------------------------------------------- the CV's range
def _spec_with(result, transforms, tmp_path):
    """The first spec of `result` whose terms use exactly these transforms, written out."""
    spec = next(s for s in result.specs if {t["transform"] for t in s["terms"]} == transforms)
    path = tmp_path / f"{spec['name']}.json"
    path.write_text(json.dumps(spec))
    return spec, path


def test_check_prints_the_ranges_and_the_states_at_a_bound_of_a_folded_cv(
        demo_files, demo_result, tmp_path, capsys):
    top, states = demo_files
    spec, path = _spec_with(demo_result, {"cos", "sin"}, tmp_path)
    assert main(["check", str(path), "--topology", top, "--trajectory",
                 *states["closed"][:1], *states["open"][:1]]) == 0
    out = capsys.readouterr().out
    low, high = spec["reachable_range"]["lower"], spec["reachable_range"]["upper"]
    assert f"range (CV units): reachable [{low:.6g}, {high:.6g}] (from the terms); observed [" \
        in out
    assert "note: state 'closed' sits at the lower bound" in out
    assert "note: state 'open' sits at the upper bound" in out
    assert out.count("lies inside the observed range") == 2  # the design runs themselves
    assert "ERROR" not in out and "PASS: every frame lies inside the CV's reachable range" in out
    # every design run, evaluated in double precision, lies inside the extremes stored from
    # single-precision features (a frame of open-3 was 6e-9 past them: "reaches values the
    # design runs did not"), and those lie inside the reachable range (3e-8 below it)
    every = [*states["closed"], *states["open"]]
    assert main(["check", str(path), "--topology", top, "--trajectory", *every]) == 0
    assert capsys.readouterr().out.count("lies inside the observed range") == len(every)
    assert low <= spec["observed_range"]["lower"] <= spec["observed_range"]["upper"] <= high
    for st in spec["states"].values():
        assert low <= st["min"] <= st["max"] <= high


def test_check_reports_frames_beyond_the_observed_range_as_information(
        demo_files, demo_result, tmp_path, capsys):
    # a distance CV on frames stretched by 30 %: longer distances than any input frame had,
    # which the CV can reach (no largest distance) but the design runs did not
    top, states = demo_files
    spec, path = _spec_with(demo_result, {"identity"}, tmp_path)
    assert spec["reachable_range"]["upper"] is None
    traj = md.load(states["open"][0], top=top)[:50]
    traj.xyz[25:] *= 1.3
    stretched = tmp_path / "stretched.xtc"
    traj.save_xtc(str(stretched))
    assert main(["check", str(path), "--topology", top, "--trajectory", str(stretched)]) == 0
    out = capsys.readouterr().out
    assert "reachable [" in out and ", +inf] (from the terms)" in out and "note:" not in out
    beyond = re.search(r"info: (\d+) of 50 frames of \S+ \([\d.]+%\) lie outside the observed "
                       r"range", out)
    assert beyond and 1 <= int(beyond.group(1)) <= 25, out
    values = load_spec(path).evaluate(md.load(str(stretched), top=top))
    assert int(beyond.group(1)) == int(np.sum(values > spec["observed_range"]["upper"]))
    assert "ERROR" not in out and "PASS" in out


def test_check_fails_on_engine_values_beyond_the_reachable_range(demo_files, demo_result,
                                                                tmp_path, capsys):
    # an 'engine' that forgot the cos and sin transforms: the dihedral itself in rad, beyond
    # what cos and sin can give
    top, states = demo_files
    spec, path = _spec_with(demo_result, {"cos", "sin"}, tmp_path)
    traj = states["open"][0]
    forgot = dict(spec, terms=[dict(t, transform="identity") for t in spec["terms"]])
    values = tmp_path / "forgot.csv"
    _write_values(values, _engine_values(forgot, top, traj))
    assert main(["check", str(path), "--topology", top, "--against", str(values), traj]) == 1
    out = capsys.readouterr().out
    assert re.search(r"ERROR: \d+ of 2000 values of \S+forgot.csv \(the engine's\) lie outside "
                     r"the reachable range", out), out
    assert "the engine computes another CV" in out
    assert "FAIL: values outside the CV's reachable range" in out
    # the right engine passes the same check
    good = tmp_path / "good.csv"
    _write_values(good, _engine_values(spec, top, traj))
    assert main(["check", str(path), "--topology", top, "--against", str(good), traj]) == 0
    assert "ERROR" not in capsys.readouterr().out


def test_check_fails_when_the_reference_values_leave_the_reachable_range(
        demo_files, demo_result, tmp_path, capsys, monkeypatch):
    # impossible with a valid spec (the stored range is checked against the terms); a spec
    # whose range claims less than its terms reach stands in for a wrong spec or evaluator
    top, states = demo_files
    _, path = _spec_with(demo_result, {"cos", "sin"}, tmp_path)
    monkeypatch.setattr(Spec, "reachable_range", property(lambda self: (-0.5, 0.5)))
    assert main(["check", str(path), "--topology", top, "--trajectory", states["open"][0]]) == 1
    out = capsys.readouterr().out
    assert re.search(r"ERROR: 2000 of 2000 frames of \S+open-1.xtc \(reference evaluator\) lie "
                     r"outside the reachable range \[-0.5, 0.5\] of the CV \(lowest ", out), out
    assert "the spec, its stored range or the evaluator is wrong" in out
    assert "FAIL: values outside the CV's reachable range" in out


def test_check_refuses_column_without_against(demo_files, demo_result, tmp_path, capsys):
    top, states = demo_files
    _, path = _spec_with(demo_result, {"cos", "sin"}, tmp_path)
    assert main(["check", str(path), "--topology", top, "--trajectory", states["open"][0],
                 "--column", "2"]) == 2
    assert "--column goes with --against VALUES TRAJ" in capsys.readouterr().err


# ------------------------------------------------------------------- a periodic CV
def _torsion_files(tmp_path, rng, n_frames=600):
    """(topology, trajectory) of four carbons whose dihedral runs over the whole circle, and
    the dihedral of each frame (rad, from the written file), with no frame near +-pi."""
    top = md.Topology()
    res = top.add_residue("TOR", top.add_chain(), resSeq=1)
    for name in ("C1", "C2", "C3", "C4"):
        top.add_atom(name, md.element.carbon, res)
    phi = rng.uniform(-np.pi, np.pi, n_frames)
    phi = phi[np.pi - np.abs(phi) > 0.05]  # no frame at the branch cut (rules: no test on it)
    xyz = np.zeros((phi.size, 4, 3))
    xyz[:, 0] = [0.15, 0.0, 0.0]
    xyz[:, 1] = [0.0, 0.0, 0.0]
    xyz[:, 2] = [0.0, 0.0, 0.15]
    xyz[:, 3] = np.stack([0.15 * np.cos(phi), 0.15 * np.sin(phi), np.full(phi.size, 0.15)],
                         axis=1)
    traj = md.Trajectory(xyz, top)
    pdb, dcd = tmp_path / "tor.pdb", tmp_path / "tor.dcd"
    traj[0].save_pdb(str(pdb))
    traj.save_dcd(str(dcd))
    back = md.load(str(dcd), top=str(pdb))
    return str(pdb), str(dcd), md.compute_dihedrals(back, [[0, 1, 2, 3]])[:, 0].astype(float)


def _torsion_spec(tmp_path, top, *, weight=1.0, scale=1.0, center=0.0, observed=None):
    spec = Spec(name="tor", topology=md.load(top).topology,
                descriptors=[{"id": "phi", "kind": "dihedral", "atoms": [0, 1, 2, 3]}],
                terms=[{"descriptor": "phi", "transform": "identity", "center": center,
                        "scale": scale, "weight": weight}], periodic=True,
                states={"A": {"mean": 0.0, "std": 0.3, "n_frames": 10}},
                observed_range=observed)
    path = tmp_path / "tor.json"
    spec.save(str(path))
    return spec, str(path)


def test_check_compares_a_periodic_cv_modulo_its_period(tmp_path, capsys):
    # an engine that gives the dihedral in [0, 2 pi) instead of (-pi, pi]: the same CV, whose
    # values differ from the reference by one period on half the frames
    rng = np.random.default_rng(71)
    top, traj, _ = _torsion_files(tmp_path, rng)
    spec, path = _torsion_spec(tmp_path, top)
    ref = spec.evaluate(md.load(traj, top=top))
    shifted = tmp_path / "engine.txt"
    shifted.write_text("\n".join(repr(float(v)) for v in np.mod(ref, 2 * np.pi)) + "\n")
    assert main(["check", path, "--topology", top, "--against", str(shifted), traj]) == 0
    out = capsys.readouterr().out
    assert "note: the CV is periodic with period 6.28319 (CV units)" in out
    assert "compared with the reference modulo the period" in out
    assert re.search(r"largest \|deviation\| \S+ \(modulo the period 6.28319; tolerance", out), out
    assert "ERROR" not in out and "PASS: the values agree with the reference evaluator" in out
    # an engine off by 0.01 rad still fails, with the deviation taken modulo the period
    off = tmp_path / "off.txt"
    off.write_text("\n".join(repr(float(v)) for v in np.mod(ref + 0.01, 2 * np.pi)) + "\n")
    assert main(["check", path, "--topology", top, "--against", str(off), traj]) == 1
    out = capsys.readouterr().out
    worst = re.search(r"largest \|deviation\| ([\d.e-]+) \(modulo the period 6.28319;", out)
    assert worst and abs(float(worst.group(1)) - 0.01) < 1e-4, out
    assert "FAIL: the values differ from the reference evaluator" in out


def test_check_takes_the_period_of_a_scaled_periodic_cv_from_the_spec(tmp_path, capsys):
    # weight 2, scale 0.5, centre 1 rad: period 8 pi; an engine's values shifted by whole
    # periods (another choice of the angle's interval) agree, a shift by 2 pi does not
    rng = np.random.default_rng(72)
    top, traj, _ = _torsion_files(tmp_path, rng, n_frames=200)
    spec, path = _torsion_spec(tmp_path, top, weight=2.0, scale=0.5, center=1.0)
    assert spec.period == 8 * np.pi
    ref = spec.evaluate(md.load(traj, top=top))
    turns = rng.integers(-2, 3, ref.size)
    whole = tmp_path / "whole.txt"
    whole.write_text("\n".join(repr(float(v)) for v in ref + turns * spec.period) + "\n")
    assert main(["check", path, "--topology", top, "--against", str(whole), traj]) == 0
    assert "PASS" in capsys.readouterr().out
    half = tmp_path / "half.txt"  # 2 pi is a quarter of this CV's period: another CV value
    half.write_text("\n".join(repr(float(v)) for v in ref + 2 * np.pi) + "\n")
    assert main(["check", path, "--topology", top, "--against", str(half), traj]) == 1
    out = capsys.readouterr().out
    assert "largest |deviation| 6.28 (modulo the period 25.1327; " in out and "FAIL" in out


def test_check_takes_the_observed_range_of_a_periodic_cv_modulo_its_period(tmp_path, capsys):
    # a state around pi, its observed range written as [2.9, 3.4] rad (beyond pi): frames at
    # -3.1 rad are the same angle as 3.18 rad and lie inside it
    rng = np.random.default_rng(73)
    top, traj, phi = _torsion_files(tmp_path, rng, n_frames=300)
    spec, path = _torsion_spec(tmp_path, top, observed=(2.9, 3.4))
    assert main(["check", path, "--topology", top, "--trajectory", traj]) == 0
    out = capsys.readouterr().out
    ref = spec.evaluate(md.load(traj, top=top))
    assert np.allclose(ref, phi, atol=1e-6)
    inside = np.mod(ref - 2.9, 2 * np.pi) <= 0.5
    assert (ref[inside] < 0).any() and (ref[inside] > 0).any()  # on both sides of the cut
    assert (f"info: {int((~inside).sum())} of {phi.size} frames of {traj} "
            f"({100.0 * (~inside).sum() / phi.size:.1f}%) lie outside the observed range "
            "[2.9, 3.4] (modulo the period)") in out, out
