"""Bad input to `cvdesign funnel`: a clear error, exit code 2, no traceback, nothing written.

One row of CASES per bad input: (id, argv builder, expected message regex). A builder gets
a `Case` (the host-guest input files, a fresh output directory, pytest's monkeypatch) and
returns the argument list; it may prepare files (an existing output, a trajectory with NaN)
before the run. The test then checks the message on stderr, the exit code, the absence of a
traceback, and that no file in the input or output directories was created or changed.
"""

import os
import re
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign.cli import main
from cvdesign.testbed.host_guest import write_host_guest


@pytest.fixture(scope="module")
def host_guest(tmp_path_factory):
    return write_host_guest(tmp_path_factory.mktemp("hg"), n_runs=2, n_frames=40)


@dataclass
class Case:
    data: object
    out_dir: Path
    monkeypatch: object

    @property
    def out(self):
        return self.out_dir / "funnel.json"

    def argv(self, *extra, out=None, bound=None):
        return ["funnel", "--topology", self.data.topology,
                "--bound", *(self.data.paths if bound is None else bound),
                "--ligand", self.data.ligand_selection, "--pocket", self.data.pocket_selection,
                "--out", str(self.out if out is None else out), *extra]

    def existing(self, name, text="keep me"):
        path = self.out_dir / name
        path.write_text(text)
        return path

    def with_nan(self, frame, atom):
        """A copy of the first run as DCD (float32, no rounding) with one NaN coordinate."""
        traj = md.load(self.data.paths[0], top=self.data.topology)
        traj.xyz[frame, atom, 1] = np.nan
        path = self.out_dir / "nan.dcd"
        traj.save_dcd(str(path))
        return str(path)

    def pocket_centre(self):
        first = md.load_frame(self.data.paths[0], 0, top=self.data.topology)
        return first.xyz[0, list(self.data.pocket_atoms)].astype(np.float64).mean(axis=0)

    def unwritable_dir(self):
        """A directory this process cannot create files in (skip if there is none)."""
        locked = self.out_dir / "locked"
        locked.mkdir()
        locked.chmod(0o555)
        candidates = [locked, Path("/sys")]
        for cand in candidates:
            try:
                fd, probe = tempfile.mkstemp(dir=cand)
            except OSError:
                return cand
            os.close(fd)
            os.unlink(probe)
        pytest.skip("no directory is unwritable for this user (running as root?)")

    def no_matplotlib(self):
        for name in ("matplotlib", "matplotlib.backend_bases", "matplotlib.pyplot"):
            self.monkeypatch.setitem(sys.modules, name, None)

    def failing_plot(self):
        import cvdesign.funnel

        def fail(result, path):
            raise OSError(28, "No space left on device")
        self.monkeypatch.setattr(cvdesign.funnel, "plot_funnel", fail)


def _no_mpl(c):
    c.no_matplotlib()
    return c.argv("--plot", str(c.out_dir / "f.png"))


def _failing_plot(c):
    pytest.importorskip("matplotlib")
    c.failing_plot()
    return c.argv("--plot", str(c.out_dir / "f.png"))


def _unwritable(c, option):
    d = c.unwritable_dir()
    if option == "--out":
        return c.argv(out=d / "funnel.json")
    pytest.importorskip("matplotlib")
    return c.argv("--plot", str(d / "funnel.png"))


CASES = [
    ("out-exists-without-force",
     lambda c: (c.existing("funnel.json"), c.argv())[1],
     r"--out '.*funnel\.json' already exists; choose another name, or pass --force"),
    ("out-is-the-topology",
     lambda c: c.argv("--force", out=c.data.topology),
     r"--out '.*host_guest\.pdb' is one of the input files; writing it would replace"),
    ("out-is-a-trajectory",
     lambda c: c.argv("--force", out=c.data.paths[1]),
     r"--out '.*bound-2\.xtc' is one of the input files; writing it would replace"),
    ("out-is-the-plot",
     lambda c: c.argv("--plot", str(c.out), "--force"),
     r"--plot '.*funnel\.json' is the same file as --out"),
    ("out-is-a-directory",
     lambda c: c.argv(out=c.out_dir),
     r"--out '.*' is a directory; give a file name"),
    ("out-in-missing-directory",
     lambda c: c.argv(out=c.out_dir / "missing" / "funnel.json"),
     r"the directory of --out '.*missing/funnel\.json' \('.*missing'\) does not exist"),
    ("out-in-unwritable-directory",
     lambda c: _unwritable(c, "--out"),
     r"cannot write --out '.*funnel\.json': the directory '.*' is not writable"),
    ("plot-exists-without-force",
     lambda c: (c.existing("f.png"), c.argv("--plot", str(c.out_dir / "f.png")))[1],
     r"--plot '.*f\.png' already exists; choose another name, or pass --force"),
    ("plot-is-the-topology",
     lambda c: c.argv("--plot", c.data.topology, "--force"),
     r"--plot '.*host_guest\.pdb' is one of the input files"),
    ("plot-in-missing-directory",
     lambda c: c.argv("--plot", str(c.out_dir / "missing" / "f.png")),
     r"the directory of --plot '.*missing/f\.png' .* does not exist"),
    ("plot-in-unwritable-directory",
     lambda c: _unwritable(c, "--plot"),
     r"cannot write --plot '.*funnel\.png': the directory '.*' is not writable"),
    ("plot-unknown-extension",
     lambda c: (pytest.importorskip("matplotlib"), c.argv("--plot", str(c.out_dir / "f.xyz")))[1],
     r"--plot '.*f\.xyz': unknown image extension \.xyz; use one of .*\.png"),
    ("plot-without-extension",
     lambda c: (pytest.importorskip("matplotlib"), c.argv("--plot", str(c.out_dir / "f")))[1],
     r"--plot '.*f': unknown image extension \(none\)"),
    ("plot-without-matplotlib",
     _no_mpl,
     r"--plot needs matplotlib, which is not installed; install it"),
    ("plot-write-fails",
     _failing_plot,
     r"cannot write the output \(No space left on device\); nothing was written"),
    ("exit-point-nan",
     lambda c: c.argv("--exit-point", "nan", "0", "1"),
     r"--exit-point nan 0\.0 1\.0: give three finite coordinates in nm"),
    ("exit-point-infinite",
     lambda c: c.argv("--exit-point", "0", "inf", "1"),
     r"--exit-point 0\.0 inf 1\.0: give three finite coordinates in nm"),
    ("exit-point-at-pocket-centre",
     lambda c: c.argv("--exit-point", *(repr(float(v)) for v in c.pocket_centre())),
     r"the exit point \[.*\] nm lies 0\.0000 nm from the pocket centre of the first bound "
     r"frame \[.*\] nm \(closer than 0\.05 nm\), so it defines no direction"),
    ("nan-pocket-coordinates",
     lambda c: c.argv(bound=[c.data.paths[0], c.with_nan(frame=3, atom=5)]),
     r"trajectory '.*nan\.dcd' frame 3 has a NaN or infinite coordinate for atom 5 "
     r"\(HST1-L5\)"),
    ("nan-ligand-coordinates",
     lambda c: c.argv(bound=[c.with_nan(frame=7, atom=14)]),
     r"trajectory '.*nan\.dcd' frame 7 has a NaN or infinite coordinate for atom 14 "
     r"\(GST2-G2\)"),
    ("pocket-without-orientation",
     lambda c: [a if a != c.data.pocket_selection else "name CB or name L1"
                for a in c.argv()],
     r"the pocket \(2 atoms\) does not fix an orientation in the first frame"),
    ("k-wall-not-positive",
     lambda c: c.argv("--k-wall", "0"),
     r"--k-wall 0\.0 must be a positive force constant in kJ/mol/nm\^2"),
]


def _snapshot(*dirs):
    files = {}
    for d in dirs:
        for p in sorted(Path(d).rglob("*")):
            if p.is_file():
                files[str(p)] = p.read_bytes()
    return files


@pytest.mark.parametrize("build, message", [pytest.param(b, m, id=i) for i, b, m in CASES])
def test_funnel_refuses_bad_input(build, message, host_guest, tmp_path, monkeypatch, capsys):
    case = Case(host_guest, tmp_path, monkeypatch)
    argv = build(case)
    input_dir = Path(host_guest.topology).parent
    before = _snapshot(input_dir, tmp_path)
    assert main(argv) == 2
    captured = capsys.readouterr()
    assert captured.err.startswith("cvdesign funnel: error: ")
    assert re.search(message, captured.err), captured.err
    assert "Traceback" not in captured.err and captured.out == ""
    assert _snapshot(input_dir, tmp_path) == before
    assert not Path("/sys/funnel.json").exists() and not Path("/sys/funnel.png").exists()
