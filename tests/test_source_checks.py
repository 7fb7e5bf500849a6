"""Reading trajectories (issue 9): stored times that do not increase, non-finite coordinates."""

import json

import mdtraj as md
import numpy as np
import pytest

from cvdesign import InputError, Source, suggest
from cvdesign.cli import main
from cvdesign.pipeline.explore import propose_states
from cvdesign.io.source import MAX_COORDINATE_NM


def _copy(src, dst, top, *, n_frames=300, time=None, bad=None):
    """Write the first `n_frames` of `src` to `dst` (format from the suffix), with the
    given stored times and, for `bad = (frame, atom, value)`, one coordinate replaced."""
    traj = md.load(src, top=top)[:n_frames]
    if time is not None:
        traj.time = np.asarray(time, dtype=np.float64)
    if bad is not None:
        frame, atom, value = bad
        traj.xyz[frame, atom, 1] = value
    traj.save(str(dst))
    return str(dst)


@pytest.fixture(scope="module")
def demo_two(demo_files):
    top, states = demo_files
    return top, states["closed"][0], states["open"][0]


# ---------------------------------------------------------------------------- stored times
@pytest.fixture(params=["zero", "decreasing"])
def untimed(request, demo_two, tmp_path):
    """(kind, topology, closed file, open file): 300 demo frames each, written as XTC with
    stored times all zero or decreasing from 100 ps by 0.2 ps."""
    top, closed, opened = demo_two
    time = np.zeros(300) if request.param == "zero" else 100.0 - 0.2 * np.arange(300)
    return (request.param, top, _copy(closed, tmp_path / "c.xtc", top, time=time),
            _copy(opened, tmp_path / "o.xtc", top, time=time))


def test_stored_times_that_do_not_increase_are_refused_without_a_frame_spacing(untimed):
    kind, top, a, b = untimed
    what = (r"stores the same time \(0 ps\) for its first two frames" if kind == "zero" else
            r"stores times that do not increase \(frame 0 at 100 ps, frame 1 at 99.8 ps\)")
    with pytest.raises(InputError, match=r"trajectory '.*c.xtc' " + what + r", so the time "
                                         r"between its frames is unknown.*give the time "
                                         r"between frames in ps \(--frame-step-ps"):
        suggest(Source.from_states(top, {"closed": [a], "open": [b]}), n_bootstrap=0)
    src = Source(top)
    src.add(a, "runs")
    with pytest.raises(InputError, match="give the time between frames in ps"):
        propose_states(src, lag=2.0)


def test_given_frame_spacing_replaces_stored_times_that_do_not_increase_and_says_so(
        untimed, demo_two, tmp_path):
    _, top, a, b = untimed
    _, closed, opened = demo_two
    res = suggest(Source.from_states(top, {"closed": [a], "open": [b]}, timestep=0.2),
                  objective="both", lag=2.0, n_bootstrap=0, max_terms=1, n_suggestions=1)
    assert [i["frame_step_ps"] for i in res.inputs] == [0.2, 0.2]
    said = [n for n in res.notes if "they are ignored and the given time between frames, "
                                    "0.2 ps, is used instead" in n]
    assert len(said) == 2 and said[0].startswith("trajectory c.xtc stores ")
    # the lag of 2 ps is 10 frames: the same autocorrelation as the original files
    ref = suggest(Source.from_states(top, {"closed": [_copy(closed, tmp_path / "c0.xtc", top)],
                                           "open": [_copy(opened, tmp_path / "o0.xtc", top)]}),
                  objective="both", lag=2.0, n_bootstrap=0, max_terms=1, n_suggestions=1)
    assert res.ranking[0]["heldout_autocorrelation"] == pytest.approx(
        ref.ranking[0]["heldout_autocorrelation"], rel=1e-12)


def test_apply_leaves_time_empty_for_stored_times_that_do_not_increase(untimed, tmp_path,
                                                                       capsys):
    # apply used to copy the stored times into time_ps: all 0.0, or running backwards
    kind, top, a, b = untimed
    res = suggest(Source.from_states(top, {"closed": [a], "open": [b]}, timestep=0.2),
                  n_bootstrap=0, max_terms=1, n_suggestions=1)
    spec = tmp_path / "cv.json"
    spec.write_text(json.dumps(res.specs[0]))
    timed = _copy(a, tmp_path / "timed.xtc", top, time=0.5 * np.arange(300))
    assert main(["apply", str(spec), "--topology", top, a, timed]) == 0
    out, err = capsys.readouterr()
    rows = [line.split(",") for line in out.splitlines()[1:]]
    assert len(rows) == 600
    assert {r[2] for r in rows if r[0] == "c.xtc"} == {""}
    assert [float(r[2]) for r in rows if r[0] == "timed.xtc"][:3] == [0.0, 0.5, 1.0]
    assert "c.xtc stores times that do not increase" in err and "timed.xtc" not in err


def test_increasing_stored_times_are_kept_and_a_disagreeing_frame_spacing_is_refused(
        demo_two, tmp_path):
    # the given 0.2 ps was silently ignored for a file storing times 0.5 ps apart
    top, closed, _ = demo_two
    a = _copy(closed, tmp_path / "c.xtc", top, time=0.5 * np.arange(300))
    src = Source(top)
    src.add(a, "runs")
    assert src.timestep(0) == 0.5 and src.notes == []
    src = Source(top, timestep=0.2)
    src.add(a, "runs")
    assert not src.stored_times_ignored(0)
    with pytest.raises(InputError, match=r"c.xtc' stores frames 0.5 ps apart .* but the given "
                                         r"time between frames .* is 0.2 ps; .* give its own "
                                         r"spacing, or leave --frame-step-ps out"):
        src.timestep(0)
    # beside a file that stores no times (DCD), the given spacing is for that one: the XTC
    # keeps its own, and the notes say so
    d = tmp_path / "d.dcd"
    md.load(closed, top=top)[:100].save_dcd(str(d))
    src = Source(top, timestep=0.2)
    src.add(a, "runs")
    src.add(str(d), "runs")
    assert src.timestep(0) == 0.5 and src.timestep(1) == 0.2
    assert src.notes == ["trajectory c.xtc stores frames 0.5 ps apart (to within 5.1e-08 ps: its "
                         "times, up to 149.5 ps, are stored in single precision): it keeps its "
                         "own spacing; the given time between frames, 0.2 ps, is used for the "
                         "files that store no times"]


# ---------------------------------------------------------------------------- NaN / inf
# XTC is not used: it compresses coordinates to integers, so a NaN does not survive
@pytest.mark.filterwarnings("ignore:.*netCDF4:UserWarning")  # mdtraj falls back to scipy
@pytest.mark.parametrize("fmt,value", [("dcd", np.nan), ("trr", np.inf), ("nc", np.nan)])
def test_non_finite_coordinates_are_refused_naming_file_frame_and_atom(demo_two, tmp_path, fmt,
                                                                       value):
    top, closed, opened = demo_two
    bad = _copy(opened, tmp_path / f"bad.{fmt}", top, bad=(207, 3, value))
    # the file keeps the non-finite value (the check is not vacuous for this format)
    assert not np.isfinite(md.load(bad, top=top).xyz[207, 3, 1])
    src = Source(top, chunk_size=50)  # frame 207 is in the fifth chunk: frames are absolute
    src.add(closed, "closed")
    src.add(bad, "open")
    with pytest.raises(InputError, match=rf"trajectory '.*bad.{fmt}' frame 207 has a NaN or "
                                         r"infinite coordinate for atom 3 \(LCH1-C4\): "
                                         r"\[.*, (nan|inf), .*\] nm"):
        suggest(src, n_bootstrap=0)


@pytest.mark.parametrize("fmt,value", [("xtc", np.nan), ("dcd", -2147483.6), ("dcd", 3e5)])
def test_coordinates_far_outside_any_box_are_refused_as_a_nan_stored_by_xtc(demo_two, tmp_path,
                                                                          fmt, value):
    # A compressed XTC file stores integers: a NaN written to one reads back as about
    # -2147483.6 nm on x86 (the smallest 32-bit integer over the precision 1000; the
    # overflow may spoil other atoms of the frame too), which was accepted and silently
    # spoiled every descriptor of those atoms. Any coordinate beyond
    # MAX_COORDINATE_NM is refused like a NaN, whatever the format.
    top, closed, opened = demo_two
    bad = _copy(opened, tmp_path / f"bad.{fmt}", top, bad=(123, 6, value))
    back = float(md.load(bad, top=top).xyz[123, 6, 1])
    if fmt == "xtc" and abs(back) <= MAX_COORDINATE_NM:
        pytest.skip(f"this platform's XTC writer stores a NaN as {back} nm")
    src = Source.from_states(top, {"closed": [closed], "open": [bad]})
    with pytest.raises(InputError, match=rf"trajectory '.*bad\.{fmt}' frame 123 has a "
                                         r"coordinate beyond 100000 nm \(far outside any "
                                         r"simulation box; an XTC file stores a NaN as about "
                                         r"-2147483\.6 nm\) for atom "
                                         + (r"\d+" if fmt == "xtc" else r"6 \(LCH1-C7\)")):
        suggest(src, n_bootstrap=0)
    # a coordinate of the largest accepted size, and the demo itself, pass the check
    assert sum(c.frames.size for c in Source.from_states(top, {"o": [opened]}).iter_chunks()) \
        == md.load(opened, top=top).n_frames


def test_non_finite_coordinates_of_atoms_not_read_are_not_looked_at(demo_two, tmp_path):
    top, closed, opened = demo_two
    bad = _copy(opened, tmp_path / "bad.dcd", top, bad=(5, 11, np.nan))
    src = Source(top)
    src.add(bad, "open")
    frames = sum(c.frames.size for c in src.iter_chunks(atom_indices=[0, 1, 2]))
    assert frames == 300
    with pytest.raises(InputError, match="frame 5 has a NaN or infinite coordinate for atom "
                                         "11"):
        list(src.iter_chunks(atom_indices=[0, 11]))


def test_cli_suggest_and_check_refuse_non_finite_coordinates(demo_two, tmp_path, capsys):
    top, closed, opened = demo_two
    bad = _copy(opened, tmp_path / "bad.dcd", top, bad=(17, 4, np.nan))
    out = tmp_path / "out"
    assert main(["suggest", "--topology", top, "--state", "closed", closed, "--state", "open",
                 bad, "--out", str(out), "--bootstrap", "0"]) == 2
    err = capsys.readouterr().err
    assert "error: trajectory" in err and "bad.dcd' frame 17 has a NaN or infinite " \
                                          "coordinate for atom 4 (LCH1-C5)" in err
    assert "Traceback" not in err and not out.exists()
    # check --against reads the trajectory through the same reader
    res = suggest(Source.from_states(top, {"closed": [closed], "open": [opened]}),
                  n_bootstrap=0, max_terms=1, n_suggestions=1)
    spec = tmp_path / "cv.json"
    spec.write_text(json.dumps(res.specs[0]))
    values = tmp_path / "values.csv"
    values.write_text("value\n" + "0.0\n" * 300)
    before = sorted(p.name for p in tmp_path.iterdir())
    assert main(["check", str(spec), "--topology", top, "--against", str(values), bad]) == 2
    err = capsys.readouterr().err
    assert "bad.dcd' frame 17 has a NaN or infinite coordinate for atom 4 (LCH1-C5)" in err
    assert "Traceback" not in err and sorted(p.name for p in tmp_path.iterdir()) == before


# ---------------------------------------------------------------------------- times far from 0
# A float32 time near 10^6 ps is a multiple of 0.0625 ps: frames 0.2 ps apart were stored
# 0.1875 or 0.25 ps apart, and the step was taken from the first two (0.1875 ps).
@pytest.mark.parametrize("start,step", [(1e6, 0.2), (1e4, 0.2), (5e5, 0.025), (0.0, 0.2)])
def test_frame_spacing_of_times_far_from_zero_is_the_round_step_over_the_file(
        demo_two, tmp_path, start, step):
    from cvdesign.pipeline.timing import lag_frames, read_timesteps
    top, closed, _ = demo_two
    a = _copy(closed, tmp_path / "c.xtc", top, time=start + step * np.arange(300))
    stored = md.load(a, top=top).time
    # the first two stored frames are not `step` apart (at 0 ps: to rounding only)
    assert (stored[1] - stored[0] != np.float32(step)) == (start > 0)
    src = Source(top)
    src.add(a, "runs")
    assert src.timestep(0) == step
    assert lag_frames(src, 10 * step, read_timesteps(src)) == {0: 10}
    with pytest.raises(InputError, match=rf"lag={7.5 * step:g} ps is not a whole number of "
                                         rf"frames .* \(time step {step:g} ps(, the mean "
                                         r"spacing of its stored times|\))"):
        lag_frames(src, 7.5 * step, read_timesteps(src))


def test_given_frame_spacing_agreeing_with_coarse_stored_times_is_used_else_refused(
        demo_two, tmp_path):
    top, closed, _ = demo_two
    a = _copy(closed, tmp_path / "c.xtc", top, n_frames=3, time=1e6 + 0.2 * np.arange(3))
    src = Source(top)
    src.add(a, "runs")
    # three frames at 10^6 ps: the spacing is known to 0.03 ps only
    with pytest.raises(InputError, match=r"c.xtc' stores frames 0.1875 ps apart \(to within "
                                         r"0.031 ps: its times, up to 1e\+06 ps, are stored in "
                                         r"single precision\): the time between its frames is "
                                         r"not known to 1 % .*--frame-step-ps"):
        src.timestep(0)
    for given in (0.2, 0.21):
        src = Source(top, timestep=given)
        src.add(a, "runs")
        assert src.timestep(0) == given and src.timestep_resolution(0) == 0.0
    src = Source(top, timestep=0.25)
    src.add(a, "runs")
    with pytest.raises(InputError, match=r"stores frames 0.1875 ps apart .* but the given time "
                                         r"between frames \(--frame-step-ps; timestep= in the "
                                         r"Python API\) is 0.25 ps"):
        src.timestep(0)


def test_missing_frame_far_from_zero_is_found_by_the_even_spacing_check():
    # the check allowed 4 |t| 2^-23 = 0.48 ps at 10^6 ps: a 0.4 ps gap in 0.2 ps frames passed
    from cvdesign.pipeline.timing import _check_spacing
    frames = np.arange(300.0)
    time = 1e6 + 0.2 * frames
    _check_spacing("c.xtc", 0.2, frames, time.astype(np.float32).astype(np.float64))
    time[150:] += 0.2
    with pytest.raises(InputError, match=r"'c.xtc' is not evenly spaced in time: frame 150 is "
                                         r"at 1000030.19 ps, but the first time step \(0.2 ps\) "
                                         r"puts it at 1000030.01 ps"):
        _check_spacing("c.xtc", 0.2, frames, time.astype(np.float32).astype(np.float64))
