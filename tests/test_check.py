"""`cvdesign check`: a spec against a topology, and an engine's values against the evaluator."""

import json

import mdtraj as md
import numpy as np

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
