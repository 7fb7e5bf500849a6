"""What the command line does with failures that are not the user's input: an unexpected
exception is said as a defect of cvdesign (exit status 3, nothing written, no traceback
unless -v), a biased run whose rescaled length overflows is refused (it crashed the JSON
writer), and a state whose weight sits on one frame is refused naming that cause."""

import re

import mdtraj as md

from cvdesign.cli import main
from cvdesign.cli.commands import INTERNAL_ERROR_STATUS


def _argv(demo_files, out):
    top, states = demo_files
    argv = ["suggest", "--topology", top, "--out", str(out), "--bootstrap", "0",
            "--suggestions", "1", "--max-terms", "1", "--no-report"]
    for name, files in states.items():
        argv += ["--state", name, *files[:2]]
    return argv


def test_an_unexpected_exception_is_said_as_a_defect_with_status_3(demo_files, tmp_path, capsys,
                                                                   monkeypatch):
    import cvdesign.pipeline.suggest as pipeline

    def broken(*args, **kwargs):
        raise ZeroDivisionError("float division by zero")
    monkeypatch.setattr(pipeline, "_scorecard", broken)
    out = tmp_path / "out"
    assert main(_argv(demo_files, out)) == INTERNAL_ERROR_STATUS == 3
    err = capsys.readouterr().err
    assert ("cvdesign suggest: internal error: ZeroDivisionError: float division by zero. "
            "This is a defect of cvdesign") in err
    assert "Traceback" not in err and not out.exists()
    # -v adds the traceback, for the report
    assert main(_argv(demo_files, tmp_path / "v") + ["-v"]) == 3
    err = capsys.readouterr().err
    assert "Traceback (most recent call last)" in err and "internal error" in err


def test_a_rescaled_run_length_that_overflows_is_refused_not_a_crash(demo_files, tmp_path,
                                                                     capsys):
    # A biased run of bias energies 2000 kJ/mol (about 800 kT at 300 K: a wrong unit?)
    # beside an unbiased one in its state: its rescaled length exp(V/kT) overflowed to inf,
    # and writing the ranking stopped with "Out of range float values are not JSON
    # compliant" and a traceback. Now the clock's overflow is refused for every biased run,
    # naming the file and the frame.
    top, states = demo_files
    argv = ["suggest", "--topology", top, "--out", str(tmp_path / "out"), "--bootstrap", "0",
            "--suggestions", "1", "--max-terms", "1", "--no-report"]
    for name, files in states.items():  # two runs of 200 frames per state
        traj = md.load(files[0], top=top)
        argv += ["--state", name]
        for k in range(2):
            path = tmp_path / f"{name}-{k}.xtc"
            traj[200 * k:200 * (k + 1)].save_xtc(str(path))
            argv.append(str(path))
    biased = argv[argv.index("--state") + 2]
    bias = tmp_path / "bias.txt"
    bias.write_text("2000.0\n" * 200)
    out = tmp_path / "out"
    argv += ["--bias-energy", biased, str(bias), "--temperature", "300"]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert re.search(r"error: the rescaled time of trajectory '.*closed-0\.xtc' overflows at "
                     r"frame 0 \(exp\(V/kT\) of its bias there is not finite", err), err
    assert "Traceback" not in err and not out.exists()


def test_a_state_whose_weight_sits_on_one_frame_is_refused_naming_the_bias(demo_files,
                                                                           tmp_path, capsys):
    # One frame at 1000 kJ/mol (400 kT at 300 K) in a biased run: after reweighting that
    # frame carries all the state's weight (effective sample size 1), the state has no
    # spread, and suggest refused it as "frozen ... not one repeated frame", the wrong cause.
    top, states = demo_files
    closed, opened = (md.load(states[name][0], top=top)[:200] for name in states)
    argv = ["suggest", "--topology", top, "--out", str(tmp_path / "out"), "--bootstrap", "0",
            "--no-report"]
    for (name, traj) in zip(states, (closed, opened)):
        path = tmp_path / f"{name}.xtc"
        traj.save_xtc(str(path))
        argv += ["--state", name, str(path)]
    bias = tmp_path / "bias.txt"
    bias.write_text("0.0\n" * 50 + "1000.0\n" + "0.0\n" * 149)
    argv += ["--bias-energy", argv[argv.index("--state") + 2], str(bias), "--temperature", "300"]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert (f"state {next(iter(states))!r}: after reweighting its effective sample size is "
            "1.00 of 200 frames: one frame carries almost all its weight") in err
    assert "bias.txt" in err and "frozen" not in err
    assert not (tmp_path / "out").exists()


def test_a_failure_after_the_outputs_are_written_says_they_were(demo_files, tmp_path, capsys,
                                                                monkeypatch):
    # The outputs are written whole before the command prints its results; a failure or an
    # interrupt while printing had said "nothing was written" beside a full directory.
    from cvdesign.pipeline.output import Suggestions

    for exc, status in ((ZeroDivisionError("while printing"), 3), (KeyboardInterrupt(), 130)):
        def broken(self, n=5, exc=exc):
            raise exc
        monkeypatch.setattr(Suggestions, "top_table", broken)
        out = tmp_path / f"out{status}"
        assert main(_argv(demo_files, out)) == status
        err = capsys.readouterr().err
        assert f"the outputs in {out} had been written, whole, before it" in err, err
        assert "no output was written" not in err and (out / "ranking.json").exists()
