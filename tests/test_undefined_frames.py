"""Frames whose CV value stands in for undefined geometry: the outputs of `apply` and
`check` say which they are, with -q too.

The trajectories are built by hand, without randomness: five atoms in a chain, frames that
are all the same but for collinear atoms (an undefined dihedral) or two coincident atoms
(an undefined dihedral and an angle with an arm of zero length).
"""

import csv
import io
import math
import warnings

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Spec
from cvdesign.cli import main
from cvdesign.geometry import GeometryWarning

_BASE = np.array([[0, 0, 0], [0.15, 0, 0], [0.22, 0.13, 0], [0.37, 0.13, 0.05],
                  [0.45, 0.25, 0.05]])


def _chain(tmp_path, n_frames, collinear=(), coincident=()):
    """A five-atom chain (topology q.pdb, trajectory q.xtc of `n_frames` frames, one ps
    apart) and a spec (q.json) of a dihedral ``t`` (atoms 0-3, as cos) and an angle ``a``
    (atoms 0-2), with a distance ``d`` no term uses; frames `collinear` put atoms 0-2 on a
    line (``t`` undefined), frames `coincident` put atoms 1 and 2 on one point (``t`` and
    ``a`` undefined)."""
    top = md.Topology()
    res = top.add_residue("QQX", top.add_chain(), resSeq=3)
    for name in ("C1", "C2", "C3", "C4", "O5"):
        top.add_atom(name, md.element.oxygen if name[0] == "O" else md.element.carbon, res)
    for i in range(4):
        top.add_bond(top.atom(i), top.atom(i + 1))
    xyz = np.repeat(_BASE[None], n_frames, axis=0).astype(np.float32)
    for f in collinear:
        xyz[f, :3] = [[0, 0, 0], [0.15, 0, 0], [0.30, 0, 0]]
    for f in coincident:
        xyz[f, 1] = xyz[f, 2]
    md.Trajectory(xyz[:1], top).save_pdb(str(tmp_path / "q.pdb"))
    md.Trajectory(xyz, top, time=np.arange(n_frames, dtype=float)).save_xtc(
        str(tmp_path / "q.xtc"))
    spec = Spec(name="q", topology=top,
                descriptors=[{"id": "t", "kind": "dihedral", "atoms": [0, 1, 2, 3]},
                             {"id": "a", "kind": "angle", "atoms": [0, 1, 2]},
                             {"id": "d", "kind": "distance", "atoms": [1, 2]}],
                terms=[{"descriptor": "t", "transform": "cos", "center": 0.0, "scale": 1.0,
                        "weight": 1.0},
                       {"descriptor": "a", "transform": "identity", "center": 2.0,
                        "scale": 0.1, "weight": 0.5}],
                states={"A": {"mean": 0.5, "std": 0.1, "n_frames": 10},
                        "B": {"mean": 2.5, "std": 0.2, "n_frames": 10}})
    spec.save(tmp_path / "q.json")
    return spec, xyz


def _paths(tmp_path):
    return str(tmp_path / "q.json"), str(tmp_path / "q.pdb"), str(tmp_path / "q.xtc")


def test_evaluate_says_which_descriptors_stand_in_for_undefined_geometry(tmp_path):
    spec, xyz = _chain(tmp_path, 5, collinear=[2], coincident=[4])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GeometryWarning)
        values, undefined = spec.evaluate(xyz, undefined=True)
        plain = spec.evaluate(xyz)
        values_g, grad, undefined_g = spec.evaluate(xyz, gradient=True, undefined=True)
    expected = np.zeros((5, 3), dtype=bool)
    expected[2, 0] = expected[4, 0] = expected[4, 1] = True  # the distance is always defined
    np.testing.assert_array_equal(undefined, expected)
    np.testing.assert_array_equal(undefined_g, expected)
    np.testing.assert_array_equal(values, plain)
    np.testing.assert_array_equal(values_g, plain)
    assert grad.shape == (5, 5, 3)
    # the stand-ins: cos 0 = 1 for the dihedral, pi/2 for the angle
    assert values[2] == pytest.approx(1.0 + 0.5 * (math.pi - 2.0) / 0.1)  # angle a: pi
    assert values[4] == pytest.approx(1.0 + 0.5 * (math.pi / 2 - 2.0) / 0.1)


def test_apply_quiet_marks_the_stand_in_frames_in_its_csv(tmp_path, capsys):
    spec_path, top, traj = _paths(tmp_path)
    _chain(tmp_path, 5, collinear=[2], coincident=[4])
    out = tmp_path / "values.csv"
    assert main(["apply", "-q", spec_path, "--topology", top, traj, "--out", str(out)]) == 0
    captured = capsys.readouterr()
    assert captured.err == "" and captured.out == ""
    rows = list(csv.DictReader(out.open()))
    assert list(rows[0]) == ["file", "frame", "time_ps", "value", "undefined"]
    assert [r["undefined"] for r in rows] == ["", "", "t", "", "t a"]
    # the values themselves are the evaluator's, stand-ins included (marked, not dropped)
    assert float(rows[4]["value"]) == pytest.approx(1.0 + 0.5 * (math.pi / 2 - 2.0) / 0.1)
    # on standard output, -q or not, the same column
    assert main(["apply", "-q", spec_path, "--topology", top, traj]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert [r["undefined"] for r in rows] == ["", "", "t", "", "t a"]


def test_apply_warns_with_the_files_own_frame_numbers_past_the_first_chunk(tmp_path, capsys):
    spec_path, top, traj = _paths(tmp_path)
    _chain(tmp_path, 1203, collinear=[3], coincident=[1202])  # chunks of 500 frames
    assert main(["apply", spec_path, "--topology", top, traj]) == 0
    captured = capsys.readouterr()
    rows = list(csv.DictReader(io.StringIO(captured.out)))
    assert len(rows) == 1203
    assert {int(r["frame"]): r["undefined"] for r in rows if r["undefined"]} == {3: "t",
                                                                                1202: "t a"}
    lines = captured.err.splitlines()
    assert len(lines) == 1, captured.err
    assert lines[0].startswith("cvdesign apply: warning: q.xtc: 2 of 1203 frames (frames 3, "
                               "1202) hold a stand-in value for an undefined descriptor")
    assert "dihedral 't'" in lines[0] and "angle 'a'" in lines[0] and "'d'" not in lines[0]


def test_apply_help_describes_the_undefined_column_and_what_quiet_keeps(capsys):
    with pytest.raises(SystemExit):
        main(["apply", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "undefined (empty, or the ids of the CV's descriptors that are undefined" in text
    assert "(the output files keep the warnings)" not in text
    assert "apply's CSV marks the frames whose value stands in for undefined geometry" in text


def test_check_prints_the_stand_in_frames_on_standard_output_with_quiet(tmp_path, capsys):
    spec_path, top, traj = _paths(tmp_path)
    spec, xyz = _chain(tmp_path, 5, collinear=[2], coincident=[4])
    assert main(["check", "-q", spec_path, "--topology", top, "--trajectory", traj]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    assert ("warning: " + str(traj) + ": 2 of 5 frames (frames 2, 4) hold a stand-in value "
            "for an undefined descriptor of the CV") in captured.out
    # an engine that gives frame 2 another value: the listed frame says why it may differ
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GeometryWarning)
        theirs = spec.evaluate(xyz.astype(np.float64))
    theirs[2] -= 1.0  # (still inside the reachable range)
    values = tmp_path / "engine.dat"
    values.write_text("".join(f"{float(v)!r}\n" for v in theirs))
    assert main(["check", "-q", spec_path, "--topology", top, "--against", str(values),
                 traj]) == 1
    out = capsys.readouterr().out
    (line,) = [x for x in out.splitlines() if x.startswith("    frame 2:")]
    assert line.endswith("(the reference holds a stand-in value for an undefined descriptor; "
                         "see the warning above)")
