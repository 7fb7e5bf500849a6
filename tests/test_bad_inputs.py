"""Catalogue of bad inputs: every command and the Python API refuse them cleanly.

Each entry of :data:`CLI_CASES` and :data:`API_CASES` is one distinct bad input. The
test asserts the message text (a regular expression), the exit code (or exception
type), that no Python traceback was printed, and that nothing was written: every file
under the case's working directory, the shared fixture directory and the demo data is
the same, byte for byte, before and after (no output, no temporary file left behind).

To add an entry, append a ``Case`` to the table: ``make`` receives a :class:`Ctx`
(fixture files, a fresh working directory, helpers) and returns the argument list of
``cvdesign`` (or, for ``API_CASES``, a function of no arguments to call). Keep the inputs
tiny and failing before heavy computation.

`FUNNEL_CASES` (at the end) does the same for ``cvdesign funnel`` on the host-guest
testbed. Besides the tables: a closed standard output (``cvdesign hints ... | head -1``) ends a
command quietly with exit status 141; ``cvdesign`` alone lists the commands; a directory
without write permission is refused (only when not running as root, who may write
anywhere); ``apply --force`` replaces an earlier output.
"""

import hashlib
import importlib.util
import json
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

import cvdesign
from cvdesign import InputError, Source, Spec, SpecError, TopologyMismatchError, load_spec
from cvdesign.bias.funnel import size_funnel_from_source
from cvdesign.bias.hints import spec_hints
from cvdesign.cli import EXIT_BROKEN_PIPE, main
from cvdesign.errors import SchedulerUnreachableError
from cvdesign.parallel import DaskExecutor
from cvdesign.io.source import read_labels_file
from cvdesign.passes import PoolFeaturizer, ScreeningPass, plan_tasks, run_pass
from cvdesign.pipeline.explore import propose_states
from cvdesign.pipeline.refine import (basins_from_spec, compare_specs, fisher_separation,
                                      label_basins)
from cvdesign.pool import build_pool
from cvdesign.testbed.host_guest import write_host_guest

HAS_TABLES = importlib.util.find_spec("tables") is not None
NO_OPENMM = "" if importlib.util.find_spec("openmm") is not None else "openmm is not installed"
IS_ROOT = hasattr(os, "geteuid") and os.geteuid() == 0
#: The directory holding the cvdesign package under test, for subprocesses.
_ROOT = str(Path(cvdesign.__file__).resolve().parent.parent)


# ---------------------------------------------------------------- fixtures
def _hand_spec(topology, states=None):
    """A one-distance spec (atoms 0 and 7, the demo's contact) for `topology`."""
    if states is None:
        states = {"closed": {"mean": 0.45, "std": 0.03, "n_frames": 2000},
                  "open": {"mean": 0.95, "std": 0.05, "n_frames": 2000}}
    return Spec(name="cv-test", topology=topology,
                descriptors=[{"id": "d0", "kind": "distance", "atoms": [0, 7]}],
                terms=[{"descriptor": "d0", "transform": "identity", "center": 0.7,
                        "scale": 0.1, "weight": 1.0}], states=states)



def _edit_terms(doc, **changes):
    doc["terms"][0].update(changes)
    del doc["reachable_range"]  # as the old range message advised


#: Hand edits of the shared cv.json, each written as its own file by `shared`.
_SPEC_EDITS = {
    "stale.json": lambda d: _edit_terms(d, weight=10.0),  # states left in the old CV units
    "tiny.json": lambda d: _edit_terms(d, scale=1e-320),  # weight / scale overflows
    "twice.json": lambda d: [d["terms"].append(dict(d["terms"][0])), _edit_terms(d)],
    "unreachable.json": lambda d: d["states"]["open"].update(mean=-20.0),
    "tau.json": lambda d: d["scores"].update(integrated_time_ps=-1.0),
}


def _with_temperature(extra):
    """`extra` plus ``--temperature 300`` when it gives a biased run without a temperature
    (required with --bias-energy; the rows without it are tested on their own)."""
    extra = list(extra)
    if "--bias-energy" in extra and "--temperature" not in extra and "NO-TEMPERATURE" not in extra:
        extra += ["--temperature", "300"]
    return [a for a in extra if a != "NO-TEMPERATURE"]

def _nested(depth):
    """A list nested `depth` levels deep, built without recursion."""
    inner = []
    for _ in range(depth - 1):
        inner = [inner]
    return inner


@pytest.fixture(scope="module")
def shared(tmp_path_factory, demo_files):
    """Read-only inputs shared by the cases: good ones, and files broken on purpose."""
    top, states = demo_files
    d = tmp_path_factory.mktemp("shared")
    topology = md.load_topology(top)
    _hand_spec(topology).save(d / "cv.json")
    _hand_spec(topology, states={}).save(d / "nospread.json")
    traj = md.load(states["closed"][0], top=top)
    traj[:5].save_gro(str(d / "run.gro"))
    far = traj[:5]
    far.xyz[3, 2, 0] = -2147483.6  # how a compressed XTC file stores a NaN
    far.save_dcd(str(d / "far.dcd"))
    traj[:5].atom_slice(range(10)).save_xtc(str(d / "short.xtc"))
    traj[:1].atom_slice(range(11)).save_pdb(str(d / "eleven.pdb"))
    (d / "garbage.pdb").write_text("this is not a PDB file\nnor is this line\n")
    (d / "garbage.xtc").write_bytes(b"\0" * 1000)
    (d / "fake.h5").write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 100)
    (d / "empty.xtc").write_bytes(b"")
    whole = (d / "whole.xtc")
    traj[:20].save_xtc(str(whole))
    (d / "cut.xtc").write_bytes(whole.read_bytes()[:-30])  # ends inside frame 19
    (d / "notes.xyzzy").write_text("what format is this?\n")
    (d / "deep.json").write_text("[" * 100_000 + "]" * 100_000)
    (d / "deep150.json").write_text('{"a": ' * 150 + "1" + "}" * 150)
    (d / "notjson.json").write_text('{"format": "cvdesign-spec", ')
    (d / "latin1.json").write_bytes('{"name": "caf\xe9"}'.encode("latin-1"))
    good = (d / "cv.json").read_text()
    (d / "nan.json").write_text(good.replace('"offset": 0.0', '"offset": NaN'))
    for name, edit in _SPEC_EDITS.items():
        doc = json.loads(good)
        edit(doc)
        (d / name).write_text(json.dumps(doc, indent=2))
    (d / "other.json").write_text(json.dumps({"format": "some-other-tool", "version": 1}))
    return {"top": top, "closed": states["closed"][0], "open": states["open"][0], "dir": d,
            "data": Path(top).parent}


class Ctx:
    """What a case builds its input from: shared files and a fresh working directory."""

    def __init__(self, shared, work, monkeypatch=None):
        self.top, self.closed, self.open = shared["top"], shared["closed"], shared["open"]
        self.shared = shared["dir"]
        self.work = work
        self.monkeypatch = monkeypatch

    def s(self, name):
        """A shared fixture file."""
        return str(self.shared / name)

    def w(self, name):
        """A path in the working directory (not created)."""
        return str(self.work / name)

    def file(self, name, text="x\n"):
        """A file in the working directory holding `text`."""
        path = self.work / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
        return str(path)

    def copy(self, source, name):
        """A copy of `source` in the working directory."""
        path = self.work / name
        path.parent.mkdir(parents=True, exist_ok=True)
        return shutil.copy(source, path)

    def suggest(self, *extra, out=None, top=None, closed=None, opened=None):
        """``cvdesign suggest`` on one closed and one open demo file, quick settings."""
        return ["suggest", "--topology", top or self.top, "--state", "closed",
                closed or self.closed, "--state", "open", opened or self.open,
                "--out", out or self.w("out"), "--bootstrap", "0", "--max-terms", "1",
                "--suggestions", "1", "--quiet", *_with_temperature(extra)]

    def apply(self, *extra, spec=None, top=None, traj=None):
        return ["apply", spec or self.s("cv.json"), "--topology", top or self.top,
                traj or self.closed, *extra]

    def check(self, values, *extra, traj=None):
        return ["check", self.s("cv.json"), "--topology", self.top,
                "--against", values, traj or self.closed, *extra]

    def hints(self, spec, *extra):
        return ["hints", spec, "--temperature", "300", "--md-step-fs", "2", *extra]

    def export(self, *extra, spec=None, out=None):
        return ["export", spec or self.s("cv.json"), "--to", "openmm", "--out",
                out or self.w("cv.xml"), *extra]

    def funnel_spec(self):
        """A spec on the demo topology with a funnel restraint, in the working directory."""
        funnel = {"id": "funnel", "kind": "funnel", "groups": [[7, 8], [0, 1, 2]],
                  "axis": [0.0, 0.0, 1.0], "lower_wall_z_nm": -0.2, "upper_wall_z_nm": 2.0,
                  "cone_end_z_nm": 1.0, "cone_half_angle_rad": 0.5, "cylinder_radius_nm": 0.2,
                  "blend_half_width_nm": 0.1, "wall_force_constant_kj_mol_nm2": 1000.0,
                  "reference_pocket_nm": [[-0.1, -0.05, 0.0], [0.1, -0.05, 0.0],
                                          [0.0, 0.1, 0.0]]}
        doc = _hand_spec(md.load_topology(self.top)).to_dict()
        spec = Spec(name="funnel", topology=md.load_topology(self.top),
                    descriptors=doc["descriptors"], terms=doc["terms"], restraints=[funnel])
        return self.file("funnel.json", spec.to_json())

    def without_openmm(self):
        self.monkeypatch.setitem(sys.modules, "openmm", None)

    def system_xml(self, n_atoms):
        """An OpenMM System of `n_atoms` particles, serialized, in the working directory."""
        import openmm

        system = openmm.System()
        for _ in range(n_atoms):
            system.addParticle(12.0)
        return self.file("system.xml", openmm.XmlSerializer.serialize(system))


@dataclass
class Case:
    name: str
    make: object  # Ctx -> argv (CLI) or a callable (API)
    expect: object  # exit code (CLI) or exception type (API)
    pattern: str
    skip: str = ""


def _bias_text(n, bad=None):
    """A bias-energy file of `n` frames (two comment lines, a header), values replaced by
    `bad` ({frame: text}) where given."""
    bad = bad or {}
    return "# bias energies\n# kJ/mol\nbias\n" + "".join(
        f"{bad.get(i, 0.5 * (i % 7))}\n" for i in range(n))


def _frames_csv(n):
    return "frame,cv\n" + "".join(f"{i},{0.5 + 0.001 * i}\n" for i in range(n))


# ---------------------------------------------------------------- the command line
CLI_CASES = [
    # -- suggest: output path, checked before any computation
    Case("suggest-out-under-a-regular-file",
         lambda c: c.suggest(out=str(Path(c.file("plain.txt")) / "out")), 2,
         r"cannot write --out '.*plain\.txt/out': '.*plain\.txt' is a file, not a directory"),
    Case("suggest-out-parent-missing",
         lambda c: c.suggest(out=c.w("no/such/dir/out")), 2,
         r"the directory of --out '.*no/such/dir/out' .* does not exist; create it first"),
    Case("suggest-out-not-empty",
         lambda c: [c.file("out/mine.txt"), c.suggest()][1], 2,
         r"output directory '.*out' exists and is not empty; .*--force"),
    Case("suggest-out-force-on-a-foreign-directory",
         lambda c: [c.file("out/mine.txt"), c.suggest("--force")][1], 2,
         r"was not written by cvdesign \(no ranking\.json\)"),
    Case("suggest-out-is-a-file",
         lambda c: c.suggest(out=c.file("out")), 2,
         r"--out '.*out' exists and is not a directory"),
    Case("suggest-out-contains-an-input",
         lambda c: c.suggest("--force", out=c.w("in"), opened=c.copy(c.open, "in/open.xtc")), 2,
         r"--out '.*in' contains an input file .*open\.xtc"),
    # -- suggest: topology and trajectories
    Case("suggest-topology-missing",
         lambda c: c.suggest(top=c.w("none.pdb")), 2,
         r"topology file '.*none\.pdb' does not exist; check the path"),
    Case("suggest-topology-garbage-pdb",
         lambda c: c.suggest(top=c.s("garbage.pdb")), 2,
         r"cannot read topology file '.*garbage\.pdb' with mdtraj \(format PDB, guessed from "
         r"the extension \.pdb\): not a valid PDB file .*; check that it is a complete PDB file"),
    Case("suggest-topology-hdf5-without-pytables",
         lambda c: c.suggest(top=c.s("fake.h5")), 2,
         r"cannot read topology file '.*fake\.h5' .*HDF5.*: reading HDF5 needs PyTables, which "
         r"is not installed; pip install tables",
         skip="PyTables is installed" if HAS_TABLES else ""),
    Case("suggest-topology-is-a-trajectory",
         lambda c: c.suggest(top=c.closed), 2,
         r"XTC \(GROMACS\) files hold coordinates only, not atom names and residues; give a "
         r"topology file"),
    Case("suggest-topology-unknown-extension",
         lambda c: c.suggest(top=c.s("notes.xyzzy")), 2,
         r"mdtraj does not know the extension '\.xyzzy'.*rename the file"),
    Case("suggest-trajectory-gro",
         lambda c: c.suggest(opened=c.s("run.gro")), 2,
         r"cannot read trajectory file '.*run\.gro' .*: a \.gro file .* is not read as a "
         r"trajectory here; convert it to XTC"),
    Case("suggest-trajectory-hdf5-without-pytables",
         lambda c: c.suggest(opened=c.s("fake.h5")), 2,
         r"reading HDF5 needs PyTables, which is not installed; pip install tables, or convert",
         skip="PyTables is installed" if HAS_TABLES else ""),
    Case("suggest-trajectory-missing",
         lambda c: c.suggest(opened=c.w("nope.xtc")), 2,
         r"trajectory file '.*nope\.xtc' does not exist"),
    Case("suggest-trajectory-empty-file",
         lambda c: c.suggest(opened=c.s("empty.xtc")), 2,
         r"trajectory '.*empty\.xtc' is empty \(0 bytes\)"),
    Case("suggest-trajectory-garbage-xtc",
         lambda c: c.suggest(opened=c.s("garbage.xtc")), 2,
         r"cannot read trajectory file '.*garbage\.xtc' with mdtraj \(format XTC"),
    Case("suggest-trajectory-other-atom-count",
         lambda c: c.suggest(opened=c.s("short.xtc")), 2,
         r"trajectory '.*short\.xtc' has 10 atoms but the topology .* has 12"),
    Case("suggest-trajectory-in-both-states",
         lambda c: c.suggest(opened=c.closed), 2,
         r"is given twice with overlapping frames \(for states 'closed' and 'open'\)"),
    # -- suggest: states and options
    Case("suggest-one-state",
         lambda c: ["suggest", "--topology", c.top, "--state", "closed", c.closed,
                    "--out", c.w("out")], 2,
         r"only one state was given \('closed'\)"),
    Case("suggest-state-given-twice",
         lambda c: ["suggest", "--topology", c.top, "--state", "a", c.closed, "--state", "a",
                    c.open, "--out", c.w("out")], 2,
         r"state 'a' is given twice"),
    Case("suggest-state-without-files",
         lambda c: ["suggest", "--topology", c.top, "--state", "a", "--state", "b", c.open,
                    "--out", c.w("out")], 2,
         r"--state a has no trajectory files"),
    Case("suggest-state-without-a-name",  # made a state named after the first file
         lambda c: ["suggest", "--topology", c.top, "--state", c.closed, c.copy(c.closed, "c2.xtc"),
                    "--state", "b", c.open, "--out", c.w("out")], 2,
         r"--state .*closed-1\.xtc .*c2\.xtc: the state name '.*closed-1\.xtc' is an existing "
         r"file; --state takes a NAME and then that state's files"),
    Case("suggest-state-named-like-a-trajectory",
         lambda c: ["suggest", "--topology", c.top, "--state", "gone.xtc", c.closed,
                    "--state", "b", c.open, "--out", c.w("out")], 2,
         r"the state name 'gone\.xtc' is a trajectory file's name; --state takes a NAME"),
    Case("suggest-state-named-dash",
         lambda c: ["suggest", "--topology", c.top, "--state", "-", c.closed,
                    "--state", "b", c.open, "--out", c.w("out")], 2,
         r"--state -: '-' cannot name a state \(in a labels file it marks a frame in no "
         r"state\)"),
    Case("suggest-trajectory-ends-inside-a-frame",  # was "XTC read error: Float", no hint
         lambda c: c.suggest(closed=c.s("cut.xtc")), 2,
         r"trajectory '.*cut\.xtc' could not be read in frames 0 to 19 \(XTC read error: "
         r"[^)]*\): it ends inside a frame \(was it truncated, or is it still being written\?\); "
         r"check the file"),
    Case("apply-trajectory-ends-inside-a-frame",
         lambda c: c.apply(traj=c.s("cut.xtc")), 2,
         r"trajectory '.*cut\.xtc' could not be read (at frame 0|in frames 0 to 19) \(XTC "
         r"read error: [^)]*\): it ends inside a frame \(was it truncated"),
    Case("suggest-selection-matches-nothing",
         lambda c: c.suggest("--select", "name CA"), 2,
         r"selection 'name CA' matches no atoms in a topology of 12 atoms"),
    Case("suggest-selection-invalid",
         lambda c: c.suggest("--select", "name and and"), 2,
         r"invalid atom selection 'name and and'"),
    Case("suggest-runs-without-lag",
         lambda c: ["suggest", "--topology", c.top, "--runs", c.closed, c.open,
                    "--out", c.w("out")], 2,
         r"--runs needs --lag PS"),
    Case("suggest-n-states-with-state",
         lambda c: c.suggest("--n-states", "3"), 2,
         r"--n-states goes with --runs"),
    Case("suggest-slow-objective-without-lag",
         lambda c: c.suggest("--objective", "slow"), 2,
         r"objective 'slow' needs a lag time"),
    Case("suggest-negative-cutoff",
         lambda c: c.suggest("--cutoff", "-1"), 2,
         r"argument --cutoff: '-1' must be positive"),
    Case("suggest-infinite-temperature",
         lambda c: c.suggest("--temperature", "inf"), 2,
         r"argument --temperature: 'inf' must be a finite positive number"),
    Case("suggest-bias-without-temperature",
         lambda c: c.suggest("--bias-energy", c.closed, c.file("b.txt", _bias_text(2000)),
                             "NO-TEMPERATURE"), 2,
         r"--bias-energy needs --temperature K, the temperature the biased runs were "
         r"simulated at: their frames are reweighted by exp\(V/kT\) at it, so it has no "
         r"default; give it"),
    Case("suggest-nan-lag",
         lambda c: c.suggest("--lag", "nan"), 2,
         r"argument --lag: 'nan' is not a number; give a positive number"),
    Case("suggest-unknown-kind",
         lambda c: c.suggest("--kinds", "distance,torsionish"), 2,
         r"unknown kind\(s\) torsionish"),
    Case("suggest-too-few-bootstrap-replicates",  # wrote "95 %" intervals from 1 replicate
         lambda c: c.suggest("--bootstrap", "19"), 2,
         r"argument --bootstrap: '19': a 95 % percentile interval from fewer than 20 "
         r"replicates is meaningless \(common practice is 200 or more\)"),
    Case("suggest-one-state-to-propose",
         lambda c: ["suggest", "--topology", c.top, "--runs", c.closed, "--lag", "2",
                    "--n-states", "1", "--out", c.w("out")], 2,
         r"argument --n-states: '1' must be at least 2 \(one state leaves nothing to tell "
         r"apart\)"),
    Case("suggest-scheduler-not-an-address",  # waited 20 s, then a traceback of dask's
         lambda c: c.suggest("--scheduler", "notanaddress"), 2,
         r"argument --scheduler: scheduler address 'notanaddress' has no port; give "
         r"tcp://HOST:PORT \(or HOST:PORT\)"),
    Case("suggest-abbreviated-option",  # --boot was taken for --bootstrap
         lambda c: ["suggest", "--topology", c.top, "--state", "a", c.closed, "--state", "b",
                    c.open, "--out", c.w("out"), "--boot", "0"], 2,
         r"unrecognized arguments: --boot 0"),
    Case("apply-abbreviated-option",
         lambda c: c.apply("--for"), 2, r"unrecognized arguments: --for"),
    Case("suggest-one-fold",
         lambda c: c.suggest("--folds", "1"), 2,
         r"argument --folds: '1' must be at least 2"),
    # -- suggest: biased runs (--bias-energy TRAJ FILE)
    Case("suggest-bias-file-missing",
         lambda c: c.suggest("--bias-energy", c.closed, c.w("none.bias")), 2,
         r"bias-energy file '.*none\.bias' does not exist; check the path"),
    Case("suggest-bias-file-too-short",
         lambda c: c.suggest("--bias-energy", c.closed, c.file("b.txt", _bias_text(10))), 2,
         r"bias-energy file '.*b\.txt' holds 10 bias energies, but trajectory "
         r"'.*closed-1\.xtc' has 2000 frames; give one bias energy per frame"),
    Case("suggest-bias-value-not-a-number",
         lambda c: c.suggest("--bias-energy", c.closed,
                             c.file("b.txt", _bias_text(2000, {2: "abc"}))), 2,
         r"bias-energy file '.*b\.txt', line 6, column 1: 'abc' is not a number"),
    Case("suggest-bias-value-not-finite",
         lambda c: c.suggest("--bias-energy", c.closed,
                             c.file("b.txt", _bias_text(2000, {7: "nan"}))), 2,
         r"bias-energy file '.*b\.txt', line 11: bias energy 'nan' is not a finite number"),
    Case("suggest-bias-columns-without-bias",
         lambda c: c.suggest("--bias-energy", c.closed, c.file("b.txt", "t v\n0 1\n")), 2,
         r"'.*b\.txt' has 2 columns and none named 'bias' \('t', 'v'\); say which column "
         r"holds the bias energies \(--bias-column N\|NAME"),
    Case("suggest-bias-unknown-column",
         lambda c: c.suggest("--bias-energy", c.closed, c.file("b.txt", _bias_text(2000)),
                             "--bias-column", "energy"), 2,
         r"bias-energy file '.*b\.txt' has no column named 'energy'; its columns are "
         r"\('bias'\)"),
    Case("suggest-bias-for-a-trajectory-not-given",
         lambda c: c.suggest("--bias-energy", c.s("short.xtc"), c.file("b.txt", "1\n")), 2,
         r"--bias-energy .*short\.xtc .*b\.txt: trajectory '.*short\.xtc' is not given with "
         r"--state"),
    Case("suggest-bias-for-a-missing-trajectory",
         lambda c: c.suggest("--bias-energy", c.w("none.xtc"), c.file("b.txt", "1\n")), 2,
         r"trajectory '.*none\.xtc' does not exist"),
    Case("suggest-bias-given-twice",
         lambda c: c.suggest("--bias-energy", c.closed, c.file("a.txt", _bias_text(2000)),
                             "--bias-energy", c.closed, c.file("b.txt", _bias_text(2000))), 2,
         r"--bias-energy names trajectory '.*closed-1\.xtc' twice"),
    Case("suggest-bias-for-a-trajectory-not-among-the-runs",
         lambda c: ["suggest", "--topology", c.top, "--runs", c.closed, "--lag", "1",
                    "--bias-energy", c.open, c.file("b.txt", _bias_text(2000)),
                    "--temperature", "300", "--out", c.w("out")], 2,
         r"--bias-energy .*open-1\.xtc .*b\.txt: trajectory '.*open-1\.xtc' is not given with "
         r"--runs; pair each biased run of --runs with its bias-energy file"),
    Case("suggest-runs-bias-overflowing-rescaled-time",
         lambda c: ["suggest", "--topology", c.top, "--runs", c.closed, "--lag", "1",
                    "--bias-energy", c.closed, c.file("b.txt", _bias_text(2000, {5: "1e7"})),
                    "--temperature", "300", "--out", c.w("out"), "--quiet"], 2,
         r"bias-energy file '.*b\.txt' reaches 1e\+07 kJ/mol .* the rescaled time step "
         r"exp\(V/kT\) overflows"),
    Case("suggest-runs-mixing-biased-and-unbiased-runs",
         lambda c: ["suggest", "--topology", c.top, "--runs", c.closed, c.open, "--lag", "1",
                    "--bias-energy", c.closed, c.file("b.txt", _bias_text(2000)),
                    "--temperature", "300", "--out", c.w("out"), "--quiet"], 2,
         r"runs '.*open-1\.xtc' have no bias energies while other runs do: states proposed "
         r"from runs need every run biased or none"),
    Case("suggest-bias-column-without-bias-energy",
         lambda c: c.suggest("--bias-column", "2"), 2,
         r"--bias-column goes with --bias-energy TRAJ FILE"),
    # -- suggest: trajectories with per-frame states (--labelled TRAJ LABELS)
    Case("suggest-labels-file-missing",
         lambda c: c.suggest("--labelled", c.closed, c.w("none.labels")), 2,
         r"labels file '.*none\.labels' does not exist; check the path"),
    Case("suggest-labels-count-differs",
         lambda c: c.suggest("--labelled", c.closed, c.file("l.txt", "closed\n" * 10)), 2,
         r"--labelled .*closed-1\.xtc .*l\.txt: labels file '.*l\.txt' holds 10 labels, but "
         r"trajectory '.*closed-1\.xtc' has 2000 frames; give one line per frame"),
    Case("suggest-labels-two-words-on-a-line",
         lambda c: c.suggest("--labelled", c.closed, c.file("l.txt", "# x\nclosed\nopen now\n")),
         2, r"labels file '.*l\.txt', line 3: 'open now' is more than one word; give one state "
            r"name \(or '-' for a frame in no state\) per line"),
    Case("suggest-labels-name-a-state-no-state-option-gives",
         lambda c: c.suggest("--labelled", c.closed,
                             c.file("l.txt", "Closed\n" * 1000 + "-\n" * 500 + "open\n" * 500)),
         2, r"--labelled .*closed-1\.xtc .*l\.txt: labels file '.*l\.txt' names state\(s\) "
            r"'Closed' that no --state gives \(the states are 'closed', 'open'\); use those "
            r"names, exactly \(case counts\)"),
    Case("suggest-labels-name-no-state",
         lambda c: c.suggest("--labelled", c.closed, c.file("l.txt", "-\n-\n")), 2,
         r"labels file '.*l\.txt' names no state; give one state name \(or '-'\) per frame"),
    Case("suggest-labelled-with-runs",
         lambda c: ["suggest", "--topology", c.top, "--runs", c.closed, c.open, "--lag", "1",
                    "--labelled", c.closed, c.file("l.txt", "closed\n"),
                    "--out", c.w("out")], 2,
         r"--labelled goes with --state: proposing states from unlabelled runs"),
    Case("suggest-no-states-no-runs",
         lambda c: ["suggest", "--topology", c.top, "--out", c.w("out")], 2,
         r"give the states with --state NAME FILE \[FILE \.\.\.\] \(and trajectories with "
         r"per-frame states with --labelled TRAJ LABELS\), or unlabelled runs with --runs"),
    # -- apply
    Case("apply-out-exists-without-force",
         lambda c: c.apply("--out", c.file("values.csv", "earlier results\n")), 2,
         r"--out '.*values\.csv' already exists; choose another name, or pass --force"),
    Case("apply-out-is-the-trajectory",
         lambda c: c.apply("--out", c.closed, "--force"), 2,
         r"--out '.*closed-1\.xtc' is one of the input files"),
    Case("apply-out-is-the-spec",
         lambda c: c.apply("--out", c.w("cv.json"), "--force",
                           spec=c.copy(c.s("cv.json"), "cv.json")), 2,
         r"--out '.*cv\.json' is one of the input files"),
    Case("apply-out-is-a-directory",
         lambda c: c.apply("--out", str(c.work)), 2,
         r"--out '.*' is a directory; give a file name"),
    Case("apply-out-parent-missing",
         lambda c: c.apply("--out", c.w("missing/values.csv")), 2,
         r"the directory of --out '.*missing/values\.csv' .* does not exist"),
    Case("apply-out-under-a-regular-file",
         lambda c: c.apply("--out", str(Path(c.file("plain.txt")) / "values.csv")), 2,
         r"'.*plain\.txt' is a file, not a directory"),
    Case("apply-out-is-a-device",
         lambda c: c.apply("--out", os.devnull, "--force"), 2,
         r"--out '/dev/null' exists and is not a regular file",
         skip="" if os.path.exists(os.devnull) and os.devnull == "/dev/null" else "no /dev/null"),
    Case("apply-spec-missing",
         lambda c: c.apply(spec=c.w("absent.json")), 2,
         r"spec file '.*absent\.json' does not exist"),
    Case("apply-spec-not-json",
         lambda c: c.apply(spec=c.s("notjson.json")), 2,
         r"spec file '.*notjson\.json' is not valid JSON: .* at line 1"),
    Case("apply-spec-not-utf8",
         lambda c: c.apply(spec=c.s("latin1.json")), 2,
         r"spec file '.*latin1\.json' is not UTF-8 text"),
    Case("apply-spec-nested-100000-deep",
         lambda c: c.apply(spec=c.s("deep.json")), 2,
         r"nests lists or objects more than 100 levels deep .* \[spec file '.*deep\.json'\]"),
    Case("apply-spec-nested-150-deep",
         lambda c: c.apply(spec=c.s("deep150.json")), 2,
         r"nests lists or objects more than 100 levels deep"),
    Case("apply-spec-with-nan",
         lambda c: c.apply(spec=c.s("nan.json")), 2,
         r"\$\.offset: NaN is not allowed in a spec"),
    Case("apply-spec-scale-overflowing",  # wrote -inf
         lambda c: c.apply(spec=c.s("tiny.json")), 2,
         r"\$\.terms\[0\]\.scale: weight / scale is not a finite number .* \[spec file "
         r"'.*tiny\.json'\]"),
    Case("apply-spec-term-repeated",  # counted the term twice
         lambda c: c.apply(spec=c.s("twice.json")), 2,
         r"\$\.terms\[1\]: repeats the identity term of descriptor 'd0' \(first at "
         r"\$\.terms\[0\]\)"),
    Case("apply-spec-state-mean-unreachable",
         lambda c: c.apply(spec=c.s("unreachable.json")), 2,
         r"\$\.states\.open\.mean: -20\.0 lies outside the values the CV can reach "
         r"\[-7\.0, null \(unbounded\)\]"),
    Case("check-spec-with-stale-states",  # printed the old observed range as this CV's
         lambda c: ["check", c.s("stale.json"), "--topology", c.top], 2,
         r"\$\.cv_digest: spec file '.*stale\.json': its states and observed_range \(read "
         r"here: observed_range\)"),
    Case("apply-spec-of-another-format",
         lambda c: c.apply(spec=c.s("other.json")), 2,
         r"this is not a cvdesign spec: format is \"some-other-tool\""),
    Case("apply-topology-of-another-molecule",
         lambda c: c.apply(top=c.s("eleven.pdb")), 2,
         r"the spec was made for a topology of 12 atoms; this topology has 11 atoms"),
    Case("apply-trajectory-coordinate-far-outside-any-box",
         lambda c: c.apply(traj=c.s("far.dcd")), 2,
         r"trajectory '.*far\.dcd' frame 3 has a coordinate beyond 100000 nm .* for atom 2 "
         r"\(LCH1-C3\)"),
    Case("apply-trajectory-garbage-pdb",
         lambda c: c.apply(traj=c.s("garbage.pdb")), 2,
         r"cannot read trajectory file '.*garbage\.pdb' .*: not a valid PDB file"),
    # -- check
    Case("check-values-missing",
         lambda c: c.check(c.w("nothing.csv")), 2,
         r"values file '.*nothing\.csv' does not exist"),
    Case("check-values-only-comments",
         lambda c: c.check(c.file("v.xvg", "# a comment\n@ title \"cv\"\n\n")), 2,
         r"values file '.*v\.xvg' holds no values \(only blank or comment lines\)"),
    Case("check-values-header-only",
         lambda c: c.check(c.file("v.csv", "frame,value\n")), 2,
         r"values file '.*v\.csv' holds a header line and no values"),
    Case("check-values-not-a-number",
         lambda c: c.check(c.file("v.txt", "0.5\nabc\n0.7\n")), 2,
         r"values file '.*v\.txt', line 2, column 1: 'abc' is not a number"),
    Case("check-values-nan",
         lambda c: c.check(c.file("v.txt", "0.5\nnan\n")), 2,
         r"values file '.*v\.txt', line 2: value 'nan' is not a finite number"),
    Case("check-values-frame-index-first-csv",
         lambda c: c.check(c.file("v.csv", _frames_csv(5))), 2,
         r"has 2 columns \('frame', 'cv'\) and none is named 'value' \(the first column looks "
         r"like a frame index or a time, not the CV\); say which column holds the CV with "
         r"--column N"),
    Case("check-values-integer-sequence-first-no-header",
         lambda c: c.check(c.file("v.dat", "0 0.51\n1 0.52\n2 0.53\n")), 2,
         r"has 2 columns and no header line naming a 'value' column \(the first column looks "
         r"like a frame index"),
    Case("check-values-ragged-lines",
         lambda c: c.check(c.file("v.dat", "0 0.51\n1\n"), "--column", "2"), 2,
         r"values file '.*v\.dat', line 2: 1 column, but column 2 holds the values"),
    Case("check-column-beyond-the-last",
         lambda c: c.check(c.file("v.dat", "0 0.51\n1 0.52\n"), "--column", "5"), 2,
         r"--column 5: values file '.*v\.dat' has 2 columns"),
    Case("check-column-zero",
         lambda c: c.check(c.file("v.dat", "0.51\n0.52\n"), "--column", "0"), 2,
         r"--column 0 is not a column; columns count from 1"),
    Case("check-column-name-not-in-header",
         lambda c: c.check(c.file("v.csv", _frames_csv(3)), "--column", "rmsd"), 2,
         r"--column 'rmsd': values file '.*v\.csv' has no column of that name; its columns "
         r"are 'frame', 'cv'"),
    Case("check-column-name-without-header",
         lambda c: c.check(c.file("v.dat", "0 0.51\n1 0.52\n"), "--column", "cv"), 2,
         r"--column 'cv' names a column, but values file '.*v\.dat' has no header line"),
    Case("check-column-without-against",
         lambda c: ["check", c.s("cv.json"), "--topology", c.top, "--column", "2"], 2,
         r"--column goes with --against"),
    Case("check-wrong-number-of-values",
         lambda c: c.check(c.file("v.txt", "0.5\n0.6\n0.7\n")), 2,
         r"holds 3 values but '.*closed-1\.xtc' has 2000 frames; give one value per frame"),
    Case("check-frame-the-trajectory-lacks",
         lambda c: c.check(c.file("v.csv", "frame,value\n99999,0.5\n")), 2,
         r"names frame 99999, which '.*closed-1\.xtc' does not have \(2000 frames\)"),
    Case("check-negative-tolerance",
         lambda c: c.check(c.file("v.txt", "0.5\n"), "--tolerance", "-1"), 2,
         r"argument --tolerance: '-1' must be positive"),
    # -- hints
    Case("hints-spec-missing",
         lambda c: c.hints(c.w("none.json")), 2,
         r"spec file '.*none\.json' does not exist"),
    Case("hints-negative-temperature",
         lambda c: ["hints", c.s("cv.json"), "--temperature", "-3", "--md-step-fs", "2"], 2,
         r"argument --temperature: '-3' must be positive"),
    Case("hints-nan-barrier",
         lambda c: c.hints(c.s("cv.json"), "--barrier", "nan"), 2,
         r"argument --barrier: 'nan' is not a number"),
    Case("hints-zero-autocorrelation-time",
         lambda c: c.hints(c.s("cv.json"), "--autocorrelation-time-ps", "0"), 2,
         r"argument --autocorrelation-time-ps: '0' must be positive"),
    Case("hints-spec-without-states",
         lambda c: c.hints(c.s("nospread.json")), 2,
         r"nospread\.json: no hints: spec 'cv-test' records no states; hints need the CV's "
         r"mean and within-state spread"),
    Case("hints-spec-with-stale-states",  # sized walls from states of another CV, silently
         lambda c: c.hints(c.s("stale.json")), 2,
         r"\$\.cv_digest: spec file '.*stale\.json': its states and observed_range \(read "
         r"here: states\) are in the units of the CV they were computed for, and the CV was "
         r"edited since"),
    Case("hints-spec-negative-integrated-time",
         lambda c: c.hints(c.s("tau.json")), 2,
         r"tau\.json: no hints: \$\.scores\.integrated_time_ps of spec file '.*tau\.json' is "
         r"-1\.0: it must be a positive number of ps"),
    Case("hints-spec-nested-deep",
         lambda c: c.hints(c.s("deep.json")), 2,
         r"nests lists or objects more than 100 levels deep"),
    Case("hints-unknown-kernel",
         lambda c: c.hints(c.s("cv.json"), "--kernel", "box"), 2,
         r"argument --kernel: invalid choice: 'box'"),
    # -- demo
    Case("demo-unknown-option",
         lambda c: ["demo", "--out", c.w("d"), "--seed", "3"], 2,
         r"cvdesign demo: error: unrecognized arguments: --seed 3 \(see cvdesign demo --help\)"),
    Case("demo-out-not-empty",
         lambda c: [c.file("d/mine.txt"), ["demo", "--out", c.w("d"), "--bootstrap", "0"]][1],
         2, r"output directory '.*d' exists and is not empty"),
    Case("demo-out-under-a-regular-file",
         lambda c: ["demo", "--out", str(Path(c.file("plain.txt")) / "d"), "--bootstrap", "0"],
         2, r"'.*plain\.txt' is a file, not a directory"),
    Case("demo-negative-bootstrap",
         lambda c: ["demo", "--out", c.w("d"), "--bootstrap", "-5"], 2,
         r"argument --bootstrap: '-5' must be at least 0"),
    Case("apply-same-trajectory-twice",  # spoke of "states 'all' and 'all'" and frames=
         lambda c: c.apply(traj=c.closed) + [c.closed], 2,
         r"trajectory '.*closed-1\.xtc' is given twice; give each trajectory once"),
    Case("apply-same-trajectory-under-two-names",
         lambda c: [os.symlink(c.closed, c.w("alias.xtc")),
                    c.apply(traj=c.closed) + [c.w("alias.xtc")]][1], 2,
         r"trajectories '.*closed-1\.xtc' and '.*alias\.xtc' are the same file; give each "
         r"trajectory once"),
    # -- report: what is not a cvdesign output, and its --out
    Case("report-target-missing",
         lambda c: ["report", c.w("nothing")], 2,
         r"'.*nothing' does not exist; give the directory that 'cvdesign suggest' or "
         r"'cvdesign demo' wrote, or the spec file that 'cvdesign funnel' wrote"),
    Case("report-target-not-an-output-directory",
         lambda c: [c.file("some/notes.txt"), ["report", c.w("some")]][1], 2,
         r"'.*some' is not a cvdesign output directory: it has no ranking\.json"),
    Case("report-target-a-spec-without-funnel",
         lambda c: ["report", c.s("cv.json")], 2,
         r"'.*cv\.json' is not a cvdesign output: give the directory .* or a spec with a "
         r"funnel restraint written by 'cvdesign funnel'"),
    Case("report-ranking-not-json",
         lambda c: [c.file("out/ranking.json", "{not json"), ["report", c.w("out")]][1], 2,
         r"ranking\.json: not valid JSON .*; it is not as cvdesign wrote it, re-run the "
         r"command that made it"),
    Case("report-ranking-of-another-format",
         lambda c: [c.file("out/ranking.json", '{"format": "x"}'), ["report", c.w("out")]][1],
         2, r"ranking\.json: no cvdesign ranking \(format 'cvdesign-ranking'"),
    Case("report-out-is-a-file-of-the-output",
         lambda c: [c.file("out/ranking.json", "{}"),
                    ["report", c.w("out"), "--out", c.w("out/ranking.json"), "--force"]][1], 2,
         r"--out '.*ranking\.json' is one of the input files; writing it would replace"),
    Case("report-ranking-of-a-newer-version",  # was read as if it were version 1
         lambda c: [c.file("out/ranking.json", '{"format": "cvdesign-ranking", "version": 2, '
                                               '"states": [], "ranking": []}'),
                    ["report", c.w("out")]][1], 2,
         r"ranking\.json: version 2 of the ranking; this cvdesign reads version 1\. Re-run the "
         r"command that made it with this version"),
    Case("report-out-not-html",  # --force replaced any file with the report
         lambda c: [c.file("out/ranking.json", "{}"), c.file("notes.txt"),
                    ["report", c.w("out"), "--out", c.w("notes.txt"), "--force"]][2], 2,
         r"--out '.*notes\.txt': the report is an HTML page; give a file name ending in "
         r"\.html"),
    Case("report-out-exists-without-force",
         lambda c: [c.file("out/ranking.json", "{}"), c.file("old.html"),
                    ["report", c.w("out"), "--out", c.w("old.html")]][2], 2,
         r"--out '.*old\.html' already exists; choose another name, or pass --force"),
    # -- export
    Case("export-unknown-target",
         lambda c: ["export", c.s("cv.json"), "--to", "xyzengine", "--out", c.w("cv.xml"),
                    "--no-periodic"], 2,
         r"argument --to: invalid choice: 'xyzengine' \(choose from '?openmm'?\)"),
    Case("export-without-saying-periodic-or-not",
         lambda c: c.export(), 2,
         r"one of the arguments --periodic --no-periodic --system is required"),
    Case("export-periodic-and-no-periodic",
         lambda c: c.export("--periodic", "--no-periodic"), 2,
         r"argument --no-periodic: not allowed with argument --periodic"),
    Case("export-without-openmm",
         lambda c: [c.without_openmm(), c.export("--no-periodic")][1], 2,
         r"exporting to OpenMM needs the openmm package, which is not installed here; install "
         r"it with pip install 'cvdesign\[openmm\]'"),
    Case("export-out-exists-without-force",
         lambda c: c.export("--no-periodic", out=c.file("cv.xml", "<mine/>\n")), 2,
         r"--out '.*cv\.xml' already exists; choose another name, or pass --force"),
    Case("export-out-is-the-spec",
         lambda c: c.export("--no-periodic", "--force", spec=c.copy(c.s("cv.json"), "cv.json"),
                            out=c.w("cv.json")), 2,
         r"--out '.*cv\.json' is one of the input files; writing it would replace"),
    Case("export-spec-missing",
         lambda c: c.export("--no-periodic", spec=c.w("absent.json")), 2,
         r"spec file '.*absent\.json' does not exist"),
    Case("export-spec-with-restraints-without-restraint-out",
         lambda c: c.export("--no-periodic", spec=c.funnel_spec()), 2,
         r"spec '.*funnel\.json' has restraints \('funnel'\) that belong with its CV; give "
         r"--restraint-out FILE\.xml"),
    Case("export-restraint-out-without-restraints",
         lambda c: c.export("--no-periodic", "--restraint-out", c.w("r.xml")), 2,
         r"--restraint-out: spec '.*cv\.json' has no restraints to write; leave the option "
         r"out"),
    Case("export-restraint-out-is-out",
         lambda c: c.export("--no-periodic", "--restraint-out", c.w("cv.xml"),
                            spec=c.funnel_spec()), 2,
         r"--restraint-out '.*cv\.xml' is the same file as --out; give two names"),
    Case("export-system-missing",
         lambda c: c.export("--system", c.w("none.xml")), 2,
         r"--system '.*none\.xml' does not exist",
         skip=NO_OPENMM),
    Case("export-system-holds-a-force",
         lambda c: c.export("--system", c.file("force.xml", '<?xml version="1.0" ?>\n<Force '
                                                'type="CustomBondForce"/>\n')), 2,
         r"--system '.*force\.xml' holds no OpenMM System \(no <System> element\); write it "
         r"with openmm\.XmlSerializer\.serialize\(system\)",
         skip=NO_OPENMM),
    Case("export-system-not-readable-xml",
         lambda c: c.export("--system", c.file("system.xml", "<System broken\n")), 2,
         r"--system '.*system\.xml' is not an OpenMM XML file OpenMM can read",
         skip=NO_OPENMM),
    Case("export-system-of-another-size",
         lambda c: c.export("--system", c.system_xml(11)), 2,
         r"the openmm\.System has 11 particles, but spec 'cv-test' was made for a topology "
         r"of 12 atoms",
         skip=NO_OPENMM),
    # -- the command itself
    Case("unknown-command",
         lambda c: ["design-everything"], 2,
         r"argument COMMAND: invalid choice: 'design-everything'"),
]


# ---------------------------------------------------------------- the Python API
def _boxed_trajectory(c):
    traj = md.load(c.closed, top=c.top)[:3]
    traj.unitcell_vectors = np.tile(np.eye(3, dtype=np.float32) * 5.0, (3, 1, 1))
    return traj


def _renamed_trajectory(c):
    """Frames of the demo with a topology whose atom 7 (used by the spec) is renamed."""
    traj = md.load(c.closed, top=c.top)[:2]
    traj.topology.atom(7).name = "X8"
    return traj


def _save_under(spec_path, out):
    spec = load_spec(spec_path)
    return lambda: spec.save(out)


def _self_containing_spec():
    doc = {"format": "cvdesign-spec", "version": 1}
    doc["hints"] = doc
    return doc


def _demo_source(c):
    return Source.from_states(c.top, {"closed": [c.closed], "open": [c.open]})


def _screening(c, executor):
    """A screening pass of the demo's pool, run on `executor()`."""
    src = _demo_source(c)
    return lambda: run_pass(ScreeningPass(PoolFeaturizer(build_pool(src))), src,
                            executor=executor())


def _unused_port():
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


HAS_DASK = importlib.util.find_spec("distributed") is not None


API_CASES = [
    Case("api-suggest-too-few-bootstrap-replicates",  # wrote "95 %" intervals from 1 replicate
         lambda c: lambda: cvdesign.suggest(Source.from_states(c.top, {"a": [c.closed],
                                                                       "b": [c.open]}),
                                            n_bootstrap=1), InputError,
         r"n_bootstrap=1: a 95 % percentile interval from fewer than 20 replicates is "
         r"meaningless \(common practice is 200 or more\); give 0 to turn the bootstrap off"),
    Case("api-suggest-with-a-file-name",
         lambda c: lambda: cvdesign.suggest("file.pdb"), InputError,
         r"suggest\(\) needs a Source \(a topology and trajectories grouped by state\), not "
         r"str 'file\.pdb'; build one with Source\.from_states"),
    Case("api-load-spec-nested-deep",
         lambda c: lambda: load_spec(c.s("deep.json")), SpecError,
         r"^\$: the document nests lists or objects more than 100 levels deep"),
    Case("api-spec-from-json-nested-deep",
         lambda c: lambda: Spec.from_json("[" * 50_000 + "]" * 50_000), SpecError,
         r"more than 100 levels deep"),
    Case("api-spec-from-dict-nested-deep",
         lambda c: lambda: Spec.from_dict({"format": "cvdesign-spec", "hints": _nested(5000)}),
         SpecError, r"more than 100 levels deep"),
    Case("api-spec-from-dict-containing-itself",
         lambda c: lambda: Spec.from_dict(_self_containing_spec()), SpecError,
         r"more than 100 levels deep"),
    Case("api-spec-hints-of-stale-states",
         lambda c: lambda: spec_hints(load_spec(c.s("stale.json")), temperature=300.0,
                                      md_step_fs=2.0), SpecError,
         r"^\$\.cv_digest: spec file '.*stale\.json': its states and observed_range"),
    Case("api-evaluate-trajectory-and-box",
         lambda c: lambda: load_spec(c.s("cv.json")).evaluate(_boxed_trajectory(c),
                                                              box=[5.0, 5.0, 5.0]),
         InputError, r"box= was given together with an mdtraj\.Trajectory, which brings its own "
         r"unit cell"),
    Case("api-descriptor-values-trajectory-and-box",
         lambda c: lambda: load_spec(c.s("cv.json")).descriptor_values(_boxed_trajectory(c),
                                                                       box=[5.0, 5.0, 5.0]),
         InputError, r"box= was given together with an mdtraj\.Trajectory"),
    Case("api-restraint-energy-trajectory-and-box",
         lambda c: lambda: load_spec(c.s("cv.json")).restraint_energy(_boxed_trajectory(c),
                                                                      box=[5.0, 5.0, 5.0]),
         InputError, r"box= was given together with an mdtraj\.Trajectory"),
    Case("api-evaluate-trajectory-of-another-topology",
         lambda c: lambda: load_spec(c.s("cv.json")).evaluate(_renamed_trajectory(c)),
         TopologyMismatchError, r"atom 7 .* is .*C8.* in the spec but .*X8.* in this topology"),
    Case("api-evaluate-wrong-atom-count",
         lambda c: lambda: load_spec(c.s("cv.json")).evaluate(np.zeros((2, 11, 3))),
         InputError, r"xyz has 11 atoms per frame; this spec \('cv-test'\) was made for a "
         r"topology of 12 atoms"),
    Case("api-source-garbage-topology",
         lambda c: lambda: Source(c.s("garbage.pdb")), InputError,
         r"cannot read topology file '.*garbage\.pdb' with mdtraj .*not a valid PDB file"),
    Case("api-source-gro-trajectory",
         lambda c: lambda: Source(c.top).add(c.s("run.gro"), state="a"), InputError,
         r"convert it to XTC"),
    Case("api-source-hdf5-topology-without-pytables",
         lambda c: lambda: Source(c.s("fake.h5")), InputError,
         r"reading HDF5 needs PyTables, which is not installed; pip install tables",
         skip="PyTables is installed" if HAS_TABLES else ""),
    Case("api-load-spec-with-a-garbage-topology",
         lambda c: lambda: load_spec(c.s("cv.json"), topology=c.s("garbage.pdb")), InputError,
         r"cannot read topology file '.*garbage\.pdb' with mdtraj"),
    Case("api-spec-save-under-a-regular-file",
         lambda c: _save_under(c.s("cv.json"), Path(c.file("plain.txt")) / "cv.json"),
         InputError, r"cannot write spec '.*plain\.txt/cv\.json': directory '.*plain\.txt' "
         r"is a file, not a directory"),
    Case("api-plan-tasks-with-a-file-name",
         lambda c: lambda: plan_tasks("run.xtc"), InputError,
         r"plan_tasks\(\) needs a Source, not str"),
    Case("api-plan-tasks-zero-leaf-frames",
         lambda c: lambda: plan_tasks(_demo_source(c), leaf_frames=0), InputError,
         r"leaf_frames=0 must be a positive number of frames"),
    Case("api-run-pass-not-a-pass",
         lambda c: lambda: run_pass("moments", _demo_source(c)), InputError,
         r"run_pass\(\) needs a Pass or a sequence of Pass objects"),
    Case("api-run-pass-zero-workers",
         lambda c: _screening(c, lambda: 0), InputError,
         r"n_workers=0 must be a positive number of processes"),
    Case("api-run-pass-unreachable-scheduler",
         lambda c: _screening(c, lambda: DaskExecutor(f"tcp://127.0.0.1:{_unused_port()}",
                                                      connect_timeout=1)),
         SchedulerUnreachableError,
         r"cannot reach the Dask scheduler at 'tcp://127\.0\.0\.1:\d+' within 1 s",
         skip="" if HAS_DASK else "dask.distributed is not installed"),
    Case("api-suggest-cutoff-as-a-string",
         lambda c: lambda: cvdesign.suggest(_demo_source(c), cutoff="1.0"), InputError,
         r"cutoff='1\.0' must be a positive number in nm \(a float such as 1\.0, not a "
         r"string\)"),
    Case("api-suggest-coordination-r0-as-a-string",
         lambda c: lambda: cvdesign.suggest(_demo_source(c), coordination_r0="0.45"),
         InputError, r"coordination_r0='0\.45' must be a positive number in nm"),
    Case("api-suggest-kinds-string-with-an-unknown-kind",
         lambda c: lambda: cvdesign.suggest(_demo_source(c), kinds="distance,torsion"),
         InputError, r"kinds: unknown descriptor kinds \['torsion'\]; use a comma-separated"),
    Case("api-build-pool-cutoff-as-a-string",
         lambda c: lambda: build_pool(_demo_source(c), cutoff="1.0"), InputError,
         r"cutoff='1\.0' must be a positive number in nm"),
    Case("api-build-pool-nan-coordination-r0",
         lambda c: lambda: build_pool(_demo_source(c), kinds="center_distance,coordination",
                                      coordination_r0=float("nan")), InputError,
         r"coordination_r0=nan must be a positive number in nm"),
    Case("api-propose-states-cutoff-as-a-string",
         lambda c: lambda: propose_states(_demo_source(c), lag=2.0, cutoff="1.0"), InputError,
         r"cutoff='1\.0' must be a positive number in nm"),
    Case("api-propose-states-kinds-string-with-an-unknown-kind",
         lambda c: lambda: propose_states(_demo_source(c), lag=2.0, kinds="distance,torsion"),
         InputError, r"kinds: unknown descriptor kinds \['torsion'\]"),
    Case("api-propose-states-with-a-file-name",
         lambda c: lambda: propose_states("run.xtc", lag=2.0), InputError,
         r"propose_states\(\) needs a Source \(a topology and the runs\), not str"),
    Case("api-propose-states-zero-workers",
         lambda c: lambda: propose_states(_demo_source(c), lag=2.0, executor=0), InputError,
         r"n_workers=0 must be a positive number of processes"),
    Case("api-to-openmm-without-saying-periodic-or-not",
         lambda c: lambda: load_spec(c.s("cv.json")).to_openmm(), InputError,
         r"say whether the system has a periodic box: periodic=True .* or periodic=False "
         r"\(no box\), or pass the openmm\.System as system=",
         skip=NO_OPENMM),
    Case("api-to-openmm-without-openmm",
         lambda c: [c.without_openmm(),
                    lambda: load_spec(c.s("cv.json")).to_openmm(periodic=True)][1], InputError,
         r"needs the openmm package, .* pip install 'cvdesign\[openmm\]'"),
    Case("api-restraint-to-openmm-without-restraints",
         lambda c: lambda: load_spec(c.s("cv.json")).restraint_to_openmm(periodic=False),
         InputError, r"spec 'cv-test' has no restraints",
         skip=NO_OPENMM),
    Case("api-to-openmm-system-not-a-system",
         lambda c: lambda: load_spec(c.s("cv.json")).to_openmm(system="system.xml"),
         InputError, r"system must be an openmm\.System; got str",
         skip=NO_OPENMM),
    Case("api-source-bias-without-temperature",
         lambda c: (lambda b: lambda: Source(c.top).add(c.closed, "closed", bias=b))(
             c.file("b.txt", _bias_text(2000))),
         InputError, r"a bias-energy file \('.*b\.txt'\) needs the temperature of the biased "
                     r"run: give temperature=K to Source"),
    Case("api-source-labelled-bias-with-labels-of-another-length",
         lambda c: (lambda b: lambda: Source(c.top, temperature=300.0).add_labelled(
             c.closed, ["closed"] * 1995, bias=b))(c.file("b.txt", _bias_text(2000))),
         InputError, r"labels for '.*closed-1\.xtc' hold 1995 labels, but the trajectory has "
                     r"2000 frames \(and its bias-energy file '.*b\.txt' 2000 values\); give "
                     r"one label per frame"),
    Case("api-source-labelled-none-as-text",  # labels.astype(str) of basin labels
         lambda c: lambda: Source(c.top).add_labelled(
             c.closed, np.array(["closed"] * 1000 + [None] * 1000).astype(str)),
         InputError, r"labels for '.*closed-1\.xtc': label 'None' is not taken as a state name: "
                     r"it is what a frame in no state becomes when None or NaN is written as "
                     r"text"),
    Case("api-source-labels-file-nan",
         lambda c: (lambda f: lambda: Source(c.top).add_labelled(c.closed, read_labels_file(f)))(
             c.file("labels.txt", "closed\nnan\nopen\n")),
         InputError, r"labels file '.*labels\.txt', line 2: label 'nan' is not taken as a state "
                     r"name"),
    Case("api-source-labelled-bias-as-energies",
         lambda c: lambda: Source(c.top, temperature=300.0).add_labelled(
             c.closed, ["closed"] * 2000, bias=np.zeros(2000)),
         InputError, r"bias= for '.*closed-1\.xtc' is the bias-energy file \(a path\), not the "
                     r"energies \(got ndarray\): label_basins takes the energies"),
    Case("api-source-bias-column-without-bias",
         lambda c: lambda: Source(c.top).add(c.closed, "closed", bias_column=2),
         InputError, r"bias_column=2 for '.*closed-1\.xtc' goes with a bias-energy file"),
    Case("api-source-bias-for-a-trajectory-of-no-state",
         lambda c: (lambda b: lambda: Source.from_states(c.top, {"closed": [c.closed]},
                                                         bias={c.open: b}, temperature=300.0))(
             c.file("b.txt", "1\n")),
         InputError, r"bias-energy file '.*b\.txt' is given for trajectory '.*open-1\.xtc', "
                     r"which is not among the trajectories of the states"),
    Case("api-propose-states-of-biased-runs-overflowing-rescaled-time",
         lambda c: (lambda b: lambda: propose_states(
             Source(c.top, temperature=300.0).add(c.closed, "runs", bias=b), lag=1.0))(
             c.file("b.txt", _bias_text(2000, {5: "1e7"}))),
         InputError, r"bias-energy file '.*b\.txt' reaches 1e\+07 kJ/mol .* at frame 5: the "
                     r"rescaled time step exp\(V/kT\) overflows"),
    Case("api-propose-states-of-biased-and-unbiased-runs",
         lambda c: (lambda b: lambda: propose_states(
             Source(c.top, temperature=300.0).add(c.closed, "runs", bias=b)
             .add(c.open, "runs"), lag=1.0))(c.file("b.txt", _bias_text(2000))),
         InputError, r"runs '.*open-1\.xtc' have no bias energies while other runs do: .* "
                     r"or label the states and give them with --state / --labelled"),
    Case("api-compare-specs-with-an-invalid-spec-dict",
         lambda c: (lambda doc: lambda: compare_specs(doc, {**doc, "terms": []}))(
             load_spec(c.s("cv.json")).to_dict()),
         InputError, r"^second: the dict given is not a valid spec \(\$\.terms: .*\); give a "
                     r"Spec \(load_spec\) or a spec dict of suggest\(\.\.\.\)\.specs"),
    Case("api-basins-from-spec-of-one-state",
         lambda c: (lambda doc: lambda: basins_from_spec(
             {**doc, "states": dict(list(doc["states"].items())[:1])}))(
             load_spec(c.s("cv.json")).to_dict()),
         InputError, r"^the spec has one state, '.*': basin cores need two or more states; give "
                     r"the cores yourself"),
    Case("api-label-basins-temperature-not-a-number",
         lambda c: lambda: label_basins([0.0, 2.0], {"a": (-1, 1), "b": (1.5, 3)},
                                        bias=[0.0, 1.0], temperature="300 K"),
         InputError, r"^temperature='300 K': a bias needs the positive temperature of the run, K"),
    Case("api-fisher-separation-of-three-states",
         lambda c: lambda: fisher_separation([0.0, 1.0, 5.0, 6.0, 9.0], list("aabbc"),
                                             ("a", "b", "c")),
         InputError, r"^states=\('a', 'b', 'c'\) must name two different states \(the ratio "
                     r"compares two\); got 3: call fisher_separation once per pair"),
    Case("api-funnel-from-source-with-a-file-name",
         lambda c: lambda: size_funnel_from_source("run.xtc", [0, 1, 2], [7]), InputError,
         r"size_funnel_from_source\(\) needs a Source of the bound-state trajectories, not str"),
    Case("api-funnel-from-source-shared-atoms",
         lambda c: lambda: size_funnel_from_source(_demo_source(c), [0, 1, 2], [2, 7]),
         InputError, r"pocket and ligand share atoms; the pocket must not include the ligand"),
    Case("api-funnel-from-source-atom-out-of-range",
         lambda c: lambda: size_funnel_from_source(_demo_source(c), [0, 1, 2], [99]),
         InputError, r"ligand must be distinct 0-based atom indices of the topology \(0 to 11\)"),
]


# ---------------------------------------------------------------- the checks
def _snapshot(*roots):
    """{path: sha256 of the bytes (None for a directory)} of everything under `roots`."""
    out = {}
    for root in roots:
        for path in sorted(Path(root).rglob("*")):
            out[str(path)] = (None if path.is_dir() and not path.is_symlink()
                              else hashlib.sha256(path.read_bytes()).hexdigest()
                              if path.is_file() else "link")
    return out


def _distinct(cases):
    names = [c.name for c in cases]
    assert len(names) == len(set(names))
    return cases


def test_the_catalogue_holds_at_least_40_distinct_bad_inputs():
    assert len(_distinct(CLI_CASES + API_CASES)) >= 40
    covered = {c.name.split("-")[0] for c in CLI_CASES + API_CASES}
    assert covered >= {"suggest", "apply", "check", "hints", "demo", "api"}
    assert len({name for name, *_ in FUNNEL_CASES}) == len(FUNNEL_CASES) >= 10


@pytest.mark.parametrize("case", _distinct(CLI_CASES), ids=lambda c: c.name)
def test_command_refuses_bad_input_cleanly(case, shared, tmp_path, capsys, monkeypatch):
    if case.skip:
        pytest.skip(case.skip)
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    ctx = Ctx(shared, work, monkeypatch)
    argv = [str(a) for a in case.make(ctx)]
    before = _snapshot(work, shared["dir"], shared["data"])
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse usage errors
        code = exc.code
    out, err = capsys.readouterr()
    assert code == case.expect, err
    assert re.search(case.pattern, err), err
    assert "Traceback" not in err and "Traceback" not in out
    assert err.startswith("cvdesign") or err.startswith("usage: cvdesign"), err
    if argv[0] != "check":  # check prints its 'valid spec' line before reading the values
        assert out == ""
    assert _snapshot(work, shared["dir"], shared["data"]) == before


@pytest.mark.parametrize("case", _distinct(API_CASES), ids=lambda c: c.name)
def test_python_api_refuses_bad_input_cleanly(case, shared, tmp_path, monkeypatch):
    if case.skip:
        pytest.skip(case.skip)
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    call = case.make(Ctx(shared, work, monkeypatch))
    before = _snapshot(work, shared["dir"], shared["data"])
    with pytest.raises(case.expect, match=case.pattern):
        call()
    assert _snapshot(work, shared["dir"], shared["data"]) == before


# ---------------------------------------------------------------- beyond the table
def _closed_pipe_run(argv):
    """Run ``python -m cvdesign.cli argv`` with standard output a pipe nobody reads."""
    read_end, write_end = os.pipe()
    os.close(read_end)  # closed before the command starts: every write fails with EPIPE
    try:
        return subprocess.run([sys.executable, "-m", "cvdesign.cli", *argv], stdout=write_end,
                              stderr=subprocess.PIPE, text=True, timeout=300,
                              env={**os.environ, "PYTHONPATH": _ROOT + os.pathsep
                                   + os.environ.get("PYTHONPATH", "")})
    finally:
        os.close(write_end)


@pytest.mark.parametrize("which", ["hints", "hints-json", "apply", "check", "no-arguments"])
def test_closed_standard_output_ends_quietly_with_status_141(which, shared):
    spec = str(shared["dir"] / "cv.json")
    step = "--md-step-fs"
    tau = ["--autocorrelation-time-ps", "1"]  # (the spec records none: else a warning)
    argv = {"hints": ["hints", spec, "--temperature", "300", step, "2", *tau],
            "hints-json": ["hints", spec, "--temperature", "300", step, "2", *tau, "--json"],
            "apply": ["apply", spec, "--topology", shared["top"], shared["closed"]],
            "check": ["check", spec, "--topology", shared["top"]],
            "no-arguments": []}[which]
    res = _closed_pipe_run(argv)
    assert res.stderr == ""
    assert res.returncode == EXIT_BROKEN_PIPE == 141


def test_no_arguments_lists_the_commands(capsys):
    assert main([]) == 0
    out = capsys.readouterr().out
    for command in ("suggest", "apply", "check", "hints", "funnel", "export", "demo"):
        assert re.search(rf"^\s+{command}\s+\S", out, flags=re.M), out


@pytest.mark.skipif(IS_ROOT, reason="root may write into a read-only directory")
def test_suggest_refuses_a_read_only_directory_at_once(shared, tmp_path, capsys):
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    try:
        ctx = Ctx(shared, tmp_path)
        assert main(ctx.suggest(out=str(locked / "out"))) == 2
        err = capsys.readouterr().err
        assert re.search(r"cannot write --out '.*locked/out': no permission to write in", err)
        assert list(locked.iterdir()) == []
    finally:
        locked.chmod(0o700)


def test_apply_force_replaces_an_earlier_output_and_nothing_else(shared, tmp_path, capsys):
    ctx = Ctx(shared, tmp_path)
    out = Path(ctx.file("values.csv", "earlier results\n"))
    assert main(ctx.apply("--out", str(out), "--force")) == 0
    rows = out.read_text().splitlines()
    assert rows[0] == "file,frame,time_ps,value,undefined" and len(rows) == 2001
    assert sorted(p.name for p in tmp_path.iterdir()) == ["values.csv"]
    assert "wrote" in capsys.readouterr().err


# ---------------------------------------------------------------------------------------
# funnel: one row of FUNNEL_CASES per bad input, (id, argv builder, expected message).
# A builder gets a FunnelCtx (the host-guest input files, a fresh output directory,
# pytest's monkeypatch) and returns the argument list; it may prepare files (an existing
# output, a trajectory with NaN) first. The test checks the message, exit code 2, no
# traceback, and that no file in the input or output directories was created or changed.

@pytest.fixture(scope="module")
def host_guest(tmp_path_factory):
    return write_host_guest(tmp_path_factory.mktemp("hg"), n_runs=2, n_frames=40)


@dataclass
class FunnelCtx:
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
                "--out", str(self.out if out is None else out), *_with_temperature(extra)]

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

    def with_box(self, edge):
        """A copy of the first run as DCD with a cubic periodic box of `edge` nm."""
        traj = md.load(self.data.paths[0], top=self.data.topology)
        traj.unitcell_vectors = np.tile(np.eye(3, dtype=np.float32) * edge, (len(traj), 1, 1))
        path = self.out_dir / "boxed.dcd"
        traj.save_dcd(str(path))
        return str(path)

    def with_flat_pocket(self, frame):
        """A copy of the first run as DCD whose pocket atoms lie on one line in `frame`."""
        traj = md.load(self.data.paths[0], top=self.data.topology)
        pocket = list(self.data.pocket_atoms)
        traj.xyz[frame, pocket] = 2.0 + np.linspace(0.0, 1.0, len(pocket))[:, None]
        path = self.out_dir / "flat.dcd"
        traj.save_dcd(str(path))
        return str(path)

    def bias_file(self, n, name="b.txt"):
        """A bias-energy file of `n` frames (kJ/mol, header 'bias') in the output directory."""
        return str(self.existing(name, _bias_text(n)))

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
        import cvdesign.bias.funnel

        def fail(result, path):
            raise OSError(28, "No space left on device")
        self.monkeypatch.setattr(cvdesign.bias.funnel, "plot_funnel", fail)


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


FUNNEL_CASES = [
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
     r"--plot needs matplotlib, a dependency of cvdesign that is missing here; reinstall"),
    ("report-exists-without-force",
     lambda c: (c.existing("funnel-report.html"), c.argv())[1],
     r"the report \(funnel-report\.html, beside --out; see --no-report\) "
     r"'.*funnel-report\.html' already exists; choose another name, or pass --force"),
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
    ("exit-point-beyond-half-the-box",
     lambda c: c.argv("--exit-point", *(repr(float(v)) for v in c.pocket_centre() + [0, 0, 1.7]),
                      bound=[c.with_box(3.0)]),
     r"the exit point \(exit_point, --exit-point on the command line\) \[.*\] nm lies "
     r"1\.7000 nm from the pocket centre of the first bound frame \[.*\] nm, more than half "
     r"the smallest box height of that frame \(1\.5000 nm\): under periodic images its "
     r"direction from the pocket is ambiguous .*; give a point within 1\.5000 nm of that "
     r"pocket centre"),
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
    ("pocket-on-a-line-in-a-later-frame",
     lambda c: c.argv(bound=[c.data.paths[0], c.with_flat_pocket(frame=17)]),
     r"trajectory '.*flat\.dcd', pocket atoms: the points of frame 17 lie \(nearly\) on one "
     r"line \(or coincide\); their rotation onto the reference is not determined"),
    ("one-bound-frame",
     lambda c: c.argv(bound=[c.data.topology]),
     r"funnel sizing from 1 bound frame\(s\): the margins come from the ligand's "
     r"fluctuations"),
    ("k-wall-not-positive",
     lambda c: c.argv("--k-wall", "0"),
     r"--k-wall 0\.0 must be a positive force constant in kJ/mol/nm\^2"),
    ("bias-for-a-trajectory-not-bound",
     lambda c: c.argv("--bias-energy", c.data.paths[1], c.bias_file(40),
                      bound=[c.data.paths[0]]),
     r"--bias-energy .*bound-2\.xtc .*b\.txt: trajectory '.*bound-2\.xtc' is not given with "
     r"--bound; pair each biased run of --bound with its bias-energy file"),
    ("bias-without-temperature",
     lambda c: c.argv("--bias-energy", c.data.paths[0], c.bias_file(40), "NO-TEMPERATURE"),
     r"--bias-energy needs --temperature K, the temperature the biased runs were simulated "
     r"at: their frames are reweighted by exp\(V/kT\) at it, so it has no default; give it"),
    ("bias-file-too-short",
     lambda c: c.argv("--bias-energy", c.data.paths[0], c.bias_file(10)),
     r"bias-energy file '.*b\.txt' holds 10 bias energies, but trajectory '.*bound-1\.xtc' "
     r"has 40 frames; give one bias energy per frame"),
    ("bias-unknown-column",
     lambda c: c.argv("--bias-energy", c.data.paths[0], c.bias_file(40), "--bias-column",
                      "energy"),
     r"bias-energy file '.*b\.txt' has no column named 'energy'; its columns are \('bias'\)"),
    ("bias-column-without-bias-energy",
     lambda c: c.argv("--bias-column", "2"),
     r"--bias-column goes with --bias-energy TRAJ FILE"),
    ("temperature-without-bias-energy",
     lambda c: c.argv("--temperature", "300"),
     r"--temperature goes with --bias-energy TRAJ FILE in funnel: it is the temperature the "
     r"biased runs are reweighted at, and unbiased runs need none; leave it out"),
    ("bias-temperature-not-positive",
     lambda c: c.argv("--bias-energy", c.data.paths[0], c.bias_file(40), "--temperature", "-3"),
     r"argument --temperature: '-3' must be"),
    ("workers-not-positive",
     lambda c: c.argv("--workers", "0"),
     r"argument --workers: '0' must be at least 1"),
    ("workers-and-scheduler",
     lambda c: c.argv("--workers", "2", "--scheduler", "tcp://127.0.0.1:8786"),
     r"argument --scheduler: not allowed with argument --workers"),
]


def _funnel_snapshot(*dirs):
    files = {}
    for d in dirs:
        for p in sorted(Path(d).rglob("*")):
            if p.is_file():
                files[str(p)] = p.read_bytes()
    return files


@pytest.mark.parametrize("build, message", [pytest.param(b, m, id=i) for i, b, m in FUNNEL_CASES])
def test_funnel_refuses_bad_input_cleanly(build, message, host_guest, tmp_path, monkeypatch, capsys):
    case = FunnelCtx(host_guest, tmp_path, monkeypatch)
    argv = build(case)
    input_dir = Path(host_guest.topology).parent
    before = _funnel_snapshot(input_dir, tmp_path)
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse usage errors: the usage, then the error
        code = exc.code
    assert code == 2
    captured = capsys.readouterr()
    assert captured.err.startswith("cvdesign funnel: error: ") or (
        captured.err.startswith("usage: cvdesign funnel")
        and "\ncvdesign funnel: error: " in captured.err), captured.err
    assert re.search(message, captured.err), captured.err
    assert "Traceback" not in captured.err and captured.out == ""
    assert _funnel_snapshot(input_dir, tmp_path) == before
    assert not Path("/sys/funnel.json").exists() and not Path("/sys/funnel.png").exists()
