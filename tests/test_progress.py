"""Progress bars, logging and the selection echo (issue 11, items 4 and 6).

Bars for every pass over the trajectories and for the bootstrap, on standard error, only
when it is a terminal (the command is run on a pseudo-terminal here); ``--quiet`` leaves
nothing but errors; ``-v`` shows the stages; the library prints and logs nothing unless
asked; the atoms of a selection are echoed with mdtraj's 0-based indices.
"""

import logging
import math
import os
import re
import select
import subprocess
import sys
import threading
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

import cvdesign
from cvdesign import Source, suggest
from cvdesign.cli import main
from cvdesign.io.source import describe_selection
from cvdesign.progress import active, bar, show_progress, using_display
from cvdesign.stats import ArraySum, block_bootstrap
from cvdesign.stats.moments import Moments

pty = pytest.importorskip("pty", reason="pseudo-terminals are POSIX only")

#: The directory holding the cvdesign package under test, for subprocesses.
_ROOT = str(Path(cvdesign.__file__).resolve().parents[1])

#: A small selection of the demo molecule: four descriptors, a quick run.
_SELECT = "name C1 C3 C6 C8"


def _suggest_argv(demo_files, out, *extra):
    top, states = demo_files
    return ["suggest", "--topology", top, "--state", "closed", states["closed"][0],
            "--state", "open", states["open"][0], "--select", _SELECT, "--max-terms", "1",
            "--suggestions", "1", "--no-report", "--out", str(out), *extra]


def _on_terminal(argv, cwd, timeout=300):
    """Run ``python -m cvdesign ARGV`` with standard error on a pseudo-terminal (no size set,
    as some terminals report): (exit status, standard output, what the terminal received)."""
    master, slave = pty.openpty()
    env = {**os.environ, "PYTHONPATH": _ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen([sys.executable, "-m", "cvdesign", *argv], stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=slave, cwd=cwd, env=env)
    os.close(slave)
    out = []
    reader = threading.Thread(target=lambda: out.append(proc.stdout.read()))
    reader.start()
    got = b""
    try:
        while True:
            ready, _, _ = select.select([master], [], [], timeout)
            if not ready:
                proc.kill()
                pytest.fail(f"cvdesign {' '.join(argv[:1])} wrote nothing for {timeout} s")
            try:
                chunk = os.read(master, 65536)
            except OSError:  # the terminal is closed once the process has exited
                break
            if not chunk:
                break
            got += chunk
    finally:
        os.close(master)
    status = proc.wait(timeout=timeout)
    reader.join(timeout)
    return status, out[0].decode(), got.decode("utf-8", errors="replace")


def _final_lines(terminal):
    """Every state drawn on every bar line: per terminal line, what was drawn after each of
    its carriage returns."""
    return [[part for part in line.split("\r") if part.strip()]
            for line in terminal.split("\n")]


def _done(lines, label, count, unit):
    """The one finished bar of `label`: on one terminal line, 100 %, `count` of `count`,
    with the rate (per second, or seconds per unit when slower than one a second). A bar
    may draw its finished state twice on its line (a refresh that reaches the total, then
    the close, with the final rate: seen when the bootstrap refits ran at 93 a second);
    the last drawing counts."""
    start = f"{label}: 100%|"
    rows = [parts for parts in lines if any(p.startswith(start) for p in parts)]
    assert len(rows) == 1, (label, lines)
    done = [p for p in rows[0] if p.startswith(start)][-1]
    assert re.search(rf"\| {count}/{count} \[[\d:]+<[\d:]+, +[\d.?]+(s/)? {unit}(/s)?\]$",
                     done.rstrip()), done
    return done


def _files(out):
    return {p.name: p.read_bytes() for p in sorted(Path(out).iterdir())}


@pytest.fixture(scope="module")
def demo_frames(demo_files):
    """Frames of the first file of each state, counted by mdtraj's own loader."""
    top, states = demo_files
    return [md.load(states[s][0], top=top).n_frames for s in ("closed", "open")]


# ------------------------------------------------------------------------ bars on a terminal
def test_bars_on_a_terminal_count_every_frame_and_replicate_and_change_no_output(
        demo_files, demo_frames, tmp_path, capsys):
    term_out = tmp_path / "terminal"
    status, stdout, terminal = _on_terminal(
        _suggest_argv(demo_files, term_out, "--bootstrap", "20"), tmp_path)
    assert status == 0, terminal
    lines = _final_lines(terminal)
    total = sum(demo_frames)
    # one bar per pass over the trajectories, each at the frames read of the total, with
    # the rate; the prefilter reads every 10th frame of each file
    prefilter = sum(math.ceil(n / 10) for n in demo_frames)
    for label, frames in [("prefilter", prefilter), ("screening", total),
                          ("statistics", total), ("held-out", total)]:
        _done(lines, label, frames, "frames")
    for label in ("bootstrap", "bootstrap refits", "bootstrap card"):
        _done(lines, label, 20, "replicates")
    # standard output holds the results only, and the bars changed none of the files
    assert "\r" not in stdout and "%|" not in stdout and "caution:" in stdout
    piped = tmp_path / "piped"
    assert main(_suggest_argv(demo_files, piped, "--bootstrap", "20")) == 0
    captured = capsys.readouterr()
    assert captured.err == ""  # not a terminal: no bar characters, and nothing else to say
    assert captured.out == stdout.replace(str(term_out), str(piped))
    assert _files(piped) == _files(term_out)


def test_quiet_on_a_terminal_prints_nothing_but_errors(demo_files, tmp_path, capsys):
    # --md-step-fs 20 draws a warning, shown by default ...
    argv = _suggest_argv(demo_files, tmp_path / "a", "--bootstrap", "0", "--md-step-fs", "20")
    assert main(argv) == 0
    warning = ("cvdesign suggest: warning: md_step_fs=20 fs is longer than 5 fs: usual for "
               "coarse-grained models only")
    assert capsys.readouterr().err.startswith(warning)
    # ... and not with --quiet, on a terminal: no bar, no warning, nothing
    argv = _suggest_argv(demo_files, tmp_path / "b", "--bootstrap", "0", "--md-step-fs", "20",
                         "--quiet")
    status, stdout, terminal = _on_terminal(argv, tmp_path)
    assert status == 0 and terminal == ""
    assert "cv-01.json" in stdout and "caution:" in stdout  # the final table stays
    # errors still show, with -q before or after the command, once or twice
    top, states = demo_files
    assert main(["-q", "suggest", "--topology", top, "--state", "a", states["closed"][0],
                 "--state", "b", str(tmp_path / "missing.xtc"), "--out",
                 str(tmp_path / "c")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("cvdesign suggest: error:") and "missing.xtc" in err
    assert main(["suggest", "--topology", top, "--state", "a", states["closed"][0], "--out",
                 str(tmp_path / "d"), "-qq"]) == 2
    assert capsys.readouterr().err.startswith("cvdesign suggest: error: only one state")
    assert not (tmp_path / "c").exists() and not (tmp_path / "d").exists()


# ------------------------------------------------------------------------ logging
def test_verbose_shows_the_stages_and_twice_verbose_the_passes(demo_files, tmp_path, capsys):
    assert main(["-v"] + _suggest_argv(demo_files, tmp_path / "v", "--bootstrap", "0")) == 0
    err = capsys.readouterr().err.splitlines()
    assert "cvdesign suggest: building the candidate pool" in err
    assert any(line.startswith("cvdesign suggest: pool: ") for line in err)
    assert any(line.startswith("cvdesign suggest: statistics pass") for line in err)
    assert not any(": debug: " in line for line in err)
    assert main(_suggest_argv(demo_files, tmp_path / "vv", "--bootstrap", "0", "-vv")) == 0
    err = capsys.readouterr().err.splitlines()
    assert any(line.startswith("cvdesign suggest: debug: screening: ") for line in err), err
    assert "cvdesign suggest: building the candidate pool" in err


def test_the_library_prints_and_logs_nothing_unless_asked(demo_files, capsys, caplog):
    top, states = demo_files
    source = Source.from_states(top, {"closed": states["closed"][:1],
                                      "open": states["open"][:1]})
    settings = dict(selection=_SELECT, max_terms=1, n_suggestions=1, n_bootstrap=20)
    quiet = suggest(source, **settings)
    assert capsys.readouterr() == ("", "")
    assert [r for r in caplog.records if r.name.startswith("cvdesign")] == []
    assert not active()
    # the same run with INFO records asked for: the stages are logged (so the check above
    # could fail), on the package's loggers, and the result is the same
    with caplog.at_level(logging.INFO, logger="cvdesign"):
        told = suggest(source, **settings)
    messages = [r.getMessage() for r in caplog.records]
    assert "building the candidate pool" in messages
    assert {r.name for r in caplog.records} == {"cvdesign.pipeline.suggest"}
    assert capsys.readouterr() == ("", "")
    assert told.ranking_json() == quiet.ranking_json()


def test_the_package_logger_has_a_null_handler_so_python_prints_no_warning():
    code = ("import logging, cvdesign; logging.getLogger('cvdesign.pipeline').warning('hidden');"
            " logging.getLogger('elsewhere').warning('shown')")
    env = {**os.environ, "PYTHONPATH": _ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                         timeout=120)
    assert res.returncode == 0
    # Python's last-resort handler prints the other logger's warning, not cvdesign's
    assert res.stderr == "shown\n" and res.stdout == ""


# ------------------------------------------------------------------------ bars in the library
def test_bootstrap_bar_counts_each_replicate_once_and_changes_nothing(progress_recorder):
    rng = np.random.default_rng(11)
    fast = [[ArraySum(s=rng.normal(size=3)) for _ in range(9)] for _ in range(2)]
    slow = [[Moments.from_data(rng.normal(size=(20, 2))) for _ in range(9)] for _ in range(2)]
    for groups, stat in [(fast, lambda m: m[0].arrays["s"] - m[1].arrays["s"]),
                         (slow, lambda m: m[0].mean - m[1].mean)]:
        plain = block_bootstrap(groups, stat, n_boot=13, seed=4)
        with using_display(progress_recorder):
            shown = block_bootstrap(groups, stat, n_boot=13, seed=4, label="test")
        np.testing.assert_array_equal(shown.replicates, plain.replicates)
        b = progress_recorder.bars[-1]
        assert (b.label, b.total, b.unit) == ("test", 13, "replicates")
        assert b.updates == [1] * 13 and b.closed
    assert len(progress_recorder.bars) == 2


def test_show_progress_draws_only_on_a_terminal(tmp_path):
    with open(tmp_path / "log.txt", "w") as fh, show_progress(fh):
        assert not active()
        with bar("reading", 5) as b:
            b.update(5)
    assert (tmp_path / "log.txt").read_text() == ""
    # asked for explicitly (a notebook), it draws on any stream
    with open(tmp_path / "forced.txt", "w") as fh, show_progress(fh, enabled=True):
        assert active()
        with bar("reading", 5) as b:
            b.update(5)
    assert "reading: 100%|" in (tmp_path / "forced.txt").read_text()


# ------------------------------------------------------------------------ the selection echo
def test_selection_echo_counts_atoms_and_names_residues_as_mdtraj_sees_them(mda_data):
    # reference: mdtraj's topology of adenylate kinase (MDAnalysis test data, Michaud-Agrawal
    # et al., J. Comput. Chem. 2011); resid counts from 0, residue names carry the PSF's
    # own numbers
    top = md.load_topology(str(mda_data / "adk.psf"))
    sel = "name CA and resid 10 to 20"
    atoms = top.select(sel)
    first, last = top.residue(10), top.residue(20)
    assert atoms.size == 11 and first.resSeq == 11  # the off-by-one users trip on
    assert describe_selection(top, atoms, sel) == (
        f"selection {sel!r}: 11 atoms in 11 residues: {first.name}{first.resSeq}-"
        f"{last.name}{last.resSeq} (0-based mdtraj indices: atoms {atoms[0]}..{atoms[-1]} in "
        "11 ranges, resid 10..20)")
    # residues in separate ranges, each named; more ranges than shown are elided
    sel = "resid 0 to 2 or resid 5"
    atoms = top.select(sel)
    r = [top.residue(i) for i in (0, 2, 5)]
    text = describe_selection(top, atoms, sel)
    assert f"{atoms.size} atoms in 4 residues: {r[0]}-{r[1]}, {r[2]} (" in text
    assert f"atoms {atoms[0]}..{top.residue(2).atom(top.residue(2).n_atoms - 1).index}, " \
           f"{top.residue(5).atom(0).index}..{atoms[-1]}, resid 0..2, 5)" in text
    text = describe_selection(top, top.select("name CA and resid 0 2 4 6 8 10"))
    assert text.startswith("default selection (heavy atoms of the solute): 6 atoms in 6 "
                           f"residues: {top.residue(0)}, {top.residue(2)}, {top.residue(4)}, "
                           f"..., {top.residue(10)} (6 ranges)")
    # the default selection's echo ends with what it left out (the PSF's hydrogens)
    n_h = sum(a.element.symbol == "H" for a in top.atoms)
    assert text.endswith(f"resid 0, 2, 4, ..., 10 (6 ranges)); left out: {n_h} hydrogens")


def test_selection_echo_breaks_ranges_at_chains():
    top = md.Topology()
    for c in range(2):
        chain = top.add_chain()
        for n in range(1, 4):
            res = top.add_residue("ALA", chain, resSeq=n)
            top.add_atom("CA", md.element.carbon, res)
    text = describe_selection(top, top.select("all"), "all")
    assert text == ("selection 'all': 6 atoms in 6 residues of 2 chains: ALA1-ALA3, ALA1-ALA3 "
                    "(0-based mdtraj indices: atoms 0..5, resid 0..5)")


def test_selection_is_echoed_in_the_summary_and_on_the_terminal(demo_files, tmp_path, capsys):
    top, states = demo_files
    topology = md.load_topology(top)
    atoms = topology.select(_SELECT)
    residue = topology.atom(int(atoms[0])).residue
    expected = (f"selection {_SELECT!r}: {atoms.size} atoms in 1 residue: "
                f"{residue.name}{residue.resSeq} (0-based mdtraj indices: atoms "
                + ", ".join(map(str, atoms)) + f", resid {residue.index})")
    assert atoms.size == 4 and residue.index == 0
    out = tmp_path / "out"
    assert main(_suggest_argv(demo_files, out, "--bootstrap", "0")) == 0
    printed = capsys.readouterr().out.splitlines()
    assert printed[0] == expected  # the first line of the results, before the notes
    summary = (out / "summary.md").read_text()
    assert f"Atoms of the pool: {expected}." in summary


def test_quiet_discards_what_the_dcd_reader_prints_without_turning_it_into_warnings(
        demo_files, tmp_path):
    # mdtraj's DCD reader prints "dcdplugin) detected standard 32-bit DCD file ..." on file
    # descriptor 1, which cvdesign sends to standard error: -q showed it all the same
    from cvdesign import Spec
    from cvdesign.io.source import READER_OUTPUT_ENV

    top, states = demo_files
    md.load(states["closed"][0], top=top)[:20].save_dcd(str(tmp_path / "run.dcd"))
    Spec(name="cv-contact", topology=md.load_topology(top),
         descriptors=[{"id": "d0", "kind": "distance", "atoms": [0, 7]}],
         terms=[{"descriptor": "d0", "transform": "identity", "center": 0.7, "scale": 0.1,
                 "weight": 1.0}],
         states={"closed": {"mean": 0.0, "std": 0.5, "n_frames": 20}}).save(tmp_path / "cv.json")
    env = {**os.environ, "PYTHONPATH": _ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}
    env.pop(READER_OUTPUT_ENV, None)

    def run(*flags):
        return subprocess.run([sys.executable, "-m", "cvdesign.cli", *flags, "apply", "cv.json",
                               "--topology", top, "run.dcd"], capture_output=True, text=True,
                              env=env, cwd=tmp_path, timeout=120)

    loud, quiet = run(), run("-q")
    assert loud.returncode == quiet.returncode == 0
    assert "dcdplugin)" in loud.stderr and "dcdplugin)" not in loud.stdout  # shown, not in CSV
    assert quiet.stderr == "" and quiet.stdout == loud.stdout
    assert len(quiet.stdout.splitlines()) == 21
    # in this process the setting lasts as long as the command
    assert main(["-q", "apply", str(tmp_path / "cv.json"), "--topology", top,
                 str(tmp_path / "run.dcd"), "--out", str(tmp_path / "v.csv")]) == 0
    assert READER_OUTPUT_ENV not in os.environ


def test_apply_and_check_on_a_terminal_count_every_frame_and_change_no_output(
        demo_files, demo_frames, tmp_path):
    top, states = demo_files
    out = tmp_path / "suggested"
    assert main(_suggest_argv(demo_files, out)) == 0
    spec = str(out / "cv-01.json")
    trajs = [states["closed"][0], states["open"][0]]
    status, stdout, terminal = _on_terminal(["apply", spec, *trajs, "--topology", top], tmp_path)
    assert status == 0, terminal
    _done(_final_lines(terminal), "apply", sum(demo_frames), "frames")
    assert "\r" not in stdout and "%|" not in stdout
    piped = subprocess.run([sys.executable, "-m", "cvdesign", "apply", spec, *trajs,
                            "--topology", top], capture_output=True, text=True, cwd=tmp_path,
                           env={**os.environ, "PYTHONPATH": _ROOT})
    assert piped.returncode == 0 and piped.stderr == ""
    assert piped.stdout == stdout  # the bar changed nothing the command writes
    values = tmp_path / "values.csv"
    values.write_text(stdout)
    status, _, terminal = _on_terminal(["check", spec, "--topology", top, "--against",
                                        str(values), trajs[0]], tmp_path)
    assert status == 0, terminal
    _done(_final_lines(terminal), "check", demo_frames[0], "frames")
