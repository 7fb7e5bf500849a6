"""`cvdesign check --against` reads the usual shapes of engine output.

Whitespace-separated columns with '#' and '@' comment lines, a column chosen by number
(1-based) or by a CSV header name, and the CSV that `cvdesign apply` writes. The
'engine' values are computed independently with mdtraj's geometry (McGibbon et al.,
Biophys. J. 109:1528, 2015) from the same frames.
"""

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Spec
from cvdesign.cli import main


@pytest.fixture(scope="module")
def setup(demo_files, tmp_path_factory):
    """(spec path, topology, trajectory, engine CV values, frame times in ps)."""
    top, states = demo_files
    traj_path = states["open"][0]
    d = tmp_path_factory.mktemp("check")
    spec = Spec(name="cv-contact", topology=md.load_topology(top),
                descriptors=[{"id": "d0", "kind": "distance", "atoms": [0, 7]}],
                terms=[{"descriptor": "d0", "transform": "identity", "center": 0.7,
                        "scale": 0.1, "weight": 2.0}],
                states={"open": {"mean": 0.0, "std": 0.5, "n_frames": 2000}})
    spec.save(d / "cv.json")
    traj = md.load(traj_path, top=top)
    values = 2.0 * (md.compute_distances(traj, [[0, 7]])[:, 0].astype(np.float64) - 0.7) / 0.1
    return str(d / "cv.json"), top, traj_path, values, traj.time.astype(np.float64)


def _check(setup, values_path, *extra):
    spec, top, traj, _, _ = setup
    return main(["check", spec, "--topology", top, "--against", str(values_path), traj, *extra])


def _engine_table(times, values, wrong):
    """Columns: time (ps), the CV, a wrong CV (the CV plus 1)."""
    return [f"{t:12.4f} {v:16.9f} {w:16.9f}" for t, v, w in zip(times, values, wrong)]


def test_whitespace_columns_with_comments_pick_the_column_by_number(setup, tmp_path, capsys):
    *_, values, times = setup
    lines = (["# engine output", "# columns: time cv other", "@    title \"CV\"",
              "@    xaxis label \"t (ps)\""] + _engine_table(times, values, values + 1.0))
    path = tmp_path / "cv.dat"
    path.write_text("\n".join(lines) + "\n")
    assert _check(setup, path, "--column", "2") == 0
    assert "PASS" in capsys.readouterr().out
    assert _check(setup, path, "--column", "3") == 1  # the wrong column fails
    assert "FAIL" in capsys.readouterr().out
    assert _check(setup, path) == 2  # three columns, none named: refused
    assert "--column N" in capsys.readouterr().err


def test_csv_column_by_header_name_and_a_leading_frame_column(setup, tmp_path, capsys):
    *_, values, times = setup
    path = tmp_path / "cv.csv"
    path.write_text("frame,time,contact_cv\n" + "".join(
        f"{i},{float(t)!r},{float(v)!r}\n" for i, (t, v) in enumerate(zip(times, values))))
    assert _check(setup, path, "--column", "contact_cv") == 0
    assert "PASS" in capsys.readouterr().out
    assert _check(setup, path, "--column", "CONTACT_CV") == 0  # names ignore case
    capsys.readouterr()
    assert _check(setup, path) == 2
    assert "the first column looks like a frame index" in capsys.readouterr().err


def test_a_csv_saved_with_a_byte_order_mark_keeps_its_first_column_name(setup, tmp_path,
                                                                          capsys):
    *_, values, _ = setup
    path = tmp_path / "cv.csv"
    path.write_bytes(("contact_cv,frame\n" + "".join(
        f"{float(v)!r},{i}\n" for i, v in enumerate(values))).encode("utf-8-sig"))
    assert _check(setup, path, "--column", "contact_cv") == 0
    assert "PASS" in capsys.readouterr().out


def test_a_frame_column_aligns_values_given_for_some_frames(setup, tmp_path, capsys):
    *_, values, _ = setup
    picked = [5, 17, 1999]
    path = tmp_path / "some.csv"
    path.write_text("frame,value\n" + "".join(f"{i},{float(values[i])!r}\n" for i in picked))
    assert _check(setup, path) == 0
    assert "3 frames" in capsys.readouterr().out
    shifted = tmp_path / "shifted.csv"
    shifted.write_text("frame,value\n" + "".join(f"{i + 1},{float(values[i])!r}\n"
                                                  for i in picked[:2]))
    assert _check(setup, shifted) == 1  # values attached to the wrong frames fail


def test_apply_output_checks_back_against_the_reference(setup, tmp_path, capsys):
    spec, top, traj, _, _ = setup
    out = tmp_path / "applied.csv"
    assert main(["apply", spec, "--topology", top, traj, "--out", str(out)]) == 0
    assert _check(setup, out) == 0
    assert "PASS" in capsys.readouterr().out


def test_apply_output_of_two_trajectories_uses_the_rows_of_the_one_checked(
        setup, demo_files, tmp_path, capsys):
    # the rows of both files were compared with one file's frames: a false FAIL
    spec, top, traj, _, _ = setup
    other = demo_files[1]["closed"][0]
    out = tmp_path / "applied.csv"
    assert main(["apply", spec, "--topology", top, other, traj, "--out", str(out)]) == 0
    capsys.readouterr()
    assert _check(setup, out) == 0
    said = capsys.readouterr().out
    assert "vs " + traj + ": 2000 frames" in said and "PASS" in said
    before = sorted(tmp_path.iterdir())
    third = demo_files[1]["closed"][1]
    assert main(["check", spec, "--topology", top, "--against", str(out), third]) == 2
    err = capsys.readouterr().err
    assert (f"values file '{out}' has a 'file' column naming 'closed-1.xtc', 'open-1.xtc', "
            f"not trajectory '{third}'; give the trajectory whose values it holds (one of "
            "those, by that name or a path to it)") in err
    assert sorted(tmp_path.iterdir()) == before


def test_apply_names_two_trajectories_of_one_name_by_their_paths(setup, demo_files, tmp_path,
                                                                 capsys):
    # both were named 'run.xtc' in the 'file' column: check took the rows of both as one file
    import shutil

    spec, top, traj, _, _ = setup
    paths = []
    for sub, src in (("a", demo_files[1]["closed"][0]), ("b", traj)):
        (tmp_path / sub).mkdir()
        paths.append(str(tmp_path / sub / "run.xtc"))
        shutil.copy(src, paths[-1])
    out = tmp_path / "applied.csv"
    assert main(["apply", spec, "--topology", top, *paths, "--out", str(out)]) == 0
    files = [line.split(",")[0] for line in out.read_text().splitlines()[1:]]
    assert sorted(set(files)) == paths
    capsys.readouterr()
    assert main(["check", spec, "--topology", top, "--against", str(out), paths[1]]) == 0
    said = capsys.readouterr().out
    assert "vs " + paths[1] + ": 2000 frames" in said and "PASS" in said
    # the same file by another spelling of its path (apply got it absolute)
    import os
    other = os.path.relpath(paths[1])
    assert other != paths[1]
    assert main(["check", spec, "--topology", top, "--against", str(out), other]) == 0
    assert "PASS" in capsys.readouterr().out


def test_a_frame_named_twice_is_refused_naming_the_lines(setup, tmp_path, capsys):
    *_, values, _ = setup
    path = tmp_path / "twice.csv"  # frame 4 twice, 5 missing: was a FAIL blaming the engine
    path.write_text("frame,value\n" + "".join(f"{i},{float(values[i])!r}\n"
                                              for i in (2, 3, 4, 4, 6)))
    before = sorted(tmp_path.iterdir())
    assert _check(setup, path) == 2
    out, err = capsys.readouterr()
    assert f"values file '{path}' names frame 4 twice (lines 4 and 5); give one value" in err
    assert "FAIL" not in out and sorted(tmp_path.iterdir()) == before


def test_apply_writes_stored_times_as_the_shortest_text_of_their_single_precision(
        setup, tmp_path):
    # time_ps was written with float32 noise: 1.600000023841858 for a frame at 1.6 ps
    spec, top, traj, _, times = setup
    out = tmp_path / "applied.csv"
    assert main(["apply", spec, "--topology", top, traj, "--out", str(out)]) == 0
    texts = [line.split(",")[2] for line in out.read_text().splitlines()[1:]]
    assert texts[:9] == ["0.0", "0.2", "0.4", "0.6", "0.8", "1.0", "1.2", "1.4", "1.6"]
    stored = np.float32(times)
    assert np.array_equal(np.array(texts, dtype=np.float32), stored)  # nothing lost
