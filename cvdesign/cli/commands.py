"""The ``cvdesign`` command.

Sub-commands:

* ``suggest`` -- rank compact linear CVs separating the given states, write spec files;
* ``apply`` -- evaluate a spec on trajectories, without refitting anything;
* ``check`` -- validate a spec against a topology, and another program's values against it;
* ``hints`` -- starting values for the bias along a spec's CV;
* ``funnel`` -- size a funnel restraint for a bound ligand, written as a spec;
* ``export`` -- write a spec's CV (and restraint) as a simulation engine's own force (OpenMM XML);
* ``demo`` -- run ``suggest`` on the bundled demo data;
* ``report`` -- rebuild the HTML report of an output of ``suggest``, ``demo`` or ``funnel``.

``suggest``, ``demo`` and ``funnel`` write the report (``report.html`` in the output
directory; ``NAME-report.html`` beside the funnel's ``NAME.json``) unless ``--no-report``,
and, always, the data it draws (``report-data.json``; ``NAME-report-data.json``), so
that ``report`` can rebuild it later.
"""

import argparse
import contextlib
import csv
import io
import json
import logging
import math
import os
import re
import sys
import warnings
from pathlib import Path

import numpy as np

from .._version import __version__
from ..constants import (BOLTZMANN_KJ_MOL_K, BOOTSTRAP_TOO_FEW, COORDINATION_EXPONENTS,
                         COORDINATION_R0_NM, FLOAT32_SLACK, MIN_BOOTSTRAP_REPLICATES)
from ..errors import CVDesignError, InputError
from ..io.bias import is_number as _is_number
from ..kinds import DEFAULT_KINDS, KINDS

__all__ = ["main", "build_parser", "EXIT_BROKEN_PIPE"]

_log = logging.getLogger(__name__)


def _kinds(text):
    kinds = tuple(k.strip() for k in text.split(",") if k.strip())
    allowed = tuple(KINDS)
    bad = [k for k in kinds if k not in allowed]
    if bad or not kinds:
        raise argparse.ArgumentTypeError(
            f"unknown kind(s) {', '.join(bad) or '(none)'}; use a comma-separated subset of "
            + ",".join(allowed))
    return kinds


def _positive_float(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if math.isnan(v):
        raise argparse.ArgumentTypeError(f"{text!r} is not a number; give a positive number")
    if not v > 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be positive")
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"{text!r} must be a finite positive number")
    return v


def _int_at_least(low, why=""):
    """An argparse type: an integer of at least `low`."""
    def parse(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
        if v < low:
            raise argparse.ArgumentTypeError(f"{text!r} must be at least {low}{why}")
        return v
    return parse


_positive_int = _int_at_least(1)
_non_negative_int = _int_at_least(0)
_at_least_two_folds = _int_at_least(2, " (one fold to fit, one to score)")
_at_least_two_states = _int_at_least(2, " (one state leaves nothing to tell apart)")


def _replicates(text):
    """An argparse type: bootstrap replicates, 0 (off) or at least MIN_BOOTSTRAP_REPLICATES."""
    v = _non_negative_int(text)
    if 0 < v < MIN_BOOTSTRAP_REPLICATES:
        raise argparse.ArgumentTypeError(f"{text!r}: {BOOTSTRAP_TOO_FEW}")
    return v


def _scheduler_address(text):
    """An argparse type: a Dask scheduler address (checked before any connection)."""
    from ..parallel.executors import check_scheduler_address

    try:
        check_scheduler_address(text)
    except InputError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    return text


def _add_executor_options(p):
    """--workers N / --scheduler ADDRESS: where the passes over the trajectories run."""
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", type=_positive_int, default=1, metavar="N",
                       help="read and featurize the trajectories in N local processes "
                            "(default: 1, in this process); the outputs are the same, byte "
                            "for byte")
    where.add_argument("--scheduler", metavar="ADDRESS", default=None, type=_scheduler_address,
                       help="run the passes over the trajectories on a Dask cluster, e.g. "
                            "tcp://10.0.0.5:8786 (needs pip install 'cvdesign[dask]'; every "
                            "worker must read the trajectory paths as given); the outputs "
                            "are the same, byte for byte")


def _add_suggest_options(p):
    p.add_argument("--select", metavar="SEL", default=None,
                   help="atoms the candidate descriptors are built from, in mdtraj selection "
                        "syntax (e.g. 'name CA', 'resid 10 to 40 and not element H'); "
                        "default: heavy atoms of the solute (no hydrogens, water or ions)")
    p.add_argument("--kinds", type=_kinds, default=DEFAULT_KINDS,
                   metavar="K1,K2", help="descriptor kinds in the pool, comma-separated, from "
                   "distance (nm), angle (rad, bonded triples), dihedral (rad, one per "
                   "rotatable bond; enters combinations as cos and sin), center_distance (nm, "
                   "between the mass centers of two residues' selected atoms) and "
                   "coordination (contacts between two residues' selected atoms, "
                   "dimensionless); default: " + ",".join(DEFAULT_KINDS))
    p.add_argument("--cutoff", type=_positive_float, default=1.0, metavar="NM",
                   help="prefilter in nm: keep a pair of atoms (distance) or of residues "
                        "(center_distance, coordination: their mass centers) if its mean "
                        "distance is below this in at least one state, and up to 100 farther "
                        "pairs that separate the states better than any of those; with "
                        "--runs, the states' proposal keeps a pair that comes below it in "
                        "at least 2%% of the frames (default: 1.0 nm)")
    p.add_argument("--coordination-r0", type=_positive_float, default=COORDINATION_R0_NM,
                   metavar="NM",
                   help="switching distance of the coordination numbers in nm: a pair of atoms "
                        "at this distance counts 1/2 (rational switching function, exponents "
                        f"{COORDINATION_EXPONENTS[0]} and {COORDINATION_EXPONENTS[1]}; default: "
                        f"{COORDINATION_R0_NM:g} nm)")
    p.add_argument("--prefilter-stride", type=_positive_int, default=None, metavar="N",
                   help="the prefilter (of atom pairs and of residue pairs) reads every "
                        "N-th frame of each state "
                        "(default: 10, or more so that the state with the fewest frames "
                        "still gives about 2000)")
    p.add_argument("--max-terms", type=_positive_int, default=5, metavar="K",
                   help="largest number of descriptors in one combination (default: 5)")
    p.add_argument("--suggestions", type=_positive_int, default=10, metavar="N",
                   help="number of ranked combinations, each written as a spec (default: 10)")
    p.add_argument("--folds", type=_at_least_two_folds, default=4, metavar="N",
                   help="folds of the held-out scoring, by whole trajectories, or by "
                        "contiguous blocks when a state has one trajectory (default: 4)")
    p.add_argument("--objective", choices=("separate", "slow", "both"), default="separate",
                   help="what the search maximizes on held-out data: 'separate' the states "
                        "(Fisher ratio, dimensionless), 'slow' the slowest linear motion "
                        "(cross-validated VAMP-2 at --lag), or 'both' (product of the "
                        "separation mapped to [0, 1) and the autocorrelation at --lag, within "
                        "the states, or along the runs that cross between them (--labelled "
                        "runs, or --runs labelled by their proposed states) when they cross "
                        "often enough); every suggestion reports both "
                        "numbers (default: separate)")
    p.add_argument("--lag", type=_positive_float, default=None, metavar="PS",
                   help="lag time in ps for slowness scores, converted to frames with each "
                        "file's time step; needed for --objective slow or both (default there: "
                        "10 frames when all files share a known time step) and required with "
                        "--runs (no default: longer than the fast motions inside the states, "
                        "shorter than a run's stay in one; about 10 frame spacings is a start "
                        "to check against the staying probabilities summary.md reports)")
    p.add_argument("--method", choices=("hlda", "lda"), default="hlda",
                   help="discriminant for separate/both: harmonic LDA (within-state scatter "
                        "the harmonic mean of the state covariances, so the narrow state "
                        "weighs most) or plain LDA (default: hlda)")
    p.add_argument("--bootstrap", type=_replicates, default=200, metavar="N",
                   help="block-bootstrap replicates for nominal 95 %% intervals of weights "
                        "and scores (measured coverage about 87-92 %%: somewhat narrow) and "
                        "for term selection frequencies; 0 turns them off "
                        "(default: 200)")
    p.add_argument("--seed", type=_non_negative_int, default=0, metavar="N",
                   help="seed of the bootstrap and of the clustering of --runs; the same "
                        "inputs and seed give byte-identical outputs (default: 0)")
    p.add_argument("--frame-step-ps", type=_positive_float, default=None, metavar="PS",
                   help="time between trajectory frames in ps, for files that store no times "
                        "(DCD, PDB, ...) and for files whose stored times do not increase "
                        "(all zero, as some writers store), which it then replaces; files "
                        "with increasing stored times keep their own (a value that "
                        "disagrees with them, beyond their single precision, is refused when "
                        "every file stores times)")
    p.add_argument("--temperature", type=_positive_float, default=None, metavar="K",
                   help="temperature of the biased run in K, for the bias-parameter hints "
                        "stored in each spec (default: 300), and of the biased runs given with "
                        "--bias-energy, whose frames are reweighted at it (then required: "
                        "there is no default for reweighting)")
    p.add_argument("--md-step-fs", type=_positive_float, default=2.0, metavar="FS",
                   help="MD step of the biased run in fs, for the hints (default: 2; 0.01 to "
                        "100 fs accepted)")
    _add_executor_options(p)
    p.add_argument("--force", action="store_true",
                   help="replace the output directory if it holds an earlier cvdesign output")
    _add_no_report(p, "report.html in the output directory")


def _add_bias_options(p, given_with, effect):
    """--bias-energy TRAJ FILE and --bias-column, for the trajectories of `given_with`."""
    p.add_argument("--bias-energy", nargs=2, action="append", metavar=("TRAJ", "FILE"),
                   default=None,
                   help=f"a biased run: a trajectory given with {given_with} and its "
                        "bias-energy file (one bias energy in kJ/mol per frame of the whole "
                        "trajectory, frame 0 first; '#' comments; one column, or columns with "
                        "a header line, the one named 'bias' read unless --bias-column says "
                        f"otherwise). {effect}")
    p.add_argument("--bias-column", metavar="N|NAME", default=None,
                   help="column of the --bias-energy files holding the bias energies: a "
                        "number counted from 1, or a header name (default: the only column, "
                        "or the one named 'bias')")


def _add_no_report(p, where):
    p.add_argument("--no-report", action="store_true",
                   help=f"do not write the HTML report ({where}: figures and tables in one "
                        "self-contained page; 'cvdesign report' builds it later)")


#: Default force constant of the funnel walls (--k-wall), kJ/mol/nm^2.
_K_WALL = 2000.0


def _wall_penetration(k):
    """How far the ligand centre enters a harmonic wall of force constant `k` (kJ/mol/nm^2) at
    300 K: the rms penetration of the frames inside it, sqrt(kT / k), and the depth at an
    energy of kT, sqrt(2 kT / k) (Boltzmann distribution in a harmonic well, from memory).

    Examples
    --------
    >>> _wall_penetration(2000.0)  # doctest: +NORMALIZE_WHITESPACE
    "at 300 K the ligand centre's rms penetration into a wall, sqrt(kT / k), is 0.035 nm; it
    reaches sqrt(2 kT / k) = 0.050 nm at an energy of kT"
    """
    rms = math.sqrt(BOLTZMANN_KJ_MOL_K * 300.0 / k)
    return (f"at 300 K the ligand centre's rms penetration into a wall, sqrt(kT / k), is "
            f"{rms:.3f} nm; it reaches sqrt(2 kT / k) = {math.sqrt(2.0) * rms:.3f} nm at an "
            "energy of kT")


def _soft_wall_warning(k, cylinder_radius_nm):
    """A warning when walls of force constant `k` (kJ/mol/nm^2) let the ligand centre in,
    at an energy of kT at 300 K, by more than half the cylinder's radius (our choice: the
    funnel's shape then no longer confines it as drawn); None otherwise.

    Examples
    --------
    >>> _soft_wall_warning(2000.0, 0.3) is None  # 0.050 nm at kT
    True
    >>> _soft_wall_warning(5.0, 0.336)[:60]
    '--k-wall 5 kJ/mol/nm^2 is soft: at 300 K the ligand centre r'
    """
    depth = math.sqrt(2.0 * BOLTZMANN_KJ_MOL_K * 300.0 / k)
    if depth <= 0.5 * cylinder_radius_nm:
        return None
    stiff = 2.0 * BOLTZMANN_KJ_MOL_K * 300.0 / (0.25 * cylinder_radius_nm) ** 2
    return (f"--k-wall {k:g} kJ/mol/nm^2 is soft: at 300 K the ligand centre reaches "
            f"{depth:.3f} nm into a wall at an energy of kT, more than half the cylinder's "
            f"radius ({cylinder_radius_nm:.3f} nm), so the walls do not confine it to the "
            f"funnel drawn (nor the box check's reach); a force constant of at least "
            f"{stiff:.3g} kJ/mol/nm^2 keeps that depth within a quarter of the radius")


def _add_verbosity(p, suffix=""):
    """-v/--verbose and -q/--quiet, counted (before the command: dest with `suffix`)."""
    p.add_argument("-v", "--verbose", action="count", default=0, dest="verbose" + suffix,
                   help="say on standard error what is being done (-vv: also how every pass "
                        "over the trajectories is split)")
    p.add_argument("-q", "--quiet", action="count", default=0, dest="quiet" + suffix,
                   help="print nothing on standard error but errors: no progress bars, "
                        "notes or warnings; suggest and demo print only the final table and "
                        "the caution. The outputs keep what they must: apply's CSV marks the "
                        "frames whose value stands in for undefined geometry (column "
                        "undefined), check prints them; hints, funnel and suggest keep their "
                        "warnings in their outputs (suggest: summary.md and the specs; its "
                        "warnings about undefined angles or dihedrals in the input frames are "
                        "in summary.md's 'input frames: ...' note). What the trajectory "
                        "readers print themselves (DCD) is discarded")


def build_parser():
    """The argument parser of the ``cvdesign`` command."""
    # no abbreviations (--boot for --bootstrap): a later option sharing a prefix would
    # change what an abbreviation means
    parser = argparse.ArgumentParser(
        prog="cvdesign", allow_abbrev=False,
        description="Design collective variables (CVs) for enhanced sampling from short "
                    "unbiased trajectories of metastable states. Units: nm, rad, ps, kJ/mol.")
    parser.add_argument("--version", action="version", version=f"cvdesign {__version__}")
    _add_verbosity(parser, "_before")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser(
        "suggest", allow_abbrev=False,
        help="rank compact linear CVs that separate the given states",
        description="Build a pool of candidate descriptors, score each for how well it "
                    "separates the states and how slowly it moves, search compact linear "
                    "combinations (HLDA/LDA, or TICA for --objective slow) ranked on held-out "
                    "trajectories, and write ranking.csv, ranking.json, scorecard.csv, "
                    "summary.md, one spec file per suggestion (cv-01.json is rank 1), "
                    "report-data.json (what the report draws; always written), states.csv "
                    "(the proposed state of every frame, with --runs) and report.html "
                    "(figures; see --no-report). "
                    "Give the states with --state (and runs with per-frame states with "
                    "--labelled), or unlabelled runs with --runs.")
    p.add_argument("--topology", required=True, metavar="TOP",
                   help="topology file that mdtraj reads (PDB, GRO, PSF, PRMTOP, HDF5, ...); "
                        "bonds are needed for angles and dihedrals")
    given = p.add_mutually_exclusive_group()
    given.add_argument("--state", nargs="+", action="append", metavar=("NAME", "FILE"),
                       help="a state name followed by its trajectory files (any format mdtraj "
                            "reads); repeat for each state, at least two states; a name that "
                            "is a file or a trajectory's name, and '-' (no state, in labels "
                            "files), are refused")
    given.add_argument("--runs", nargs="+", metavar="FILE",
                       help="unlabelled exploratory runs instead of --state: metastable states "
                            "are proposed by clustering the slowest TICA coordinates at --lag "
                            "(which is then required), checked to be metastable from the runs' "
                            "transitions (a warning names any that is not, and one when the "
                            "metastable states hold under half the frames), written to "
                            "states.csv, and CVs are designed for them. Refused when the best "
                            "clustering's mean silhouette is below 0.5, when no state is "
                            "metastable, and, without --n-states, when only one is; when no "
                            "clustering is all metastable, the one with the largest fraction "
                            "of metastable states (two or more preferred) is taken. Runs that "
                            "cross between the proposed states give the transition slowness "
                            "that --objective both ranks on")
    p.add_argument("--labelled", nargs=2, action="append", metavar=("TRAJ", "LABELS"),
                   default=None,
                   help="a trajectory whose frames carry their own state, typically a biased "
                        "run that crossed between the states (with --bias-energy): LABELS "
                        "holds one line per frame of TRAJ, frame 0 first, the frame's state "
                        "name (one of the --state names, when --state is given) or '-' for a "
                        "frame between the states ('#' comments). Its labelled frames join "
                        "their states; when its labels visit two or "
                        "more states, slowness is also measured along the whole run, "
                        "crossings included, which --objective both then ranks on. Repeat "
                        "for each such trajectory")
    _add_bias_options(p, "--state, --labelled or --runs",
                      "Its frames are reweighted by exp(V/kT) at --temperature, and its "
                      "lagged pairs taken in rescaled time dt*exp(V/kT). Repeat for each "
                      "biased run; a state given with --state may also have unbiased runs "
                      "(the two groups are combined in proportion to their effective sample "
                      "sizes); with --runs, every run must be biased or none")
    p.add_argument("--n-states", type=_at_least_two_states, default=None, metavar="N",
                   help="with --runs: the number of states to propose (default: 2 to 6, the "
                        "fewest that are all metastable among the best mean silhouettes)")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output directory; must not exist or be empty (see --force)")
    _add_suggest_options(p)

    p = sub.add_parser(
        "apply", allow_abbrev=False,
        help="evaluate a spec on trajectories",
        description="Evaluate the CV of a spec file frame by frame from coordinates alone "
                    "(no refitting). Prints CSV with columns file, frame (0-based), time_ps "
                    "(simulation time in ps; empty for formats that store no times, such as "
                    "DCD), value (the CV, in the units of the spec), undefined (empty, or the "
                    "ids of the CV's descriptors that are undefined in that frame, "
                    "space-separated: an angle with an arm of zero length or a dihedral with "
                    "collinear or coincident atoms, for which the evaluator used pi/2 or 0 "
                    "rad, so that the frame's value is not a measurement of the CV; a warning "
                    "on standard error names such frames, and -q leaves the column alone).")
    p.add_argument("spec", metavar="SPEC", help="spec file (cv-NN.json) written by suggest")
    p.add_argument("--topology", required=True, metavar="TOP",
                   help="topology file; it must match the one the spec was made for")
    p.add_argument("trajectories", nargs="+", metavar="TRAJ",
                   help="trajectory files (any format mdtraj reads); coordinates in nm")
    p.add_argument("--out", metavar="FILE.csv", default=None,
                   help="write the CSV here instead of standard output; an existing file is "
                        "kept unless --force, and an input file is never replaced")
    p.add_argument("--force", action="store_true",
                   help="replace an existing --out file (never one of the inputs)")

    p = sub.add_parser(
        "check", allow_abbrev=False,
        help="validate a spec against a topology, and an engine's values against it",
        description="Validate a spec file (schema, atom indices, topology fingerprint) against "
                    "a topology, and print the CV's reachable and observed ranges and the "
                    "states at a bound of it (folded); with --against, compare CV values that "
                    "another program computed on a trajectory with cvdesign's reference "
                    "evaluator, report the largest deviation and the frames where it occurs, "
                    "and exit 1 if it exceeds the tolerance. This is how to show that the "
                    "engine side computes the same CV. On every trajectory given (--against, "
                    "--trajectory) it reports frames outside the CV's reachable range (an "
                    "error, exit 1: no structure gives them) and outside its observed range "
                    "(information: values the design runs did not reach). A periodic CV "
                    "(a single dihedral) is compared modulo its period: an engine may give "
                    "the angle in [0, 2 pi) or [-pi, pi], and its values are judged by their "
                    "difference from the reference wrapped into one period, its range "
                    "modulo the period.")
    p.add_argument("spec", metavar="SPEC", help="spec file (cv-NN.json)")
    p.add_argument("--topology", required=True, metavar="TOP",
                   help="topology file the spec must match")
    p.add_argument("--against", nargs=2, action="append", metavar=("VALUES", "TRAJ"),
                   help="CV values computed elsewhere and the trajectory they were computed "
                        "on; repeat for several trajectories. VALUES is a CSV (a 'value' "
                        "column, optionally 'frame', as 'cvdesign apply' writes) or "
                        "whitespace-separated columns; lines starting with '#' or '@' are "
                        "comments. With several columns and none named 'value', say which "
                        "holds the CV with --column")
    p.add_argument("--column", metavar="N|NAME", default=None,
                   help="the column of the VALUES files that holds the CV: a number counted "
                        "from 1, or a name from a header line")
    p.add_argument("--trajectory", nargs="+", action="extend", metavar="TRAJ",
                   help="trajectories to check the CV's range on, without an engine's values "
                        "(e.g. a biased run): frames outside the reachable range are an error "
                        "(the spec is wrong), frames outside the observed range are reported "
                        "(the run went where the design runs did not)")
    p.add_argument("--tolerance", type=_positive_float, default=None, metavar="TOL",
                   help="largest accepted |deviation|, in the CV's units, kept as given "
                        "(default: 1e-3 times the largest within-state spread stored in the "
                        "spec, plus half a unit in the last decimal the values are written "
                        "with)")

    p = sub.add_parser(
        "hints", allow_abbrev=False,
        help="starting values for a (well-tempered) metadynamics bias along a spec's CV",
        description="Recompute bias-parameter hints from a spec alone: kernel width (CV units) "
                    "from the within-state spread, deposition interval (MD steps) from the CV's "
                    "within-run decorrelation time, kernel height and well-tempered bias factor "
                    "(kJ/mol) for a barrier estimate (or a table over estimates), walls and a "
                    "grid, and how long filling each basin would take. For a spec with a "
                    "funnel restraint ('cvdesign funnel') whose CV is the distance between its "
                    "group centres, no wall is put on the CV (the funnel confines it) and the "
                    "grid spans every distance the funnel allows; a spec with a single state "
                    "and no such restraint gets a warning: walls around that state would keep "
                    "the bias in it. Starting points to validate, not guarantees.")
    p.add_argument("spec", metavar="SPEC", help="spec file (cv-NN.json)")
    p.add_argument("--temperature", type=_positive_float, required=True, metavar="K",
                   help="temperature of the biased run, K (1 to 5000 K accepted)")
    p.add_argument("--md-step-fs", type=_positive_float, required=True, metavar="FS",
                   help="MD step of the biased run, fs (0.01 to 100 fs accepted)")
    p.add_argument("--barrier", type=_positive_float, default=None, metavar="KJ_PER_MOL",
                   help="estimate of the barrier to leave the states, kJ/mol, at least kT "
                        "(default: a table over 20 to 100 kJ/mol)")
    p.add_argument("--kernel", choices=("gaussian", "lucy"), default="gaussian",
                   help="kernel shape: Gaussian, or Lucy's compact kernel (default: gaussian)")
    p.add_argument("--autocorrelation-time-ps", type=_positive_float, default=None,
                   metavar="PS",
                   help="the CV's integrated autocorrelation time within the states, ps, which "
                        "sizes the deposition interval (default: the spec's "
                        "scores.integrated_time_ps; without one the interval is a placeholder "
                        "of 1 ps, with a warning)")
    p.add_argument("--json", action="store_true", help="print the hints as JSON")

    p = sub.add_parser(
        "funnel", allow_abbrev=False,
        help="size a funnel restraint for a bound ligand",
        description="From bound-state trajectories, define the funnel axis (pocket centre "
                    "toward the solvent, or through --exit-point), measure the ligand centre "
                    "along (z, nm) and across (r, nm) it, and recommend a cone + cylinder "
                    "funnel (half-angle in rad, radii and walls in nm) with stated margins, so "
                    "the bound fluctuations sit well inside and the unbound region is as "
                    "narrow as the data allow. Every frame's pocket is first fitted onto the "
                    "pocket of the first bound frame (the reference), so drift, rotation and "
                    "periodic boundaries do not inflate the funnel; the funnel is expressed in "
                    "that reference frame, and the biased run must hold the pocket in that "
                    "orientation. A warning says when the funnel reaches beyond half the "
                    "smallest box height, or when the bound ligand sits on average below the "
                    "pocket centre along the axis (the funnel would open away from it). "
                    "Starting points to validate, not guarantees.")
    p.add_argument("--topology", required=True, metavar="TOP", help="topology file")
    p.add_argument("--bound", nargs="+", required=True, metavar="FILE",
                   help="trajectories of the bound state (any format mdtraj reads); the first "
                        "frame of the first file is the reference (the starting structure)")
    p.add_argument("--ligand", required=True, metavar="SEL",
                   help="mdtraj selection of the ligand atoms, e.g. 'resname LIG'")
    p.add_argument("--pocket", required=True, metavar="SEL",
                   help="mdtraj selection of the pocket atoms whose centre is the axis origin "
                        "(at least 3 atoms, not on one line: their orientation defines the "
                        "frame of the funnel)")
    p.add_argument("--exit-point", nargs=3, type=float, metavar=("X", "Y", "Z"), default=None,
                   help="a point in nm, toward the solvent, the axis passes through, in the "
                        "coordinates of the first bound frame; in a periodic box it must lie "
                        "within half the smallest box height of that frame's pocket centre "
                        "(farther, its direction is ambiguous under periodic images: refused)")
    p.add_argument("--unbound-length", type=_positive_float, default=1.5, metavar="NM",
                   help="length of the cylinder beyond the cone, nm, where the unbound ligand "
                        "is solvated (default: 1.5); the funnel's reach must stay below half "
                        "the smallest height of the run's box: shorten it for a small box")
    p.add_argument("--k-wall", type=float, default=_K_WALL, metavar="KJ_PER_MOL_NM2",
                   help=f"force constant of the funnel walls, kJ/mol/nm^2 (default: {_K_WALL:g}; "
                        f"{_wall_penetration(_K_WALL)})")
    p.add_argument("--out", required=True, metavar="FILE.json",
                   help="output spec: the distance between the pocket and ligand centres as "
                        "the CV, with the funnel as a restraint entry; NAME-report-data.json "
                        "beside it holds the ligand positions the report draws; an existing "
                        "file is only replaced with --force")
    p.add_argument("--plot", metavar="FILE.png", default=None,
                   help="also draw the funnel outline and the bound ligand positions (the "
                        "format follows the extension: .png, .svg, .pdf, ...)")
    _add_bias_options(p, "--bound",
                      "Its frames are reweighted by exp(V/kT) at --temperature: the axis, "
                      "the means and spreads that set the margins and the density are "
                      "weighted (the extremes the funnel must clear are over every frame). "
                      "Repeat for each biased run")
    p.add_argument("--temperature", type=_positive_float, default=None, metavar="K",
                   help="temperature of the biased runs given with --bias-energy, whose "
                        "frames are reweighted at it (required with --bias-energy)")
    p.add_argument("--force", action="store_true",
                   help="replace --out (and --plot, the report and its data) if they exist; "
                        "input files are never replaced")
    _add_no_report(p, "NAME-report.html beside --out NAME.json")
    _add_executor_options(p)

    p = sub.add_parser(
        "export", allow_abbrev=False,
        help="write a spec's CV as an OpenMM force (XML), for a bias of your own",
        description="Write the CV of a spec file as an OpenMM CustomCVForce (serialized with "
                    "openmm.XmlSerializer) whose energy is the CV value: read it with "
                    "openmm.XmlSerializer.deserialize and add it as a collective variable of "
                    "your own bias force. A funnel restraint of the spec goes to a second "
                    "file (--restraint-out), a force in kJ/mol to add to the System as it "
                    "is. Needs OpenMM: pip install 'cvdesign[openmm]'.")
    p.add_argument("spec", metavar="SPEC", help="spec file (cv-NN.json, or a funnel spec)")
    p.add_argument("--to", required=True, choices=("openmm",),
                   help="the engine's format; version 1 writes OpenMM XML")
    p.add_argument("--out", required=True, metavar="FILE.xml",
                   help="the CV force; an existing file is kept unless --force, and an input "
                        "file is never replaced")
    p.add_argument("--restraint-out", metavar="FILE.xml", default=None,
                   help="the spec's restraints (a funnel) as one force in kJ/mol; required "
                        "when the spec has restraints, refused when it has none")
    box = p.add_mutually_exclusive_group(required=True)
    box.add_argument("--periodic", dest="periodic", action="store_const", const=True,
                     default=None,
                     help="the simulation has a periodic box (orthorhombic or triclinic): "
                          "distances are taken at their periodic images in the box of the "
                          "Context. The System the force goes into must carry that box "
                          "(setDefaultPeriodicBoxVectors, or the Context's "
                          "setPeriodicBoxVectors): one whose box was never set runs in "
                          "OpenMM's default 2 nm cube and wraps every distance over 1 nm "
                          "without an error. Prefer --system, which checks the box")
    box.add_argument("--no-periodic", dest="periodic", action="store_const", const=False,
                     help="the simulation has no periodic box")
    box.add_argument("--system", metavar="SYSTEM.xml", default=None,
                     help="the simulation's System (openmm.XmlSerializer.serialize(system)): "
                          "its particle count must be the spec's atom count, and the box "
                          "follows whether it uses periodic boundary conditions")
    p.add_argument("--force", action="store_true",
                   help="replace existing output files (never an input)")

    p = sub.add_parser(
        "demo", allow_abbrev=False,
        help="run suggest on the bundled demo data",
        description="Run 'suggest' on the bundled demo (an invented flexible molecule with "
                    "one slow torsion that opens and closes a contact) and say what to look at.")
    p.add_argument("--out", default="cvdesign-demo", metavar="DIR",
                   help="output directory (default: ./cvdesign-demo)")
    p.add_argument("--bootstrap", type=_replicates, default=200, metavar="N",
                   help="bootstrap replicates for the uncertainties (default: 200; 0 is "
                        "faster)")
    p.add_argument("--force", action="store_true",
                   help="replace the output directory if it holds an earlier cvdesign output")
    _add_no_report(p, "report.html in the output directory")

    p = sub.add_parser(
        "report", allow_abbrev=False,
        help="rebuild the HTML report of an output of suggest, demo or funnel",
        description="Rebuild the self-contained HTML report (figures embedded, no network "
                    "access, prints to PDF) from an output alone, without reading any "
                    "trajectory: the same files give the same bytes. TARGET is a directory "
                    "written by 'suggest' or 'demo' (report: TARGET/report.html) or the spec "
                    "file written by 'funnel' (report: NAME-report.html beside NAME.json). "
                    "That default report is replaced; figures whose data the output does not "
                    "hold (report-data.json) are marked 'not available'.")
    p.add_argument("target", metavar="TARGET",
                   help="output directory of suggest/demo, or the spec file of funnel")
    p.add_argument("--out", metavar="FILE.html", default=None,
                   help="write the report here instead (a name ending in .html); an existing "
                        "file is kept unless --force, and a file of the output is never "
                        "replaced")
    p.add_argument("--force", action="store_true", help="replace an existing --out file")
    for command in sub.choices.values():
        _add_verbosity(command)
    parser.commands = dict(sub.choices)  # for usage errors that name the command
    return parser


class _StderrHandler(logging.Handler):
    """Log records on standard error as ``cvdesign COMMAND: [level: ]message``, written
    between the progress bars (``tqdm.write``) so that neither garbles the other."""

    def __init__(self, command, level):
        super().__init__(level)
        self.command = command

    def emit(self, record):
        try:
            from tqdm import tqdm

            kind = "" if record.levelno == logging.INFO else f"{record.levelname.lower()}: "
            tqdm.write(f"cvdesign {self.command}: {kind}{record.getMessage()}", file=sys.stderr)
        except Exception:  # noqa: BLE001 - logging must never stop the command
            self.handleError(record)


def _log_level(verbose, quiet):
    """WARNING by default; each -v one level more (INFO, DEBUG), -q only errors.

    Examples
    --------
    >>> [logging.getLevelName(_log_level(v, q)) for v, q in [(0, 0), (1, 0), (2, 0), (0, 1)]]
    ['WARNING', 'INFO', 'DEBUG', 'ERROR']
    """
    return min(logging.ERROR, max(logging.DEBUG, logging.WARNING + 10 * (quiet - verbose)))


@contextlib.contextmanager
def _reporting(args):
    """For the length of a command: the ``cvdesign`` logger on standard error at the level of
    -v/-q, and progress bars there when it is a terminal and -q is not given."""
    from ..progress import show_progress

    args.verbose = getattr(args, "verbose", 0) + getattr(args, "verbose_before", 0)
    args.quiet = getattr(args, "quiet", 0) + getattr(args, "quiet_before", 0)
    level = _log_level(args.verbose, args.quiet)
    logger = logging.getLogger("cvdesign")
    handler, before = _StderrHandler(args.command, level), logger.level
    logger.addHandler(handler)
    logger.setLevel(level)
    from ..io.source import reader_output_discarded, reader_output_shown

    try:
        with show_progress(sys.stderr, enabled=None if not args.quiet else False), \
                _geometry_warnings_logged(), \
                (reader_output_discarded() if args.quiet else reader_output_shown()):
            yield
    finally:
        logger.removeHandler(handler)
        logger.setLevel(before)


@contextlib.contextmanager
def _geometry_warnings_logged():
    """The geometry code's warnings (undefined angles, dihedrals, gradients) shown through
    the ``cvdesign`` logger, as the command's other warnings (``-q`` hides them), instead of
    Python's ``file:line: GeometryWarning: ...`` lines; other warnings as before."""
    from ..geometry import GeometryWarning

    with warnings.catch_warnings():
        shown = warnings.showwarning

        def show(message, category, filename, lineno, file=None, line=None):
            if issubclass(category, GeometryWarning):
                _log.warning("%s", message)
            else:
                shown(message, category, filename, lineno, file, line)

        warnings.showwarning = show
        yield


def _executor(args):
    """The executor of --workers / --scheduler for a ``with`` block, closed at its end."""
    from ..parallel import using_executor

    return using_executor(args.scheduler if args.scheduler else
                          (args.workers if args.workers > 1 else None))


def _run_suggest(topology, states, out, args, stream, runs=None):
    from ..io.atomic import prepare_output_dir
    from ..bias.hints import check_run_conditions
    from ..pipeline.suggest import CAUTION, HINTS_TEMPERATURE_K, is_output_file, suggest
    from ..io.source import Source

    biases = getattr(args, "bias_energy", None) or []
    _check_bias_temperature(args, biases)
    # the hints' temperature; the biased runs' own (required above) when they are given
    temperature = HINTS_TEMPERATURE_K if args.temperature is None else args.temperature
    # refuse an impossible temperature or MD step before reading anything; warn once
    for warning in check_run_conditions(temperature, args.md_step_fs):
        _log.warning("%s", warning)
    bias_column = getattr(args, "bias_column", None)
    labelled = getattr(args, "labelled", None) or []
    given = [topology] + [f for entry in (states or []) for f in entry[1:]] + list(runs or []) \
        + [b for _, b in biases] + [f for pair in labelled for f in pair]
    prepare_output_dir(out, force=args.force, inputs=given, marker="ranking.json",
                       owned=is_output_file)
    if not states and not runs and not labelled:
        raise InputError("give the states with --state NAME FILE [FILE ...] (and trajectories "
                         "with per-frame states with --labelled TRAJ LABELS), or unlabelled "
                         "runs with --runs FILE [FILE ...]")
    if labelled and runs:
        raise InputError("--labelled goes with --state: proposing states from unlabelled runs "
                         "(--runs) labels the frames itself")
    if bias_column is not None and not biases:
        raise InputError("--bias-column goes with --bias-energy TRAJ FILE: it says which "
                         "column of the bias-energy files holds the bias energies")
    if runs:
        if args.lag is None:
            raise InputError("--runs needs --lag PS: the lag time at which slow processes are "
                             "looked for, longer than the fast motions inside the states and "
                             "shorter than a run's stay in one (about 10 frame spacings is a "
                             "start; summary.md then reports each state's staying probability "
                             "over the lag)")
        source = Source(topology, timestep=args.frame_step_ps,
                        temperature=temperature if biases else None)
        bias_of = _bias_files(biases, list(runs), given_with="--runs")
        for f in runs:
            source.add(f, state="runs", bias=bias_of.get(f),
                       bias_column=bias_column if f in bias_of else None)
    else:
        if getattr(args, "n_states", None) is not None:
            raise InputError("--n-states goes with --runs (states proposed from unlabelled "
                             "runs); with --state the states are the ones given")
        states = states or []
        for entry in states:
            _check_state_name(entry[0], entry[1:])
        names = [s[0] for s in states]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise InputError(f"state {dup[0]!r} is given twice; give each state once with all "
                             "of its files")
        source = Source(topology, timestep=args.frame_step_ps,
                        temperature=temperature if biases else None)
        bias_of = _bias_files(biases, [f for entry in states for f in entry[1:]]
                              + [t for t, _ in labelled])
        for entry in states:
            name, files = entry[0], entry[1:]
            if not files:
                raise InputError(f"--state {name} has no trajectory files; use --state NAME "
                                 "FILE [FILE ...]")
            for f in files:
                source.add(f, state=name, bias=bias_of.get(f),
                           bias_column=bias_column if f in bias_of else None)
        named = [entry[0] for entry in states]
        for traj, label_file in labelled:
            labels = _labels_for(traj, label_file)
            unknown = sorted({x for x in labels if x is not None} - set(named))
            if named and unknown:  # a typo would make a state of its own, without a word
                raise InputError(f"--labelled {traj} {label_file}: labels file {label_file!r} "
                                 f"names state(s) {', '.join(map(repr, unknown))} that no "
                                 f"--state gives (the states are {', '.join(map(repr, named))});"
                                 " use those names, exactly (case counts), or '-' between "
                                 "states")
            source.add_labelled(traj, labels, bias=bias_of.get(traj),
                                bias_column=bias_column if traj in bias_of else None)
    exploration = None
    with _executor(args) as executor:
        if runs:
            from ..pipeline.explore import propose_states

            exploration = propose_states(
                source, lag=args.lag, n_states=args.n_states, selection=args.select,
                kinds=args.kinds, cutoff=args.cutoff, prefilter_stride=args.prefilter_stride,
                coordination_r0=args.coordination_r0, seed=args.seed, executor=executor)
            for warning in exploration.warnings:  # also in summary.md
                _log.warning("%s", warning)
            source = exploration.labelled_source(topology, timestep=args.frame_step_ps)
        result = suggest(source, objective=args.objective, lag=args.lag, method=args.method,
                         selection=args.select, kinds=args.kinds, cutoff=args.cutoff,
                         prefilter_stride=args.prefilter_stride,
                         coordination_r0=args.coordination_r0, max_terms=args.max_terms,
                         n_suggestions=args.suggestions, n_folds=args.folds,
                         n_bootstrap=args.bootstrap, seed=args.seed,
                         temperature=temperature, md_step_fs=args.md_step_fs,
                         executor=executor)
    result.exploration = exploration
    # every warning of the run on standard error too, once (they are in summary.md): the
    # transition slowness's fallback, small effective sample sizes, a lag short for rescaled
    # time, distances beyond half the box (the last two had reached the summary only)
    for note in dict.fromkeys(result.notes):
        if note.startswith("warning: "):
            _log.warning("%s", note[len("warning: "):])
    # the report is built from the outputs in memory and written with them, all or nothing
    # (built after them, an interrupt left every output but the page, and a rerun then met
    # a non-empty directory)
    page, why = None, None
    if not args.no_report:
        from ..report.inputs import Output

        page, why = _report_page(Output("suggest", Path(out).resolve().name,
                                        result.output_files()))
    result.write(out, force=args.force, extra={"report.html": page} if page else None)
    args.written = str(out)  # (what a later failure or interrupt must not deny)
    report_ok = why is None
    if not report_ok:
        print(f"cvdesign suggest: error: the other outputs were written, but the report "
              f"could not be: {why}. Run 'cvdesign report {out}' once the cause is fixed",
              file=sys.stderr)
    if not args.quiet:
        print(result.selection, file=stream)  # the atoms, with mdtraj's 0-based indices
        if exploration is not None:
            print(exploration.states_line(), file=stream)
        for note in result.notes:
            print(f"  - {note}", file=stream)
    print(result.top_table(5), file=stream)
    for r in result.ranking:  # also in summary.md
        for w in r.get("warnings", []):
            _log.warning("rank %d (%s): %s", r["rank"], r["spec"], w)
    print(f"\nwrote {len(result.specs)} spec files and the ranking to {out}/"
          + ("" if args.no_report or not report_ok else
             f"; open {Path(out) / 'report.html'} in a browser for the figures"), file=stream)
    print(f"caution: {CAUTION}", file=stream)
    return result, report_ok


def _labels_for(traj, label_file):
    """The per-frame states of a --labelled trajectory, one per frame (checked)."""
    from ..io.source import file_frames, read_labels_file

    labels = read_labels_file(label_file)
    if not Path(traj).is_file():
        raise InputError(f"--labelled {traj} {label_file}: trajectory {traj!r} does not exist; "
                         "check the path")
    n = file_frames(traj)
    if n != labels.shape[0]:
        raise InputError(f"--labelled {traj} {label_file}: labels file {label_file!r} holds "
                         f"{labels.shape[0]} labels, but trajectory {traj!r} has {n} frames; "
                         "give one line per frame (its state, or '-' between the states)")
    return labels


def _check_bias_temperature(args, biases):
    """Refuse biased runs without --temperature: frames are reweighted by exp(V/kT) at it,
    and a default would change every weight without a word (10 K off is a factor of about
    e^0.7 on a bias of 50 kJ/mol)."""
    if biases and args.temperature is None:
        raise InputError("--bias-energy needs --temperature K, the temperature the biased runs "
                         "were simulated at: their frames are reweighted by exp(V/kT) at it, "
                         "so it has no default; give it")


def _check_state_name(name, files):
    """Refuse a ``--state`` name that is a file or a trajectory's name (a ``--state`` given
    files but no name took its first file as the name), or the labels' no-state mark."""
    from mdtraj.formats.registry import FormatRegistry

    from ..io.source import NO_STATE_LABEL, _suffix

    if name == NO_STATE_LABEL:
        raise InputError(f"--state {name}: {NO_STATE_LABEL!r} cannot name a state (in a labels "
                         "file it marks a frame in no state); give each state a name of its own")
    exts = {e for e in FormatRegistry.loaders if not e.endswith(".gz")}
    if Path(name).is_file() or _suffix(name) in exts:
        what = "an existing file" if Path(name).is_file() else "a trajectory file's name"
        raise InputError(f"--state {' '.join([name, *files])}: the state name {name!r} is {what};"
                         " --state takes a NAME and then that state's files (--state NAME FILE "
                         "[FILE ...]): give the name first")


def _bias_files(biases, files, given_with="--state or --labelled"):
    """``{trajectory as given with --state (or --runs): bias-energy file}`` from the
    --bias-energy pairs."""
    out = {}
    what = "the states" if given_with.startswith("--state") else given_with
    for traj, bias in biases:
        if not Path(traj).is_file():
            raise InputError(f"--bias-energy {traj} {bias}: trajectory {traj!r} does not exist; "
                             f"give a trajectory of {given_with} and its bias-energy file")
        match = [f for f in files if Path(f).is_file() and os.path.samefile(f, traj)]
        if not match:
            raise InputError(f"--bias-energy {traj} {bias}: trajectory {traj!r} is not given "
                             f"with {given_with}; pair each biased run of {what} with its "
                             "bias-energy file")
        for f in match:
            if f in out:
                raise InputError(f"--bias-energy names trajectory {traj!r} twice; give one "
                                 "bias-energy file per trajectory")
            out[f] = bias
    return out


def _report_page(output):
    """``(page, None)``: the report of an output's files in memory (written together with
    them, all or nothing); ``(None, why)`` when it cannot be built (the other outputs are
    still written, and the command says so and exits 2)."""
    from ..report import build_report

    try:
        return build_report(output).html, None
    except Exception as exc:  # noqa: BLE001 - the other outputs are still written; say so
        return None, (str(exc) if isinstance(exc, (CVDesignError, OSError)) else
                      f"{type(exc).__name__}: {exc} (a bug in cvdesign; please report it)")


def _cmd_suggest(args):
    _, report_ok = _run_suggest(args.topology, args.state, args.out, args, sys.stdout,
                                runs=args.runs)
    return 0 if report_ok else 2


class _Undefined:
    """Frames of one trajectory file where a descriptor of the CV is undefined (an angle with
    an arm of zero length, a dihedral with collinear or coincident atoms) and the evaluator's
    stand-in value (pi/2, 0) went into the CV: such a value is not a measurement of the CV."""

    #: What stands in for an undefined descriptor of each kind, and why it is undefined.
    STAND_IN = {"angle": ("pi/2", "an arm of zero length"),
                "dihedral": ("0", "three consecutive atoms collinear or two coincident")}

    def __init__(self, spec, name):
        used = {t["descriptor"] for t in spec.terms}
        self.ids = [d["id"] for d in spec.descriptors]
        self.kinds = [d["kind"] for d in spec.descriptors]
        self.used = np.array([i in used for i in self.ids], dtype=bool)
        self.spec, self.name = spec, name
        self.frames, self.columns, self.n_frames = [], set(), 0

    def evaluate(self, traj, frames):
        """(CV values, per frame the space-separated ids of the CV's undefined descriptors)
        of a chunk `traj` whose frames are `frames` of the file."""
        from ..geometry import GeometryWarning

        with warnings.catch_warnings():  # said once per file, with the file's frame numbers
            warnings.simplefilter("ignore", GeometryWarning)
            values, undefined = self.spec.evaluate(traj.xyz, box=traj.unitcell_vectors,
                                                   undefined=True)
        undefined &= self.used
        marks = [""] * len(values)
        for i in np.flatnonzero(undefined.any(axis=1)):
            cols = np.flatnonzero(undefined[i])
            self.columns.update(int(k) for k in cols)
            self.frames.append(int(frames[i]))
            marks[i] = " ".join(self.ids[k] for k in cols)
        self.n_frames += len(values)
        return values, marks

    def message(self, limit=10):
        """One line saying which frames hold stand-in values, or None when none does."""
        if not self.frames:
            return None
        shown = ", ".join(str(f) for f in self.frames[:limit])
        more = f", ... ({len(self.frames) - limit} more)" if len(self.frames) > limit else ""
        what = "; ".join(f"{self.kinds[k]} {self.ids[k]!r} ({self.STAND_IN[self.kinds[k]][1]}: "
                         f"set to {self.STAND_IN[self.kinds[k]][0]} rad)"
                         for k in sorted(self.columns))
        return (f"{self.name}: {len(self.frames)} of {self.n_frames} frames "
                f"(frame{'s' if len(self.frames) > 1 else ''} {shown}{more}) "
                f"hold a stand-in value for an undefined descriptor of the CV: {what}. Their CV "
                "values are not measurements; check these frames' coordinates and the topology")


def _stored_time(t):
    """A stored time (ps) as the shortest text that reads back as the same single-precision
    number: 1.6, not 1.600000023841858."""
    return np.format_float_positional(np.float32(t), unique=True, trim="0")


def _refuse_repeated_files(paths):
    """Refuse a trajectory given twice to ``apply`` (under any spelling of its path)."""
    for i, a in enumerate(paths):
        for b in paths[:i]:
            if Path(a).is_file() and Path(b).is_file() and os.path.samefile(a, b):
                same = (f"trajectory {a!r} is given twice" if a == b else
                        f"trajectories {b!r} and {a!r} are the same file")
                raise InputError(f"{same}; give each trajectory once")


def _cmd_apply(args):
    from ..io.atomic import atomic_open, check_output_file
    from ..io.source import Source, missing_box_warning, stores_time
    from ..pipeline.output import run_file_names
    from ..spec import load_spec

    if args.out is not None:
        check_output_file(args.out, force=args.force,
                          inputs=args.trajectories + [args.spec, args.topology])
    source = Source(args.topology)
    spec = load_spec(args.spec, topology=source.topology)
    _refuse_repeated_files(args.trajectories)
    for f in args.trajectories:
        source.add(f, state="all")

    untimed = [i for i in range(len(source.segments))
               if stores_time(source.segments[i].path) and not source.stored_times_increase(i)]
    for i in untimed:
        _log.warning("%s stores times that do not increase (as some writers do); its time_ps "
                     "column is left empty", source.segments[i].path.name)

    file_names = run_file_names(seg.path for seg in source.segments)
    names = [file_names[str(seg.path)] for seg in source.segments]
    undefined = [_Undefined(spec, name) for name in names]
    unboxed = {}  # files whose frames hold no box, in order

    def rows(fh):
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["file", "frame", "time_ps", "value", "undefined"])
        for chunk in source.iter_chunks(progress="apply"):
            traj = chunk.trajectory
            if traj.unitcell_vectors is None:
                unboxed[str(source.segments[chunk.segment_index].path)] = None
            values, marks = undefined[chunk.segment_index].evaluate(traj, chunk.frames)
            path = source.segments[chunk.segment_index].path
            timed = stores_time(path) and chunk.segment_index not in untimed
            for fr, t, v, mark in zip(chunk.frames, traj.time, values, marks):
                w.writerow([names[chunk.segment_index], int(fr),
                            _stored_time(t) if timed else "",
                            repr(float(v)), mark])

    if args.out is None:
        buf = io.StringIO()
        rows(buf)  # evaluate everything first: an error leaves standard output clean
    else:
        with atomic_open(args.out, "w", encoding="utf-8", newline="\n") as fh:
            rows(fh)
    for file in undefined:  # the CSV's undefined column names them frame by frame
        if file.message() is not None:
            _log.warning("%s (their undefined column names the descriptors)", file.message())
    boxless = missing_box_warning(args.topology, list(unboxed))
    if boxless is not None:
        _log.warning("%s", boxless)
    if args.out is None:
        sys.stdout.write(buf.getvalue())
    elif not args.quiet:
        print(f"wrote {args.out}", file=sys.stderr)
    return 0


#: Header names of a first column that numbers frames or times rather than holding the CV.
_INDEX_COLUMNS = ("frame", "index", "idx", "step", "time")


def _looks_like_index(name, cells):
    """True when a column is named like a frame index or time, or counts 0, 1, 2, ..."""
    if name is not None:
        word = name.strip().lower()
        if any(word == w or word.startswith(w + "_") or word.startswith(w + " ")
               for w in _INDEX_COLUMNS):
            return True
    try:
        numbers = [float(c) for c in cells]
    except ValueError:
        return False
    return len(numbers) > 1 and numbers == list(range(len(numbers)))


_DECIMAL_TEXT = re.compile(r"[+-]?\d*(?:\.(\d*))?(?:[eE]([+-]?\d+))?")


def _written_decimals(texts):
    """The decimals each number text is written with (an exponent counted: ``1.5e-3`` has
    4), or None when some text is not a plain decimal number.

    >>> _written_decimals(["0.125", "-1.5", "2.000"]), _written_decimals(["1.5e-3"])
    ([3, 1, 3], [4])
    >>> _written_decimals(["0.5", "0x1p-1"]) is None
    True
    """
    out = []
    for text in texts:
        m = _DECIMAL_TEXT.fullmatch(text.strip())
        if m is None:
            return None
        out.append(len(m.group(1) or "") - int(m.group(2) or 0))
    return out


def _read_values(path, column=None, traj=None):
    """(frames or None, values, decimals) from a file of CV values, with a clear error on
    bad input; `decimals` holds the decimals each value is written with
    (:func:`_written_decimals`), or is None.

    The file is a CSV (comma-separated) or whitespace-separated columns, with
    an optional header line; blank lines and lines starting with ``#`` or ``@``
    are skipped. `column` is a 1-based number or a header name; by default the
    'value' column, or the only column. A 'frame' column, when present, says
    which frame each value belongs to; a frame named twice is refused. A 'file' column
    (``apply``'s CSV of several trajectories), when present, keeps the rows of trajectory
    `traj` only (by its name or its path as given).
    """
    path = Path(path)
    name = str(path)
    if not path.is_file():
        raise InputError(f"values file {name!r} does not exist; check the path")
    text = path.read_text(encoding="utf-8-sig", errors="replace")
    lines = [(n, line.strip()) for n, line in enumerate(text.splitlines(), 1)]
    lines = [(n, t) for n, t in lines if t and t[0] not in "#@"]
    if not lines:
        raise InputError(f"values file {name!r} holds no values (only blank or comment lines)")
    if "," in lines[0][1]:
        table = [(n, [c.strip() for c in next(csv.reader([t]))]) for n, t in lines]
    else:
        table = [(n, t.split()) for n, t in lines]
    header = None
    if not all(_is_number(c) for c in table[0][1]):
        header, table = table[0][1], table[1:]
    if not table:
        raise InputError(f"values file {name!r} holds a header line and no values")
    width = len(header) if header is not None else len(table[0][1])
    lower = [h.strip().lower() for h in header] if header is not None else None
    names = ", ".join(repr(h) for h in header) if header is not None else ""
    shown = f" ({names})" if header is not None else ""
    if column is not None:
        column = str(column).strip()
        if column.isdigit():
            k = int(column) - 1
            if k < 0:
                raise InputError(f"--column {column} is not a column; columns count from 1")
            if k >= width:
                raise InputError(f"--column {column}: values file {name!r} has {width} "
                                 f"column{'s' if width > 1 else ''}{shown}")
        elif lower is None:
            raise InputError(f"--column {column!r} names a column, but values file {name!r} has "
                             "no header line; give the column number, counted from 1")
        elif column.lower() not in lower:
            raise InputError(f"--column {column!r}: values file {name!r} has no column of that "
                             f"name; its columns are {names}")
        else:
            k = lower.index(column.lower())
    elif lower is not None and "value" in lower:
        k = lower.index("value")
    elif width == 1:
        k = 0
    else:
        first = header[0] if header is not None else None
        why = (" (the first column looks like a frame index or a time, not the CV)"
               if _looks_like_index(first, [cells[0] for _, cells in table if cells]) else "")
        what = (f"{width} columns{shown} and none is named 'value'" if header is not None
                else f"{width} columns and no header line naming a 'value' column")
        raise InputError(f"values file {name!r} has {what}{why}; say which column holds the CV "
                         "with --column N (counted from 1) or --column NAME")
    fi = lower.index("frame") if lower is not None and "frame" in lower else None
    if fi == k:
        fi = None
    table = _rows_of_file(name, table, lower, k, traj)
    values, frames, texts = [], [], []
    for n, cells in table:
        if len(cells) <= max(k, -1 if fi is None else fi):
            raise InputError(f"values file {name!r}, line {n}: {len(cells)} column"
                             f"{'s' if len(cells) != 1 else ''}, but column {k + 1} holds the "
                             "values; give the same columns on every line")
        try:
            v = float(cells[k])
        except ValueError:
            raise InputError(f"values file {name!r}, line {n}, column {k + 1}: {cells[k]!r} is "
                             "not a number") from None
        if not math.isfinite(v):
            raise InputError(f"values file {name!r}, line {n}: value {cells[k]!r} is not a "
                             "finite number")
        values.append(v)
        texts.append(cells[k])
        if fi is not None:
            try:
                frames.append(int(cells[fi]))
            except ValueError:
                raise InputError(f"values file {name!r}, line {n}: frame {cells[fi]!r} is not "
                                 "a whole number") from None
    if fi is not None:
        seen = {}
        for (n, _), f in zip(table, frames):
            if f in seen:
                raise InputError(
                    f"values file {name!r} names frame {f} twice (lines {seen[f]} and {n}); "
                    "give one value per frame of one trajectory (values of several "
                    "trajectories go in separate files, or in a 'file' column naming each)")
            seen[f] = n
    return ((np.asarray(frames) if fi is not None else None),
            np.asarray(values, dtype=np.float64), _written_decimals(texts))


def _rows_of_file(name, table, lower, k, traj):
    """The rows of a values table whose 'file' column names trajectory `traj` (all rows
    when there is no such column, no `traj`, or the column names one file only: a copy of
    the trajectory under another name); refuses a file that names several, none of them
    `traj`."""
    if traj is None or lower is None or "file" not in lower or lower.index("file") == k:
        return table
    j = lower.index("file")
    own = {str(traj), Path(traj).name}
    where = Path(traj).resolve()

    def names_traj(cell):  # its name, or a path to the same file in another spelling
        return cell in own or (("/" in cell or "\\" in cell) and Path(cell).resolve() == where)

    kept = [(n, cells) for n, cells in table if len(cells) > j and names_traj(cells[j])]
    present = sorted({cells[j] for _, cells in table if len(cells) > j})
    if not kept and len(present) <= 1:
        return table
    if not kept:
        raise InputError(
            f"values file {name!r} has a 'file' column naming "
            f"{', '.join(repr(f) for f in present[:5])}{', ...' if len(present) > 5 else ''}, "
            f"not trajectory {str(traj)!r}; give the trajectory whose values it holds (one of "
            "those, by that name or a path to it)")
    return kept


#: Relative slack (of the largest finite bound, at least 1) within which a reference value
#: counts as inside the reachable range: the evaluator's rounding, not a real excursion.
_RANGE_SLACK = 1e-9

#: Relative slack (of the largest extreme, at least 1) within which a reference value counts
#: as inside the observed range: the stored extremes come from single-precision features
#: (:data:`cvdesign.constants.FLOAT32_SLACK`).
_OBSERVED_SLACK = FLOAT32_SLACK


def _reference_values(spec, topology, traj, topology_path=None):
    """The spec's reference values on every frame of `traj`, the frame numbers, and the set of
    frames that hold stand-in values for undefined descriptors (a line on standard output
    names them, and one says when the topology file `topology_path` has a periodic box that
    `traj` does not store)."""
    from ..io.source import Source, missing_box_warning

    src = Source(topology)
    src.add(traj, state="check")
    ours, idx = [], []
    undefined = _Undefined(spec, traj)
    boxed = True
    for chunk in src.iter_chunks(progress="check"):
        ours.append(undefined.evaluate(chunk.trajectory, chunk.frames)[0])
        idx.append(chunk.frames)
        boxed = boxed and chunk.trajectory.unitcell_vectors is not None
    if undefined.message() is not None:
        print(f"warning: {undefined.message()} (an engine may give these frames other values)")
    boxless = None if boxed else missing_box_warning(topology_path, [traj])
    if boxless is not None:
        print(f"warning: {boxless}")
    return np.concatenate(ours), np.concatenate(idx), set(undefined.frames)


def _outside(values, lower, upper, slack, period=None):
    """Positions of `values` below ``lower - slack`` or above ``upper + slack`` (None: no bound).

    With a `period` (a periodic CV, both bounds given) the interval runs upwards from `lower`
    along the circle and a value is compared modulo the period: one period or more holds
    every value."""
    if period is not None:
        width = upper - lower + 2.0 * slack
        if width >= period:
            return np.zeros(0, dtype=np.int64)
        return np.flatnonzero(np.mod(values - (lower - slack), period) > width)
    out = np.zeros(values.shape, dtype=bool)
    if lower is not None:
        out |= values < lower - slack
    if upper is not None:
        out |= values > upper + slack
    return np.flatnonzero(out)


def _wrapped(difference, period):
    """`difference` wrapped into [-period/2, period/2): the nearest of its images one period
    apart (unchanged when `period` is None)."""
    if period is None:
        return difference
    return np.mod(difference + 0.5 * period, period) - 0.5 * period


def _interval(pair):
    lo, hi = pair
    return (f"[{'-inf' if lo is None else format(lo, '.6g')}, "
            f"{'+inf' if hi is None else format(hi, '.6g')}]")


def _extremes(values, frames, where):
    """'lowest v at frame f, highest v at frame g' of the values at positions `where`."""
    lo, hi = where[np.argmin(values[where])], where[np.argmax(values[where])]
    return (f"lowest {float(values[lo]):.6g} at frame {int(frames[lo])}, highest "
            f"{float(values[hi]):.6g} at frame {int(frames[hi])}")


def _unreachable(what, values, frames, reach, slack, why):
    """Print an error for values beyond the reachable range; True when there are none."""
    bad = _outside(values, *reach, slack)
    if bad.size:
        print(f"ERROR: {bad.size} of {values.size} {what} lie outside the reachable range "
              f"{_interval(reach)} of the CV ({_extremes(values, frames, bad)}): {why}")
    return not bad.size


def _range_check(reach, seen, traj, ours, frames, period=None):
    """Range findings of the reference values on one trajectory; True when none is an error.

    The reference values of a periodic CV (`period`) lie in the reachable interval of one
    period (the evaluator's own convention, checked as it is); the observed range is
    checked modulo the period."""
    finite = [abs(x) for x in reach if x is not None]
    slack = _RANGE_SLACK * max([1.0] + finite)
    ok = _unreachable(
        f"frames of {traj} (reference evaluator)", ours, frames, reach, slack,
        "no structure gives such values with this spec's terms, so the spec, its stored range "
        "or the evaluator is wrong; re-create the spec with 'cvdesign suggest' and report "
        "the case")
    if seen is not None:
        beyond = _outside(ours, *seen, _OBSERVED_SLACK * max([1.0] + [abs(x) for x in seen]),
                          period)
        modulo = "" if period is None else " (modulo the period)"
        if beyond.size:
            print(f"info: {beyond.size} of {ours.size} frames of {traj} "
                  f"({100.0 * beyond.size / ours.size:.1f}%) lie outside the observed range "
                  f"{_interval(seen)}{modulo} of the spec's input frames "
                  f"({_extremes(ours, frames, beyond)}): this run reaches values the design "
                  "runs did not; walls and a grid built on the observed range (see "
                  "'cvdesign hints') may not cover them")
        else:
            print(f"info: every frame of {traj} lies inside the observed range "
                  f"{_interval(seen)}{modulo} of the spec's input frames")
    return ok


#: The rounding of written values is taken into the default tolerance of ``check`` when
#: half a unit in their last decimal is at least this fraction of that default.
_ROUNDING_NOTED = 0.01


def _values_tolerance(given, default, decimals, values_path):
    """The tolerance of each value of one values file: `given` (``--tolerance``) as it is;
    else the default plus half a unit in the last decimal that value is written with (an
    engine that writes 3 decimals is off by up to 5e-4 however right it is; a value written
    as 1.5 among longer ones may well be exact, so each value gets its own), said when it
    counts. A float, or an array of one tolerance per value."""
    if given is not None:
        return given
    if decimals is None:
        return default
    rounding = 0.5 * 10.0 ** (-np.asarray(decimals, dtype=np.float64))
    rounding = np.where(rounding >= _ROUNDING_NOTED * default, rounding, 0.0)
    if not rounding.any():
        return default
    fewest = int(min(decimals))
    print(f"note: values of {values_path} written with as few as {fewest} decimal"
          f"{'' if fewest == 1 else 's'}: each value's tolerance is the default "
          f"{default:.3g} plus half a unit in its last decimal (up to {float(rounding.max()):.3g}; "
          "--tolerance sets one tolerance as given)")
    return default + rounding


def _cmd_check(args):
    from ..io.source import Source
    from ..spec import load_spec

    source = Source(args.topology)
    spec = load_spec(args.spec, topology=source.topology)
    reach, seen = spec.reachable_range, spec.observed_range  # refused first when stale
    print(f"{args.spec}: valid spec, matches topology {args.topology} "
          f"({source.topology.n_atoms} atoms)")
    print(f"range (CV units): reachable {_interval(reach)} (from the terms"
          + ("; a restraint of the spec confines it further" if spec.restraints else "")
          + "); "
          + (("no observed range recorded (funnel specs record none; before them, a spec "
              "of an earlier cvdesign)") if seen is None
             else f"observed {_interval(seen)} (the spec's input frames)"))
    states = spec.states
    for name, side in spec.states_at_bound.items():
        st = states[name]
        print(f"note: state {name!r} sits at the {side} bound of the reachable range (mean "
              f"{st['mean']:.6g}, std {st['std']:.3g}): a folded coordinate, where the CV "
              "changes only to second order and the bias force along it fades; check in a "
              "short biased run that the bias moves this state")
    period = spec.period if spec.periodic else None
    if period is not None:
        print(f"note: the CV is periodic with period {period:.6g} (CV units): values one "
              "period apart are the same CV value, so an engine's values are compared with "
              "the reference modulo the period (each difference wrapped into [-period/2, "
              "period/2)), and ranges are checked modulo the period (the reachable range "
              "is one whole period: every value of an engine lies in it)")
    if args.column is not None and not args.against:
        raise InputError("--column goes with --against VALUES TRAJ: it says which column of "
                         "the values files holds the CV")
    if not args.against and not args.trajectory:
        return 0
    spreads = [v["std"] for v in states.values() if v.get("std")]
    default_tol = 1e-3 * (max(spreads) if spreads else 1.0)
    in_range = True
    for traj in args.trajectory or []:
        ours, idx, _ = _reference_values(spec, source.topology, traj, args.topology)
        in_range &= _range_check(reach, seen, traj, ours, idx, period)
    agree = True
    for values_path, traj in args.against or []:
        frames, theirs, decimals = _read_values(values_path, args.column, traj)
        tol = _values_tolerance(args.tolerance, default_tol, decimals, values_path)
        ours, idx, stand_in = _reference_values(spec, source.topology, traj, args.topology)
        in_range &= _range_check(reach, seen, traj, ours, idx, period)
        if frames is None:
            if theirs.size != ours.size:
                raise InputError(f"{values_path!r} holds {theirs.size} values but {traj!r} has "
                                 f"{ours.size} frames; give one value per frame")
            ref = ours
            frame_of = idx
        else:
            pos = {int(f): i for i, f in enumerate(idx)}
            missing = [int(f) for f in frames if int(f) not in pos]
            if missing:
                raise InputError(f"{values_path!r} names frame {missing[0]}, which {traj!r} "
                                 f"does not have ({ours.size} frames)")
            ref = ours[[pos[int(f)] for f in frames]]
            frame_of = np.asarray(frames)
        tols = np.broadcast_to(np.asarray(tol, dtype=np.float64), theirs.shape)
        largest = float(tols.max())
        if period is None:  # modulo a period, every value lies in one period's range
            in_range &= _unreachable(
                f"values of {values_path} (the engine's)", theirs, frame_of, reach, largest,
                f"beyond a bound by more than the tolerance {largest:.3g}, values the CV "
                "cannot take: the engine computes another CV (a cos or sin transform left "
                "out, a weight, centre or scale changed, another atom order)")
        dev = np.abs(_wrapped(theirs - ref, period))
        order = np.argsort(-dev, kind="stable")[:5]
        worst = float(dev[order[0]])
        agree &= bool(np.all(dev <= tols))
        modulo = "" if period is None else f"modulo the period {period:.6g}; "
        shown = (f"tolerance {largest:.3g}" if np.ndim(tol) == 0
                 or f"{float(tols.min()):.3g}" == f"{largest:.3g}" else
                 f"tolerance {float(tols.min()):.3g} to {largest:.3g}")
        print(f"{values_path} vs {traj}: {dev.size} frames, largest |deviation| {worst:.3g} "
              f"({modulo}{shown}), mean {float(dev.mean()):.3g}")
        for i in order:
            if dev[i] > tols[i] or i == order[0]:
                print(f"    frame {int(frame_of[i])}: engine {float(theirs[i])!r}, reference "
                      f"{float(ref[i])!r}, deviation {float(dev[i]):.3g}"
                      + (" (the reference holds a stand-in value for an undefined descriptor; "
                         "see the warning above)" if int(frame_of[i]) in stand_in else ""))
    if not in_range:
        print("FAIL: values outside the CV's reachable range (see ERROR above)"
              + ("" if agree or not args.against else "; the values also differ from the "
                 "reference evaluator beyond the tolerance"))
    elif not args.against:
        print("PASS: every frame lies inside the CV's reachable range")
    elif agree:
        print("PASS: the values agree with the reference evaluator")
    else:
        print("FAIL: the values differ from the reference evaluator beyond the tolerance; check "
              "the engine's atom indices, weights, centers and scales, transforms and "
              "periodic-box handling"
              + (", and that the groups of centre distances are whole in the positions the "
                 "engine was given (wrapped trajectories split them across the box edge)"
                 if any(d["kind"] == "center_distance" for d in spec.descriptors) else ""))
    return 0 if agree and in_range else 1


def _cmd_hints(args):
    from ..bias.hints import format_hints, spec_hints
    from ..spec import load_spec

    spec = load_spec(args.spec)
    try:
        hints = spec_hints(spec, temperature=args.temperature, md_step_fs=args.md_step_fs,
                           barrier=args.barrier, kernel=args.kernel,
                           **({} if args.autocorrelation_time_ps is None else
                              {"autocorrelation_time_ps": args.autocorrelation_time_ps}))
    except InputError as exc:
        raise InputError(f"{args.spec}: no hints: {exc}") from None
    for warning in hints["warnings"]:
        _log.warning("%s", warning)
    if args.json:
        sys.stdout.write(json.dumps(hints, indent=2, sort_keys=True) + "\n")
    else:
        print(format_hints(hints))
    return 0


def _check_plot_format(path):
    """Refuse --plot without matplotlib or with an extension matplotlib cannot write."""
    try:
        from matplotlib.backend_bases import FigureCanvasBase
    except ImportError:
        raise InputError("--plot needs matplotlib, a dependency of cvdesign that is missing "
                         "here; reinstall cvdesign (pip install cvdesign) or leave out "
                         "--plot") from None
    supported = FigureCanvasBase.get_supported_filetypes()
    ext = Path(path).suffix.lower().lstrip(".")
    if ext not in supported:
        raise InputError(f"--plot {path!r}: unknown image extension "
                         f"{('.' + ext) if ext else '(none)'}; use one of "
                         + ", ".join("." + k for k in sorted(supported)))


def _cmd_funnel(args):
    from ..io.atomic import atomic_paths, check_output_file
    from ..bias.funnel import plot_funnel, size_funnel_from_source
    from ..io.source import Source, describe_selection, select_atoms
    from ..report import report_path
    from ..report.inputs import report_data_name

    if args.exit_point is not None and not all(math.isfinite(v) for v in args.exit_point):
        raise InputError(f"--exit-point {' '.join(str(v) for v in args.exit_point)}: give three "
                         "finite coordinates in nm")
    if not (math.isfinite(args.k_wall) and args.k_wall > 0):
        raise InputError(f"--k-wall {args.k_wall!r} must be a positive force constant in "
                         "kJ/mol/nm^2")
    biases = args.bias_energy or []
    _check_bias_temperature(args, biases)
    if args.bias_column is not None and not biases:
        raise InputError("--bias-column goes with --bias-energy TRAJ FILE: it says which "
                         "column of the bias-energy files holds the bias energies")
    if args.temperature is not None and not biases:  # (it would be ignored without a word)
        raise InputError("--temperature goes with --bias-energy TRAJ FILE in funnel: it is the "
                         "temperature the biased runs are reweighted at, and unbiased runs "
                         "need none; leave it out")
    inputs = [args.topology] + list(args.bound) + [b for _, b in biases]
    check_output_file(args.out, force=args.force, inputs=inputs, option="--out")
    if args.plot is not None:
        if Path(args.plot).resolve() == Path(args.out).resolve():
            raise InputError(f"--plot {args.plot!r} is the same file as --out; give two names")
        check_output_file(args.plot, force=args.force, inputs=inputs, option="--plot")
        _check_plot_format(args.plot)
    # the report's data is written even with --no-report: 'cvdesign report' draws from it
    data_path = Path(args.out).with_name(report_data_name("funnel", Path(args.out).name))
    if args.plot is not None and Path(args.plot).resolve() == data_path.resolve():
        raise InputError(f"--plot {args.plot!r} is the report data written beside --out; give "
                         "another name")
    check_output_file(data_path, force=args.force, inputs=inputs,
                      option=f"the report data ({data_path.name}, beside --out)")
    report = None if args.no_report else report_path(args.out)
    if report is not None:  # (matplotlib writes no .html, so --plot cannot be the report)
        check_output_file(report, force=args.force, inputs=inputs,
                          option=f"the report ({report.name}, beside --out; see --no-report)")
    source = Source(args.topology, temperature=args.temperature if biases else None)
    bias_of = _bias_files(biases, list(args.bound), given_with="--bound")
    for f in args.bound:
        source.add(f, state="bound", bias=bias_of.get(f),
                   bias_column=args.bias_column if f in bias_of else None)
    top = source.topology
    lig = select_atoms(top, args.ligand)
    pocket = select_atoms(top, args.pocket)
    if np.intersect1d(lig, pocket).size:
        raise InputError("--ligand and --pocket share atoms; the pocket must not include the "
                         "ligand")
    with _executor(args) as executor:
        result = size_funnel_from_source(source, pocket, lig, exit_point=args.exit_point,
                                         unbound_length=args.unbound_length,
                                         executor=executor)
    soft = _soft_wall_warning(float(args.k_wall), result["params"]["cylinder_radius_nm"])
    if soft is not None:
        result["warnings"].append(soft)
    spec = _funnel_spec(source, args, lig, pocket, result)
    text = spec.to_json()
    from ..pipeline.output import dumps
    from ..pipeline.report_data import funnel_report_document

    name = Path(args.out).name
    data_text = dumps(funnel_report_document(result["positions"], name), compact=True)
    page, report_error = None, None
    if report is not None:  # rendered first, so that the outputs are written together
        from ..report.inputs import Output

        page, report_error = _report_page(Output("funnel", name, {name: text,
                                                                 data_path.name: data_text},
                                                 spec_name=name))
    paths = [args.out, data_path] + ([args.plot] if args.plot else []) \
        + ([report] if page else [])
    try:
        with atomic_paths(paths) as tmps:
            for tmp, content in ((tmps[0], text), (tmps[1], data_text)):
                with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
                    fh.write(content)
            if args.plot:
                plot_funnel(result, tmps[2])
            if page:
                with open(tmps[-1], "w", encoding="utf-8", newline="\n") as fh:
                    fh.write(page)
    except OSError as exc:
        raise InputError(f"cannot write the output ({exc.strerror or exc}); nothing was "
                         "written") from None
    args.written = ", ".join(str(p) for p in paths)
    prm = result["params"]
    print(f"ligand: {describe_selection(top, lig, args.ligand)}")
    print(f"pocket: {describe_selection(top, pocket, args.pocket)}")
    print(f"funnel: axis {(np.round(prm['axis'], 3) + 0.0).tolist()} (reference pocket "
          "frame); cone "
          f"half-angle {prm['cone_half_angle_rad']:.3f} rad, cylinder radius "
          f"{prm['cylinder_radius_nm']:.3f} nm from z = {prm['cone_end_z_nm']:.3f} nm, walls "
          f"at z = {prm['lower_wall_z_nm']:.3f} and {prm['upper_wall_z_nm']:.3f} nm")
    print(f"reference pocket: frame 0 of {args.bound[0]}; hold the pocket in this orientation "
          "(restrained or aligned) during the biased run")
    for line in result["reasoning"]:
        print(f"  - {line}")
    for line in result["warnings"]:  # on standard error, as every command's warnings
        _log.warning("%s", line)
    if args.plot:
        print(f"wrote {args.plot}")
    print(f"wrote {args.out}")
    print(f"wrote {data_path} (the ligand positions the report draws)")
    if page:
        print(f"wrote {report} (open it in a browser)")
    print(f"caution: {result['caution']}")
    if report_error is not None:
        print(f"cvdesign funnel: error: the spec was written, but the report could not be: "
              f"{report_error}. Run 'cvdesign report {args.out}' once the cause is fixed",
              file=sys.stderr)
        return 2
    return 0


def _funnel_spec(source, args, lig, pocket, result):
    """The spec `cvdesign funnel` writes: centre distance as the CV, the funnel as a restraint."""
    from ..bias.funnel import SHAPE_KEYS
    from ..io.source import file_sha256
    from ..pipeline.specs import _segments_provenance
    from ..spec import Spec, residue_hashes, topology_fingerprint

    top = source.topology
    prm, obs = result["params"], result["observed"]
    restraint = {"id": "funnel", "kind": "funnel",
                 "label": f"funnel: ligand ({args.ligand}) over pocket ({args.pocket})",
                 "groups": [lig.tolist(), pocket.tolist()], "axis": prm["axis"],
                 "reference_pocket_nm": result["reference_pocket_nm"],
                 **{k: prm[k] for k in SHAPE_KEYS},
                 "wall_force_constant_kj_mol_nm2": float(args.k_wall)}
    sizing = {k: result[k] for k in ("frame", "axis_rule", "observed", "margins", "warnings",
                                     "reasoning")}
    sizing["reference"] = {"file": Path(args.bound[0]).name, "frame": 0,
                           "pocket_center_nm": result["reference_center_nm"]}
    sizing["wall_force_constant_rule"] = (
        "wall_force_constant_kj_mol_nm2: stiff enough that the ligand centre enters a wall only "
        f"a little (common practice): {_wall_penetration(float(args.k_wall))}")
    return Spec(
        name="funnel", topology=top,
        descriptors=[{"id": "center_distance:pocket-ligand", "kind": "center_distance",
                      "label": "distance between the pocket and ligand centres",
                      "groups": [pocket.tolist(), lig.tolist()], "weighting": "geometric"}],
        terms=[{"descriptor": "center_distance:pocket-ligand", "transform": "identity",
                "center": 0.0, "scale": 1.0, "weight": 1.0}],
        states={"bound": {"mean": obs["center_distance_mean_nm"],
                          "std": obs["center_distance_std_nm"], "n_frames": obs["n_frames"]}},
        scores={}, hints={"funnel_sizing": sizing}, restraints=[restraint],
        provenance={"method": "funnel sizing from bound-state frames",
                    "inputs": [{"file": Path(f).name, "sha256": file_sha256(f), "state": "bound"}
                               for f in args.bound],
                    **({"segments": _segments_provenance(source)} if source.biased else {}),
                    "seed": None,
                    "topology_file": {"file": Path(args.topology).name,
                                      "fingerprint": topology_fingerprint(top),
                                      "residues": residue_hashes(top)}},
        caution=result["caution"],
    )


def _cmd_export(args):
    from ..io.atomic import atomic_paths, check_output_file
    from ..spec import load_spec

    spec = load_spec(args.spec)
    restraints = spec.restraints
    if restraints and args.restraint_out is None:
        ids = ", ".join(repr(r["id"]) for r in restraints)
        raise InputError(
            f"spec {args.spec!r} has restraints ({ids}) that belong with its CV; give "
            "--restraint-out FILE.xml to write them as a second force (kJ/mol), or export a "
            "spec without restraints")
    if not restraints and args.restraint_out is not None:
        raise InputError(f"--restraint-out: spec {args.spec!r} has no restraints to write; "
                         "leave the option out")
    inputs = [args.spec] + ([args.system] if args.system else [])
    check_output_file(args.out, force=args.force, inputs=inputs, option="--out")
    paths = [args.out]
    if args.restraint_out is not None:
        if Path(args.restraint_out).resolve() == Path(args.out).resolve():
            raise InputError(f"--restraint-out {args.restraint_out!r} is the same file as "
                             "--out; give two names")
        check_output_file(args.restraint_out, force=args.force, inputs=inputs,
                          option="--restraint-out")
        paths.append(args.restraint_out)
    from ..export.openmm import (OPENMM_DEFAULT_BOX_NM, default_box_message, import_openmm,
                                  read_system)

    openmm = import_openmm()
    system = read_system(args.system) if args.system else None
    box_message = None if system is None else default_box_message(system)
    if box_message is not None:  # (said first: a refusal below may follow from it)
        _log.warning("--system %s: %s", args.system, box_message)
    with warnings.catch_warnings(record=True) as said:  # the library warns per force;
        warnings.simplefilter("always")                    # each said once here instead
        forces = [spec.to_openmm(args.periodic, system=system)]
        if args.restraint_out is not None:
            forces.append(spec.restraint_to_openmm(args.periodic, system=system))
    for text in dict.fromkeys(str(w.message) for w in said):
        if text != box_message:
            _log.warning("%s", text)
    texts = [openmm.XmlSerializer.serialize(f) for f in forces]
    try:
        with atomic_paths(paths) as tmps:
            for tmp, text in zip(tmps, texts):
                with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
                    fh.write(text)
    except OSError as exc:
        raise InputError(f"cannot write the output ({exc.strerror or exc}); nothing was "
                         "written") from None
    periodic = forces[0].usesPeriodicBoundaryConditions()
    print(f"wrote {args.out}: the CV of spec {spec.name!r} as an OpenMM CustomCVForce whose "
          f"energy is the CV value (in the CV's units), "
          f"{'with periodic images in the box' if periodic else 'without a periodic box'}; "
          "read it with openmm.XmlSerializer.deserialize and add it as a collective variable "
          "of your own bias force")
    if args.periodic:
        edge = OPENMM_DEFAULT_BOX_NM
        print("note: --periodic: OpenMM takes the box from the System the force goes into; "
              "that System must carry the simulation's box (setDefaultPeriodicBoxVectors, or "
              "the Context's setPeriodicBoxVectors before the run). One whose box was never "
              f"set runs in OpenMM's default {edge:g} nm cube, where every distance over "
              f"{edge / 2:g} nm is wrapped without an error; export with --system SYSTEM.xml "
              "instead to have the System's box checked")
    if box_message is not None:  # (on standard output too: -q hides the log's line)
        print(f"warning: --system {args.system}: {box_message}")
    if spec.periodic:
        print(f"note: the CV is periodic with period {spec.period!r} (CV units) and jumps by "
              "one period where its dihedral crosses +-pi; the bias on it must be periodic "
              "with that period")
    if args.restraint_out is not None:
        print(f"wrote {args.restraint_out}: the spec's restraints as an OpenMM "
              "CustomCentroidBondForce (kJ/mol); add it to the System as it is, and hold the "
              "pocket in the orientation of the restraint's reference pocket during the run")
    grouped = any(d["kind"] == "center_distance" for d in spec.descriptors) or \
        (args.restraint_out is not None and bool(spec.restraints))
    print("check: "
          + ("the groups of centre distances and restraints must be whole in the positions "
             "given to OpenMM; " if grouped else "")
          + "compare the engine's CV values on a trajectory with "
          f"'cvdesign check {args.spec} --topology TOP --against VALUES TRAJ'")
    if spec.caution:
        print(f"caution: {spec.caution}")
    return 0


def _cmd_demo(args):
    from ..io.atomic import prepare_output_dir
    from ..io.demo import demo_data_dir
    from ..pipeline.suggest import is_output_file

    data = demo_data_dir()
    prepare_output_dir(args.out, force=args.force, marker="ranking.json",  # before any output
                       owned=is_output_file)
    manifest = json.loads((data / "manifest.json").read_text(encoding="utf-8"))
    top = str(data / manifest["topology"]["file"])
    states = [[name] + [str(data / f) for f in entry["files"]]
              for name, entry in manifest["states"].items()]
    ns = argparse.Namespace(select=None, kinds=DEFAULT_KINDS, cutoff=1.0,
                            prefilter_stride=None, coordination_r0=COORDINATION_R0_NM, max_terms=5,
                            suggestions=10, folds=4,
                            force=args.force, quiet=args.quiet, objective="separate", lag=None,
                            method="hlda", bootstrap=args.bootstrap, seed=0,
                            frame_step_ps=None, n_states=None, temperature=300.0,
                            md_step_fs=2.0, workers=1, scheduler=None,
                            no_report=args.no_report)
    print(f"cvdesign demo: {manifest['description']}\n", file=sys.stdout)
    try:
        result, report_ok = _run_suggest(top, states, args.out, ns, sys.stdout)
    finally:  # (what a failure or interrupt after the writing must not deny)
        args.written = getattr(ns, "written", None)
    slow = manifest["slow_dihedral"]
    slow_id = "dihedral:" + "-".join(str(a) for a in slow["atoms"])
    in_rank1 = any(t["descriptor"] == slow_id for t in result.ranking[0]["terms"])
    first = states[0][1]
    print("\nWhat to look at:", file=sys.stdout)
    if not args.no_report and report_ok:
        print(f"  - {args.out}/report.html (open it in a browser): the figures, the ranking "
              "and the summary in one page.", file=sys.stdout)
    print(f"  - {args.out}/summary.md: inputs, what was done, the top suggestions.",
          file=sys.stdout)
    print(f"  - the dihedral {'-'.join(slow['names'])} ({slow_id}) is slow by construction; "
          f"rank 1 {'uses' if in_rank1 else 'does NOT use'} it.", file=sys.stdout)
    print(f"  - {args.out}/scorecard.csv: every descriptor; fast torsions should score low.",
          file=sys.stdout)
    print(f"  - evaluate the rank-1 CV on a trajectory:\n      cvdesign apply {args.out}/cv-01.json "
          f"--topology {top} {first}", file=sys.stdout)
    return 0 if report_ok else 2


def _cmd_report(args):
    from ..io.atomic import check_output_file
    from ..report import read_output, write_report

    output = read_output(args.target)  # refuses what is not a cvdesign output, first
    if args.out is not None:
        check_output_file(args.out, force=args.force, inputs=output.paths(), option="--out")
        if Path(args.out).suffix.lower() not in (".html", ".htm"):  # --force replaced any file
            raise InputError(f"--out {args.out!r}: the report is an HTML page; give a file name "
                             "ending in .html")
    path = write_report(args.target, args.out)
    print(f"wrote {path}")
    return 0


#: Exit status of an unexpected exception (a defect of cvdesign; 1 is check's deviation, 2
#: bad input).
INTERNAL_ERROR_STATUS = 3

#: Exit status after standard output was closed early (e.g. ``cvdesign hints ... | head -1``):
#: 128 + SIGPIPE, what a shell reports for a program stopped by a closed pipe.
EXIT_BROKEN_PIPE = 141


def _stdout_to_devnull():
    """Point file descriptor 1 at /dev/null, so that the interpreter's final flush of
    what is still buffered for a closed pipe succeeds quietly."""
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):
        return
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, fd)
    os.close(devnull)


def main(argv=None):
    """Run the ``cvdesign`` command; return its exit status.

    0 on success, 1 when ``check`` finds values beyond the tolerance, 2 for bad
    input (a message on standard error, nothing written) and when the report of
    ``suggest``, ``demo`` or ``funnel`` could not be built (its other outputs are
    written, and the message says so), 3 for an unexpected failure inside cvdesign
    (:data:`INTERNAL_ERROR_STATUS`, a defect), 130 when interrupted, and 141 when
    standard output was closed before everything was printed (``cvdesign hints ... |
    head -1``): quietly, with file descriptor 1 then pointed at /dev/null so that the
    interpreter's final flush stays quiet. The messages of 3 and 130 say whether
    outputs had been written.
    """
    argv = sys.argv[1:] if argv is None else list(argv)
    try:
        try:
            status = _main(argv)
        except SystemExit:  # argparse: --help, --version, usage errors
            sys.stdout.flush()
            raise
        sys.stdout.flush()  # a closed pipe shows here, not at interpreter exit
        return status
    except BrokenPipeError:
        _stdout_to_devnull()
        return EXIT_BROKEN_PIPE


def _what_was_written(args):
    """'no output was written', or where the outputs were written before a failure or an
    interrupt while the command was printing its results (``args.written``)."""
    written = getattr(args, "written", None)
    return ("no output was written" if written is None else
            f"the outputs in {written} had been written, whole, before it")


def _main(argv):
    parser = build_parser()
    if not argv:  # list the commands
        sys.stdout.write(parser.format_help())
        return 0
    args, extra = parser.parse_known_args(argv)
    if extra:  # argparse would print the top-level usage; name the command instead
        parser.commands[args.command].error(
            f"unrecognized arguments: {' '.join(extra)} (see cvdesign {args.command} --help)")
    handler = {"suggest": _cmd_suggest, "apply": _cmd_apply, "check": _cmd_check,
               "hints": _cmd_hints, "funnel": _cmd_funnel, "export": _cmd_export,
               "demo": _cmd_demo,
               "report": _cmd_report}[args.command]
    try:
        with _reporting(args):
            return handler(args)
    except CVDesignError as exc:
        print(f"cvdesign {args.command}: error: {exc}"
              + (f" ({_what_was_written(args)})" if getattr(args, "written", None) else ""),
              file=sys.stderr)
        return 2
    except BrokenPipeError:
        raise
    except OSError as exc:  # a file that vanished or became unwritable after the checks
        where = f" {exc.filename!r}" if exc.filename else ""
        print(f"cvdesign {args.command}: error: cannot access{where}: "
              f"{exc.strerror or exc}; {_what_was_written(args)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"cvdesign: interrupted; {_what_was_written(args)}", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - a defect of cvdesign: said plainly, not as 1
        # (exit status 1 is check's "the engine's values deviate"); -v shows the traceback
        if getattr(args, "verbose", 0):
            import traceback

            traceback.print_exc(file=sys.stderr)
        print(f"cvdesign {args.command}: internal error: {type(exc).__name__}: {exc}. This is "
              f"a defect of cvdesign, not of your input as far as it could tell; "
              f"{_what_was_written(args)}. Please report it with the command line (and -v's "
              "traceback)", file=sys.stderr)
        return INTERNAL_ERROR_STATUS
