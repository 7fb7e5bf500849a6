"""The cvdesign command end to end, and its errors on bad input."""

import csv
import json
import subprocess
import sys

import mdtraj as md
import numpy as np
import pytest

from cvdesign.cli import main


def _suggest_args(demo_files, out, *extra, states=None):
    top, all_states = demo_files
    states = all_states if states is None else states
    args = ["suggest", "--topology", top]
    for name, files in states.items():
        args += ["--state", name, *files]
    return args + ["--out", str(out), "--max-terms", "2", "--suggestions", "3", *extra]


def test_suggest_then_apply_end_to_end(demo_files, tmp_path, capsys):
    out = tmp_path / "out"  # the report is left out: tests/test_report.py checks it
    assert main(_suggest_args(demo_files, out, "--no-report")) == 0
    printed = capsys.readouterr().out
    assert "rank" in printed and "cv-01.json" in printed and "caution" in printed
    assert {p.name for p in out.iterdir()} >= {"ranking.csv", "ranking.json", "scorecard.csv",
                                              "summary.md", "cv-01.json"}
    ranking = json.loads((out / "ranking.json").read_text())["ranking"]
    assert ranking[0]["spec"] == "cv-01.json"
    assert ranking[0]["terms"][0]["atoms"]
    top, states = demo_files
    csv_out = tmp_path / "values.csv"
    assert main(["apply", str(out / "cv-01.json"), "--topology", top, states["closed"][0],
                 states["open"][0], "--out", str(csv_out)]) == 0
    rows = list(csv.DictReader(csv_out.open()))
    assert list(rows[0]) == ["file", "frame", "time_ps", "value", "undefined"]
    assert {r["undefined"] for r in rows} == {""}  # every descriptor defined
    spec = json.loads((out / "cv-01.json").read_text())
    closed = np.array([float(r["value"]) for r in rows if r["file"].startswith("closed")])
    opened = np.array([float(r["value"]) for r in rows if r["file"].startswith("open")])
    assert closed.size == opened.size == 2000
    assert float(rows[1]["time_ps"]) - float(rows[0]["time_ps"]) == pytest.approx(0.2)
    lo, hi = spec["states"]["closed"]["mean"], spec["states"]["open"]["mean"]
    assert closed.mean() < 0.5 * (lo + hi) < opened.mean()
    # Round trip over all input files of each state: the means stored in the spec.
    csv_all = tmp_path / "all.csv"
    assert main(["apply", str(out / "cv-01.json"), "--topology", top, *states["closed"],
                 *states["open"], "--out", str(csv_all)]) == 0
    rows = list(csv.DictReader(csv_all.open()))
    for state in states:
        v = np.array([float(r["value"]) for r in rows if r["file"].startswith(state)])
        assert v.mean() == pytest.approx(spec["states"][state]["mean"], rel=1e-5)


def test_installed_package_ships_the_demo_data():
    # The README's first command installs the package and runs the demo from anywhere,
    # so the wheel must carry the data (not only the source tree).
    import site
    from importlib import metadata

    found = list(metadata.distributions(name="cvdesign", path=site.getsitepackages()))
    if not found:
        pytest.skip("cvdesign is not installed in this environment's site-packages")
    dist = found[0]
    direct = json.loads(dist.read_text("direct_url.json") or "{}")
    if direct.get("dir_info", {}).get("editable"):
        pytest.skip("editable install: the data are read from the source tree")
    names = {str(f).replace("\\", "/") for f in dist.files or []}
    assert "cvdesign/demo_data/manifest.json" in names
    assert "cvdesign/demo_data/latch.pdb" in names
    assert "cvdesign/spec/schema/spec-v1.json" in names


def test_demo_command_runs_and_points_at_the_slow_dihedral(tmp_path, capsys):
    # the whole demo, report included, runs in tests/test_regressions_io.py (the console
    # script) and tests/test_report.py; here the command's own output, without the report
    assert main(["demo", "--out", str(tmp_path / "d"), "--no-report"]) == 0
    out = capsys.readouterr().out
    assert "slow by construction; rank 1 uses it" in out
    assert (tmp_path / "d" / "summary.md").read_text().startswith("# cvdesign suggest")
    assert not (tmp_path / "d" / "report.html").exists()


def test_console_entry_point_help_explains_units():
    res = subprocess.run([sys.executable, "-m", "cvdesign.cli", "suggest", "--help"],
                         capture_output=True, text=True, check=True)
    assert "--cutoff NM" in res.stdout and "in nm" in res.stdout
    res = subprocess.run([sys.executable, "-m", "cvdesign.cli", "apply", "--help"],
                         capture_output=True, text=True, check=True)
    assert "time_ps" in res.stdout and "nm" in res.stdout


def _fails(args, capsys, pattern):
    assert main(args) == 2
    err = capsys.readouterr().err
    assert pattern in err, err
    return err


def test_missing_file_is_named_and_nothing_written(demo_files, tmp_path, capsys):
    out = tmp_path / "out"
    top, states = demo_files
    bad = {"closed": states["closed"], "open": [str(tmp_path / "nope.xtc")]}
    _fails(_suggest_args(demo_files, out, states=bad), capsys,
           f"trajectory file '{tmp_path / 'nope.xtc'}' does not exist")
    assert not out.exists()
    _fails(["suggest", "--topology", str(tmp_path / "x.pdb"), "--state", "a", states["closed"][0],
            "--state", "b", states["open"][0], "--out", str(out)], capsys,
           "topology file")
    assert not out.exists()


def test_atom_count_mismatch_is_refused(demo_files, tmp_path, capsys):
    top, states = demo_files
    short = md.load(states["open"][0], top=top).atom_slice(range(10))
    path = tmp_path / "short.xtc"
    short.save_xtc(str(path))
    out = tmp_path / "out"
    _fails(_suggest_args(demo_files, out, states={"closed": states["closed"], "open": [str(path)]}),
           capsys, "has 10 atoms but the topology")
    assert not out.exists()


def test_only_one_state_is_refused(demo_files, tmp_path, capsys):
    out = tmp_path / "out"
    _, states = demo_files
    _fails(_suggest_args(demo_files, out, states={"closed": states["closed"]}), capsys,
           "only one state was given ('closed')")
    assert not out.exists()


def test_selection_matching_nothing_is_refused(demo_files, tmp_path, capsys):
    out = tmp_path / "out"
    _fails(_suggest_args(demo_files, out, "--select", "name CA"), capsys,
           "selection 'name CA' matches no atoms")
    assert not out.exists()


def test_nonempty_output_directory_needs_force(demo_files, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(_suggest_args(demo_files, out)) == 0  # with its report
    (out / "keep.txt").write_text("mine")
    _fails(_suggest_args(demo_files, out), capsys, "exists and is not empty")
    assert (out / "keep.txt").exists()
    # --force replaces an earlier cvdesign output, and only that: never a file of the
    # user's inside it
    _fails(_suggest_args(demo_files, out, "--force"), capsys,
           "holds 1 file(s) cvdesign did not write (e.g. 'keep.txt'), which --force would "
           "delete")
    assert (out / "keep.txt").read_text() == "mine"
    (out / "keep.txt").unlink()
    (out / "cv-01.json").write_text("{}")
    # the earlier output, report included, is replaced (the new one without a report)
    assert main(_suggest_args(demo_files, out, "--force", "--no-report")) == 0
    assert not (out / "report.html").exists()
    assert (out / "cv-01.json").read_text() != "{}"
    other = tmp_path / "mine"
    other.mkdir()
    (other / "notes.txt").write_text("precious")
    _fails(_suggest_args(demo_files, other, "--force"), capsys, "was not written by cvdesign")
    assert (other / "notes.txt").read_text() == "precious"


def test_force_never_writes_over_the_inputs(demo_files, tmp_path, capsys, monkeypatch):
    import shutil

    top, states = demo_files
    work = tmp_path / "work"
    work.mkdir()
    for f in [top, states["closed"][0], states["open"][0]]:
        shutil.copy(f, work)
    args = ["suggest", "--topology", str(work / "latch.pdb"), "--state", "closed",
            str(work / "closed-1.xtc"), "--state", "open", str(work / "open-1.xtc")]
    _fails(args + ["--out", str(work), "--force"], capsys, "contains an input file")
    assert sorted(p.name for p in work.iterdir()) == ["closed-1.xtc", "latch.pdb", "open-1.xtc"]
    monkeypatch.chdir(work)
    _fails(args + ["--out", ".", "--force"], capsys, "is the current directory")


def test_state_given_twice_and_state_without_files(demo_files, tmp_path, capsys):
    top, states = demo_files
    out = tmp_path / "out"
    _fails(["suggest", "--topology", top, "--state", "a", states["closed"][0], "--state", "a",
            states["open"][0], "--out", str(out)], capsys, "state 'a' is given twice")
    _fails(["suggest", "--topology", top, "--state", "a", "--state", "b", states["open"][0],
            "--out", str(out)], capsys, "--state a has no trajectory files")
    assert not out.exists()


def test_apply_against_another_topology_names_first_mismatch(demo_files, demo_result, tmp_path,
                                                             capsys):
    top, states = demo_files
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    # Rename one atom used by the rank-1 CV.
    t = md.load(top)
    used = demo_result.specs[0]["descriptors"][0]["atoms"][1]
    t.topology.atom(used).name = "X9"
    other = tmp_path / "other.pdb"
    t.save_pdb(str(other))
    err = _fails(["apply", str(spec_path), "--topology", str(other), states["closed"][0]], capsys,
                 f"atom {used}")
    assert "X9" in err
    # Another atom count.
    t2 = md.load(top).atom_slice(range(11))
    other2 = tmp_path / "other2.pdb"
    t2.save_pdb(str(other2))
    _fails(["apply", str(spec_path), "--topology", str(other2), states["closed"][0]], capsys,
           "11 atoms")


def _three_atoms_with_two_coincident(tmp_path):
    """A 3-atom PDB whose first two atoms coincide (their angle is undefined) and a spec of
    that angle."""
    from cvdesign import Spec

    top = md.Topology()
    residue = top.add_residue("LIG", top.add_chain())
    for name in ("C1", "C2", "C3"):
        top.add_atom(name, md.element.carbon, residue)
    xyz = np.array([[[0.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.3, 0.1, 0.0]]], dtype=np.float32)
    pdb = tmp_path / "lig.pdb"
    md.Trajectory(xyz, top).save_pdb(str(pdb))
    spec = Spec(name="cv-01", topology=top,
                descriptors=[{"id": "a", "kind": "angle", "atoms": [0, 1, 2]}],
                terms=[{"descriptor": "a", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 1.0}])
    path = tmp_path / "cv.json"
    path.write_text(spec.to_json())
    return pdb, path


def test_geometry_warnings_go_through_the_command_s_log_on_stderr(tmp_path, capsys):
    pdb, spec = _three_atoms_with_two_coincident(tmp_path)
    assert main(["apply", str(spec), "--topology", str(pdb), str(pdb)]) == 0
    captured = capsys.readouterr()
    assert ("cvdesign apply: warning: lig.pdb: 1 of 1 frames (frame 0) hold a stand-in value "
            "for an undefined descriptor of the CV: angle 'a' (an arm of zero length: set to "
            "pi/2 rad)") in captured.err
    assert "GeometryWarning" not in captured.err  # not Python's file:line form
    assert captured.out.splitlines()[1].endswith(",a")  # the undefined column
    assert main(["-q", "apply", str(spec), "--topology", str(pdb), str(pdb)]) == 0
    captured = capsys.readouterr()
    assert "warning" not in captured.err  # -q hides warnings, not the column
    assert captured.out.splitlines()[1].endswith(",a")
