"""The main job: from state trajectories to ranked CVs and spec files.

:func:`suggest` runs the data flow of the design:

1. **pool** -- select atoms, enumerate candidate descriptors, prefilter
   distances by a cutoff on a strided subset of frames;
2. **screening pass** -- per-state mean, variance, minimum and maximum of every
   feature (:class:`~cvdesign.stats.moments.DiagonalMoments`), frame counts and time
   steps;
3. **statistics pass** -- per-state histograms of every feature (overlap), and
   per-state, per-fold full moments of the best-separating features;
4. **search** -- shortlist (drop near-duplicates), greedy forward search scored
   by held-out Fisher ratio, ranking with the one-standard-error rule;
5. **held-out pass** -- per-fold CV values of the ranked combinations, for a
   held-out overlap;
6. **specs** -- one engine-neutral spec per ranked combination.

Memory does not depend on trajectory length: each pass streams chunks and
keeps only mergeable statistics.
"""

import csv
import io
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .._version import __version__
from ..constants import COORDINATION_EXPONENTS, COORDINATION_R0_NM
from ..errors import InputError
from ..fit import rayleigh_quotient, timescales_from_eigenvalues
from ..io.atomic import prepare_output_dir, write_dir_atomically
from ..io.source import Source, file_sha256, stores_time
from ..kinds import DEFAULT_KINDS, GROUP_KINDS
from ..pool import build_pool
from ..score.card import CardBlocks, card_intervals, integrated_time_interval, plan_card_blocks
from ..score.redundancy import descriptor_correlation, redundancy_graph, representatives
from ..score.univariate import Histograms, fisher_ratio, overlap_coefficient
from ..search import (OBJECTIVES, FoldMoments, autocorrelation_along, cv_direction,
                      fit_direction, greedy_search, heldout_score, rank_combinations,
                      slow_direction, state_arrays)
from ..stats.bootstrap import ArraySum, block_bootstrap, percentile_interval
from ..stats.moments import (DiagonalLaggedMoments, DiagonalMoments, LagAccumulator, LaggedMoments,
                             Moments, merge_all)

__all__ = ["suggest", "Suggestions", "CAUTION", "is_output_file"]

#: Printed with, and stored in, every output that guides a simulation.
CAUTION = (
    "These CVs and numbers are starting points to validate, not guarantees: check "
    "that the CV separates your states in your own data, and that a biased run "
    "along it behaves, before relying on it."
)

_N_BINS = 50

_OUTPUT_NAME = re.compile(r"(ranking\.csv|ranking\.json|scorecard\.csv|summary\.md|"
                          r"states\.csv|cv-\d+\.json)")


def is_output_file(name):
    """Whether `name` is a file :meth:`Suggestions.write` writes (``--force`` replaces
    only a directory holding nothing else).

    Examples
    --------
    >>> is_output_file("cv-01.json"), is_output_file("notes.txt")
    (True, False)
    """
    return _OUTPUT_NAME.fullmatch(name) is not None

#: A feature whose standard deviation within some state is at most this fraction of its
#: overall standard deviation is *frozen* there (identical frames): not scored, not combined.
FROZEN_RELATIVE_SPREAD = 1e-6

#: Fewest frames of each state in each held-out fold; with fewer, the within-state
#: variance of a fold is too noisy to score on.
MIN_FRAMES_PER_FOLD = 10

#: Bootstrap refits of the search for selection frequencies, and the number of best
#: shortlisted descriptors (besides the ranked terms) they may choose from.
SELECTION_REPLICATES = 40
SELECTION_POOL = 12


def _note(progress, msg):
    if progress is not None:
        progress(msg)


@dataclass
class Suggestions:
    """Result of :func:`suggest`.

    Attributes
    ----------
    states : list of str
        State names, in input order.
    pool : cvdesign.pool.Pool
        The candidate pool after prefiltering.
    scorecard : list of dict
        One row per descriptor, best separating first (see :meth:`scorecard_csv`).
    ranking : list of dict
        Ranked combinations, best first; ``ranking[i]["spec"]`` names the spec file.
    specs : list of dict
        Spec documents, in ranking order.
    notes : list of str
        What was done: selection, pool sizes, prefilter, folds, shortlist.
    inputs : list of dict
        Per input file: path, state(s), frames, time step in ps.
    input_files : list of str
        Paths of every file read (topology included); :meth:`write` refuses
        to write over them.
    objective : str
        The search objective.
    lag_ps : float or None
        Lag of the slowness scores, ps.
    """

    states: list
    pool: object
    scorecard: list
    ranking: list
    specs: list
    notes: list = field(default_factory=list)
    inputs: list = field(default_factory=list)
    input_files: list = field(default_factory=list)
    objective: str = "separate"
    lag_ps: float = None
    exploration: object = None

    # ----------------------------------------------------------- renderings
    def scorecard_csv(self):
        """The score card as CSV text (``*_ci_low``/``*_ci_high``: 95 % interval)."""
        cols = ["order", "id", "kind", "label", "atoms"]
        for name in _CARD_COLUMNS:
            unit = "_ps" if name == "integrated_time" else ""
            cols += [name + unit, f"{name}_ci_low{unit}", f"{name}_ci_high{unit}"]
        cols += ["integrated_time_decayed", "screened", "shortlisted", "stands_for", "note"]
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(cols)
        for i, row in enumerate(self.scorecard, 1):
            atoms = (" / ".join(" ".join(map(str, g)) for g in row["groups"]) if "groups" in row
                     else " ".join(map(str, row["atoms"])))
            line = [i, row["id"], row["kind"], row["label"], atoms]
            for name in _CARD_COLUMNS:
                ci = row.get(f"{name}_ci") or [None, None]
                line += [_fmt(row.get(name)), _fmt(ci[0]), _fmt(ci[1])]
            dec = row.get("integrated_time_decayed")
            line += ["" if dec is None else int(dec), int(row["screened"]),
                     int(row["shortlisted"]), " ".join(row["stands_for"]), row["note"]]
            w.writerow(line)
        return buf.getvalue()

    def ranking_csv(self):
        """The ranking as CSV text (one row per combination)."""
        cols = ["rank", "spec", "n_terms", "objective", "method", "heldout_score",
                "heldout_score_se", "heldout_score_ci_low", "heldout_score_ci_high",
                "heldout_fisher_ratio", "heldout_fisher_ratio_se",
                "heldout_fisher_ratio_ci_low", "heldout_fisher_ratio_ci_high",
                "heldout_overlap", "heldout_overlap_ci_low", "heldout_overlap_ci_high",
                "fisher_ratio_all", "fisher_ratio_ci_low",
                "fisher_ratio_ci_high", "lag_ps", "heldout_autocorrelation",
                "heldout_autocorrelation_ci_low", "heldout_autocorrelation_ci_high",
                "autocorrelation_all", "autocorrelation_ci_low", "autocorrelation_ci_high",
                "timescale_ps", "timescale_ci_low_ps", "timescale_ci_high_ps",
                "timescale_resolved",
                "integrated_time_ps", "integrated_time_ci_low_ps", "integrated_time_ci_high_ps",
                "terms", "weights", "weight_ci", "selection_frequency", "reproduced_in_refits"]
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(cols)
        for r in self.ranking:
            fci = r.get("fisher_ratio_ci") or [None, None]
            aci = r.get("autocorrelation_ci") or [None, None]
            sci = r.get("heldout_score_ci") or [None, None]
            hci = r.get("heldout_fisher_ratio_ci") or [None, None]
            oci = r.get("heldout_overlap_ci") or [None, None]
            rci = r.get("heldout_autocorrelation_ci") or [None, None]
            tci = r.get("timescale_ci_ps") or [None, None]
            ici = r.get("integrated_time_ci_ps") or [None, None]
            w.writerow([r["rank"], r["spec"], r["n_terms"], r["objective"], r["method"],
                        _fmt(r["heldout_score"]), _fmt(r["heldout_score_se"]),
                        _fmt(sci[0]), _fmt(sci[1]),
                        _fmt(r["heldout_fisher_ratio"]), _fmt(r["heldout_fisher_ratio_se"]),
                        _fmt(hci[0]), _fmt(hci[1]),
                        _fmt(r["heldout_overlap"]), _fmt(oci[0]), _fmt(oci[1]),
                        _fmt(r["fisher_ratio_all"]),
                        _fmt(fci[0]), _fmt(fci[1]), _fmt(r["lag_ps"]),
                        _fmt(r["heldout_autocorrelation"]), _fmt(rci[0]), _fmt(rci[1]),
                        _fmt(r["autocorrelation_all"]),
                        _fmt(aci[0]), _fmt(aci[1]), _fmt(r["timescale_ps"]),
                        _fmt(tci[0]), _fmt(tci[1]), _flag(r.get("timescale_resolved")),
                        _fmt(r.get("integrated_time_ps")),
                        _fmt(ici[0]), _fmt(ici[1]),
                        "; ".join(_term_name(t) for t in r["terms"]),
                        " ".join(_fmt(t["weight"]) for t in r["terms"]),
                        _per_term([("[" + ",".join(_fmt(v) for v in t["weight_ci"]) + "]")
                                   if t.get("weight_ci") else None for t in r["terms"]]),
                        _per_term([t.get("selection_frequency") for t in r["terms"]]),
                        _fmt(r.get("reproduced_in_refits"))])
        return buf.getvalue()

    def ranking_json(self):
        """The ranking as JSON text."""
        return _dumps({"format": "cvdesign-ranking", "version": 1, "states": self.states,
                       "objective": self.objective, "lag_ps": self.lag_ps,
                       "ranking": self.ranking, "caution": CAUTION})

    def top_table(self, n=5):
        """A plain-text table of the top `n` suggestions (separation and slowness)."""
        lines = [f"{'rank':>4}  {'spec':<11} {'terms':>5}  {'held-out J':>10}  "
                 f"{'overlap':>7}  {'autocorr':>8}  descriptors"]
        for r in self.ranking[:n]:
            names = ", ".join(dict.fromkeys(t["label"] for t in r["terms"]))
            rho = r["heldout_autocorrelation"]
            lines.append(f"{r['rank']:>4}  {r['spec']:<11} {r['n_terms']:>5}  "
                         f"{r['heldout_fisher_ratio']:>10.3g}  {r['heldout_overlap']:>7.3f}  "
                         f"{'' if rho is None else format(rho, '.3f'):>8}  {names}")
        return "\n".join(lines)

    def summary_md(self):
        """A short markdown summary of the run."""
        out = ["# cvdesign suggest: summary", ""]
        out.append(f"cvdesign {__version__}. States: "
                   + ", ".join(f"`{s}`" for s in self.states) + f". Objective: `{self.objective}`"
                   + ("" if self.lag_ps is None else f", lag {self.lag_ps:g} ps") + ".")
        out += ["", "## Inputs", "", "| file | state | frames | time between frames (ps) |",
                "| --- | --- | ---: | ---: |"]
        for inp in self.inputs:
            dt = "unknown" if inp["frame_step_ps"] is None else f"{inp['frame_step_ps']:g}"
            out.append(f"| {inp['file']} | {', '.join(inp['states'])} | {inp['frames']} | {dt} |")
        if self.exploration is not None:
            out += [""] + self.exploration.summary_lines()
        out += ["", "## What was done", ""] + [f"- {n}" for n in self.notes]
        out += ["", "## Top suggestions", "",
                "Held-out J is the Fisher ratio (between-state over within-state variance "
                "of the CV, dimensionless) on frames not used to fit it; overlap is the "
                "histogram overlapping coefficient of the states along the CV on those frames "
                "(0 = fully separated, 1 = identical); autocorrelation is the held-out "
                "normalized autocorrelation of the CV at the lag (1 = does not relax within "
                "the lag, here with all runs about their common mean, so a run that never "
                "leaves its state counts as slow), and the timescale is "
                "-lag/ln(autocorrelation) on all data; a timescale longer than the longest run "
                "is only a lower bound. "
                "Intervals are 95 % block-bootstrap intervals; selection is the fraction of "
                "bootstrap refits of the whole search in which the descriptor is kept in the "
                "refit's counterpart of this CV (its ranked combination sharing the most "
                "descriptors with it).", "",
                "| rank | spec | held-out J | overlap | autocorr. | timescale (ps) | "
                "descriptors (weight [95 % CI], selection) |",
                "| ---: | --- | ---: | ---: | ---: | ---: | --- |"]
        for r in self.ranking[:5]:
            terms = "; ".join(_term_text(t) for t in r["terms"])
            rho = r["heldout_autocorrelation"]
            ts = _timescale_text(r)
            out.append(f"| {r['rank']} | {r['spec']} | "
                       f"{r['heldout_fisher_ratio']:.3g} ± {r['heldout_fisher_ratio_se']:.2g} | "
                       f"{r['heldout_overlap']:.3f} | {'' if rho is None else format(rho, '.3f')} "
                       f"| {ts} | {terms} |")
        for r in self.ranking:
            for w in r.get("warnings", []):
                out += ["", f"**Warning** (rank {r['rank']}, {r['spec']}): {w}."]
        out += ["", "Files: `ranking.csv`, `ranking.json`, `scorecard.csv` (every descriptor), "
                "`cv-NN.json` (one spec per suggestion; evaluate with `cvdesign apply`).",
                "", f"**Caution.** {CAUTION}", ""]
        return "\n".join(out)

    def write(self, out_dir, *, force=False):
        """Write every output into `out_dir`, all or nothing.

        Files are written into a temporary directory beside `out_dir`, which
        is then renamed onto it, so an interrupted run leaves no partial output.

        Parameters
        ----------
        out_dir : path-like
        force : bool, default=False
            Replace an existing non-empty directory.
        """
        out_dir = prepare_output_dir(out_dir, force=force, inputs=self.input_files,
                                     owned=is_output_file,
                                     marker="ranking.json")
        files = {
            "ranking.csv": self.ranking_csv(),
            "ranking.json": self.ranking_json(),
            "scorecard.csv": self.scorecard_csv(),
            "summary.md": self.summary_md(),
        }
        for r, spec in zip(self.ranking, self.specs):
            files[r["spec"]] = _dumps(spec)
        if self.exploration is not None:
            files["states.csv"] = self.exploration.states_csv()
        write_dir_atomically(out_dir, files)
        return out_dir


#: Score-card columns with an interval, in CSV order; the integrated time is in ps.
_CARD_COLUMNS = ("fisher_ratio", "overlap", "autocorrelation", "autocorrelation_within_runs",
                 "integrated_time")


def _per_term(values):
    """One CSV cell of per-term values separated by spaces; empty when none is known."""
    if all(v is None for v in values):
        return ""
    return " ".join(v if isinstance(v, str) else _fmt(v) for v in values)


def _term_name(t):
    return t["label"] if t["transform"] == "identity" else f"{t['transform']}({t['label']})"


def _timescale_text(r):
    ts = r.get("timescale_ps")
    if ts is None:
        return ""
    if r.get("timescale_resolved") is False and r.get("longest_run_ps"):
        return f"> {r['longest_run_ps']:.3g} (not resolved by these runs)"
    return format(ts, ".3g")


def _term_text(t):
    text = f"{_term_name(t)} {t['weight']:+.3f}"
    if t.get("weight_ci"):
        lo, hi = t["weight_ci"]
        if lo is not None and hi is not None:
            text += f" [{lo:+.3f}, {hi:+.3f}]"
    if t.get("selection_frequency") is not None:
        text += f", {t['selection_frequency']:.0%}"
    return text


def _short_repr(value, limit=80):
    text = repr(value)
    return text if len(text) <= limit else text[:limit] + "..."


def _flag(x):
    """A boolean for CSV as in the score card: 1, 0, or empty when unknown."""
    return "" if x is None else str(int(bool(x)))


def _fmt(x):
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return ""
    return f"{x:.6g}"


def _rounded(obj, digits=12):
    """Floats rounded to `digits` significant digits (recursively).

    The last digits of a float depend on the order of summation, which can
    change with the number of BLAS threads; rounding keeps outputs
    byte-identical across thread counts in practice.
    """
    if isinstance(obj, float):
        return float(f"{obj:.{digits}g}") if math.isfinite(obj) else obj
    if isinstance(obj, dict):
        return {k: _rounded(v, digits) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_rounded(v, digits) for v in obj]
    return obj


def _dumps(obj):
    return json.dumps(_rounded(obj), indent=2, sort_keys=True, allow_nan=False) + "\n"


def output_inputs(source):
    """Every file a source reads (topology and trajectories)."""
    files = [str(p) for p in source.files()]
    if source.topology_path:
        files.append(source.topology_path)
    return files


# ---------------------------------------------------------------- fold assignment
class _Folds:
    """Assigns every frame to a fold: by trajectory, or by contiguous block."""

    def __init__(self, source, seg_counts, n_folds):
        self.n_states = source.n_states
        files_per_state = []
        for s in range(source.n_states):
            files = []
            for si, seg in enumerate(source.segments):
                if seg_counts[si, s] > 0 and seg.path not in files:
                    files.append(seg.path)
            files_per_state.append(files)
        min_files = min(len(f) for f in files_per_state)
        self.mode = "block"
        if min_files >= 2:
            k = min(n_folds, min_files)
            file_fold = [{p: i % k for i, p in enumerate(files)} for files in files_per_state]
            per_fold = np.zeros((source.n_states, k))
            for si, seg in enumerate(source.segments):
                for s in range(source.n_states):
                    if seg_counts[si, s]:
                        per_fold[s, file_fold[s][seg.path]] += seg_counts[si, s]
            if per_fold.min() >= MIN_FRAMES_PER_FOLD:
                self.mode, self.n_folds, self.file_fold = "trajectory", k, file_fold
        if self.mode == "block":
            totals = seg_counts.sum(axis=0)
            k = int(min(n_folds, totals.min() // MIN_FRAMES_PER_FOLD))
            if k < 2:
                s = int(np.argmin(totals))
                raise InputError(
                    f"state {source.states[s]!r} has only {int(totals[s])} frames; held-out "
                    f"scoring needs at least {2 * MIN_FRAMES_PER_FOLD} per state "
                    f"({MIN_FRAMES_PER_FOLD} in each of two folds); give more frames"
                )
            self.n_folds = k
        self.source = source
        self.seg_counts = seg_counts
        self._seen = np.zeros_like(seg_counts)

    def describe(self):
        if self.mode == "trajectory":
            return (f"held-out scoring: {self.n_folds}-fold cross-validation by whole "
                    "trajectories (each state's files are split among the folds)")
        return (f"held-out scoring: {self.n_folds}-fold cross-validation by contiguous "
                "blocks of each trajectory (a state has a single trajectory, or too few "
                f"frames per trajectory for whole-trajectory folds of at least "
                f"{MIN_FRAMES_PER_FOLD} frames)")

    def reset(self):
        self._seen[:] = 0

    def of(self, chunk):
        si = chunk.segment_index
        states = chunk.states
        folds = np.empty(states.shape[0], dtype=np.intp)
        if self.mode == "trajectory":
            path = self.source.segments[si].path
            for s in np.unique(states):
                folds[states == s] = self.file_fold[s][path]
            return folds
        for s in np.unique(states):
            rows = np.flatnonzero(states == s)
            rank = self._seen[si, s] + np.arange(rows.size)
            self._seen[si, s] += rows.size
            folds[rows] = (rank * self.n_folds) // self.seg_counts[si, s]
        return folds


class _Series:
    """Lagged statistics of many time series, keyed, fed chunk by chunk.

    A series is identified by a key (e.g. segment, state, fold); frames of one
    key that do not follow each other (a gap in frame numbers) start a new
    series, so no pair spans a gap, a state change, or a file boundary.
    """

    def __init__(self, n_features, shift, *, diagonal):
        self.n_features = n_features
        self.shift = shift
        self.diagonal = diagonal
        self._acc = {}
        self._last = {}

    def feed(self, key, frames, x, lag):
        """Feed rows `x` (frames `frames`, consecutive or not) of the series `key`."""
        if x.shape[0] == 0:
            return
        acc = self._acc.get(key)
        if acc is None:
            acc = self._acc[key] = LagAccumulator(self.n_features, lag, shift=self.shift,
                                                  diagonal=self.diagonal)
        cuts = np.flatnonzero(np.diff(frames) != 1) + 1
        last = self._last.get(key)
        if last is not None and frames[0] != last + 1:
            acc.break_series()
        start = 0
        for c in list(cuts) + [len(frames)]:
            acc.feed(x[start:c])
            if c < len(frames):
                acc.break_series()
            start = c
        self._last[key] = frames[-1]

    def moments_of(self, key):
        """Moments of one key (an empty object if the key was never fed)."""
        acc = self._acc.get(key)
        if acc is None:
            cls = DiagonalLaggedMoments if self.diagonal else LaggedMoments
            return cls(self.n_features, shift=self.shift)
        m = acc.moments.copy()
        m.lag = None
        return m

    def local_autocorrelation(self):
        """Autocorrelation at the lag with every series about its own mean.

        The variances and lagged covariances of the keys (diagonal statistics),
        each about the key's own mean, are combined weighted by their pair
        counts: the decorrelation *within* runs, free of the offsets between
        runs or states.
        """
        c0 = np.zeros(self.n_features)
        ct = np.zeros(self.n_features)
        for acc in self._acc.values():
            m = acc.moments
            if m.count == 0:
                continue
            _, v0, c = m.covariances(reversible=True)
            c0 += m.count * v0
            ct += m.count * c
        out = np.full(self.n_features, np.nan)
        ok = c0 > 0
        out[ok] = ct[ok] / c0[ok]
        return out

    def run_means(self):
        """Mean of the lagged pairs of each key (reversible, both ends), by key."""
        return {key: acc.moments.covariances(reversible=True)[0]
                for key, acc in self._acc.items() if acc.moments.count > 0}

    def moments(self, select=None):
        """Merged moments of the keys for which ``select(key)`` is true (all if None)."""
        out = []
        for key, acc in self._acc.items():
            if select is None or select(key):
                m = acc.moments.copy()
                m.lag = None  # files may need different frame lags for one lag in ps
                out.append(m)
        if not out:
            cls = DiagonalLaggedMoments if self.diagonal else LaggedMoments
            return cls(self.n_features, shift=self.shift)
        return merge_all(out)


def _runs(chunk):
    """(state, rows) for each state present in a chunk."""
    for s in np.unique(chunk.states):
        yield int(s), np.flatnonzero(chunk.states == s)


def read_timesteps(source):
    """Time step (ps, or None when unknown) of every segment of a source.

    Times are stored in single precision, so 7 significant digits are kept.
    """
    out = {}
    for si in range(len(source.segments)):
        v = source.timestep(si)
        out[si] = None if v is None else float(f"{v:.7g}")
    return out


def _lag_frames(source, lag, timesteps):
    """Lag in frames of each segment, for a lag in ps; refuse what cannot be converted."""
    out = {}
    for si, seg in enumerate(source.segments):
        dt = timesteps.get(si)
        if dt is None or not dt > 0:
            raise InputError(
                f"lag={lag:g} ps cannot be converted to frames of {str(seg.path)!r}: its time "
                "step is unknown (the format stores no times, or the file has one frame); "
                "give the time step with --frame-step-ps PS")
        ratio = lag / dt
        n = int(round(ratio))
        if n < 1 or abs(ratio - n) > 1e-6 * max(1.0, ratio):
            raise InputError(
                f"lag={lag:g} ps is not a whole number of frames of {str(seg.path)!r} "
                f"(time step {dt:g} ps); choose a multiple of {dt:g} ps")
        out[si] = n
    return out


def _iat_lags(seg_counts, max_lag=2000):
    """Geometric grid of lags (frames) for integrated autocorrelation times."""
    shortest = int(seg_counts[seg_counts > 0].min())
    top = max(1, min(max_lag, shortest // 2))
    return np.unique(np.round(np.geomspace(1, top, 18)).astype(int))


def integrated_time(lags, rho, dt, *, window=5.0, return_window=False):
    """Integrated autocorrelation time from the autocorrelation on a grid of lags.

    ``tau_int = dt * (1/2 + sum_{k>=1} rho(k))`` (Sokal 1997, in *Functional
    Integration*, Plenum; Frenkel and Smit, *Understanding Molecular
    Simulation*, 2002), with the sum taken as the trapezoidal integral of
    ``rho`` (``rho(0) = 1``) interpolated linearly between the lags of the grid,
    up to Sokal's self-consistent window: the first lag ``M`` with
    ``M >= window * tau(M)``.

    Parameters
    ----------
    lags : array-like of int, shape (n_lags,)
        Increasing lags in frames, starting at 1.
    rho : array-like of shape (n_lags, n_features)
        Normalized autocorrelation at each lag.
    dt : float
        Time between frames, ps (1 for frames).
    window : float, default=5.0
        Window factor ``c`` (Sokal recommends 4 to 10 for nearly exponential decay).
    return_window : bool, default=False
        Also return the summation window of each feature, frames.

    Returns
    -------
    tau : ndarray of shape (n_features,)
        In the unit of `dt`.
    decayed : ndarray of bool, shape (n_features,)
        False where no lag of the grid satisfies the window condition: the
        motion did not decorrelate within the runs and `tau` (the integral over
        the whole grid) is a lower bound.
    window_frames : ndarray of shape (n_features,)
        Only with `return_window`: the lag (frames) where the sum stopped.

    Examples
    --------
    >>> import numpy as np
    >>> lags = np.arange(1, 200)
    >>> tau, ok = integrated_time(lags, np.exp(-lags / 10.0)[:, None], 1.0)
    >>> round(float(tau[0]), 1), bool(ok[0])  # 1/2 + sum_k exp(-k/10) = 10.0, window loses ~1 %
    (9.9, True)
    """
    lags = np.asarray(lags, dtype=np.float64)
    rho = np.nan_to_num(np.asarray(rho, dtype=np.float64), nan=0.0)
    grid = np.concatenate([[0.0], lags])
    r = np.vstack([np.ones((1, rho.shape[1])), rho])
    cum = np.vstack([np.zeros((1, rho.shape[1])),
                     np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(grid)[:, None], axis=0)])
    ok = grid[:, None] >= window * cum
    ok[0] = False
    decayed = ok.any(axis=0)
    stop = np.where(decayed, ok.argmax(axis=0), len(grid) - 1)
    tau = cum[stop, np.arange(rho.shape[1])]
    if return_window:
        return tau * dt, decayed, grid[stop]
    return tau * dt, decayed


# ---------------------------------------------------------------- the pipeline
def suggest(source, *, objective="separate", lag=None, method="hlda", selection=None,
            kinds=DEFAULT_KINDS, cutoff=1.0, prefilter_stride=10,
            coordination_r0=COORDINATION_R0_NM,
            max_terms=5, n_suggestions=10, screen_size=200, shortlist_size=40,
            max_correlation=0.95, n_folds=4, n_seeds=5, min_gain=0.01, shrinkage=1e-3,
            n_bootstrap=200, seed=0, temperature=300.0, md_step_fs=2.0, progress=None):
    """Rank compact linear CVs for the states of a source.

    Parameters
    ----------
    source : cvdesign.io.source.Source
        Topology and trajectories with at least two states.
    objective : {'separate', 'slow', 'both'}, default='separate'
        What the search maximizes on held-out folds: the separation of the
        states (Fisher ratio of the discriminant direction), the slowness of
        the slowest linear combination (cross-validated VAMP-2 of the slowest
        singular function, Wu and Noé 2020), or the product of the two (see
        :func:`cvdesign.search.fold_scores`). Every suggestion reports both
        its separation and, when a lag is known, its slowness.
    lag : float, default=None
        Lag time in ps for slowness (required for ``slow`` and ``both``),
        converted to frames with each file's time step; a lag that is not a
        whole number of frames of some file is refused. None: slowness is
        reported at 10 frames when every file has the same known time step.
    method : {'hlda', 'lda'}, default='hlda'
        Discriminant for ``separate`` and ``both``: harmonic LDA (within-state
        scatter the harmonic mean of the state covariances; Mendels, Piccini
        and Parrinello 2018) or plain LDA (arithmetic mean). HLDA is the
        default because the narrow (stiff) state dominates its within-state
        scatter, so the CV does not discount a direction just because one
        state fluctuates widely along it -- the direction a biased run must
        push along to leave the narrow state.
    selection : str, default=None
        mdtraj atom selection for the pool; None: heavy atoms of the solute.
    kinds : sequence of str, default=('distance', 'angle', 'dihedral')
        Descriptor kinds in the pool, from ``cvdesign.kinds.KINDS``: also
        ``'center_distance'`` (distance between the mass centers of the
        selected atoms of two residues, nm) and ``'coordination'`` (their
        coordination number, dimensionless), for every pair of residues.
    cutoff : float, default=1.0
        Prefilter, in nm: an atom pair (or, for the residue kinds, a residue
        pair, by the distance of their centers) is kept if its mean distance
        is below `cutoff` in at least one state.
    prefilter_stride : int, default=10
        The prefilter uses every `prefilter_stride`-th frame of each state.
    coordination_r0 : float, default=0.45
        Switching distance of the coordination numbers, nm (exponents 6, 12).
    max_terms : int, default=5
        Largest number of descriptors in a combination.
    n_suggestions : int, default=10
        Number of ranked combinations (and spec files).
    screen_size : int, default=200
        Descriptors, best first by the objective's univariate score, whose
        full covariance is gathered.
    shortlist_size : int, default=40
        Descriptors the search may combine, one per redundancy group.
    max_correlation : float, default=0.95
        Descriptors are redundant when the pooled within-state |correlation|
        of any of their features exceeds this.
    n_folds : int, default=4
        Folds of the held-out scoring (fewer when a state has fewer
        trajectories, or too few frames).
    n_seeds : int, default=5
        Greedy searches, each started from one of the best single descriptors.
    min_gain : float, default=0.01
        A search adds a descriptor only if it raises the held-out score by
        more than this fraction.
    shrinkage : float, default=1e-3
        Regularization of the within-state covariances of standardized
        features: ``(1 - a) S + a (tr S / p) I``.
    n_bootstrap : int, default=200
        Block-bootstrap replicates for confidence intervals (0: none).
    seed : int, default=0
        Seed of the bootstrap; same inputs and seed, same outputs byte for byte.
    temperature : float, default=300.0
        Temperature in K of the biased run, for the bias-parameter hints stored
        in each spec (recompute them with ``cvdesign hints``); 1 to 5000 K.
    md_step_fs : float, default=2.0
        MD step in fs of the biased run, for the hints; 0.01 to 100 fs (see
        :func:`cvdesign.bias.hints.check_run_conditions`). When the hints of a
        suggestion are refused (e.g. a CV that does not move within the
        states), its ranking entry and spec record ``hints_refused`` with the
        reason instead.
    progress : callable, default=None
        Called with a message string at each stage.

    Returns
    -------
    Suggestions

    Raises
    ------
    InputError
        For a `source` that is not a :class:`~cvdesign.io.source.Source` (e.g. a
        file name), fewer than two states, a state without frames, an empty
        pool, a lag that cannot be converted, and the other input problems
        described in the messages.

    Examples
    --------
    On the bundled demo (two states of an invented flexible molecule)::

        from cvdesign import Source, suggest
        from cvdesign.io.demo import demo_data_dir
        d = demo_data_dir()
        src = Source.from_states(d / "latch.pdb", {"closed": [d / "closed-1.xtc"],
                                                   "open": [d / "open-1.xtc"]})
        result = suggest(src, n_bootstrap=0)
        print(result.top_table())
    """
    if not isinstance(source, Source):
        raise InputError(
            f"suggest() needs a Source (a topology and trajectories grouped by state), not "
            f"{type(source).__name__} {_short_repr(source)}; build one with "
            "Source.from_states('top.pdb', {'closed': ['c1.xtc'], 'open': ['o1.xtc']})")
    _validate_options(max_terms=max_terms, n_suggestions=n_suggestions, screen_size=screen_size,
                      shortlist_size=shortlist_size, max_correlation=max_correlation,
                      n_folds=n_folds, n_seeds=n_seeds, shrinkage=shrinkage, min_gain=min_gain,
                      prefilter_stride=prefilter_stride, n_bootstrap=n_bootstrap, seed=seed)
    if objective not in OBJECTIVES:
        raise InputError(f"objective={objective!r} must be one of {', '.join(OBJECTIVES)}")
    if method not in ("lda", "hlda"):
        raise InputError(f"method={method!r} must be 'lda' or 'hlda'")
    from ..bias.hints import check_run_conditions
    check_run_conditions(temperature, md_step_fs)  # refuse impossible hint inputs up front
    if lag is not None and not (isinstance(lag, (int, float)) and math.isfinite(lag) and lag > 0):
        raise InputError(f"lag={lag!r} must be a positive time in ps")
    if objective in ("slow", "both") and lag is None:
        raise InputError(f"objective {objective!r} needs a lag time: give --lag PS (e.g. a few "
                         "times the time step, well below the run length)")
    if source.n_states < 2:
        names = ", ".join(repr(s) for s in source.states) or "none"
        raise InputError(
            f"only one state was given ({names}); separating states needs at least two: "
            "give another with --state NAME FILE ..., or give unlabelled runs with --runs"
        )
    n_states = source.n_states
    priors = np.full(n_states, 1.0 / n_states)

    # ---- time steps and lag
    timesteps = read_timesteps(source)
    lag_ps = lag
    if lag is None:
        steps = {round(v, 9) for v in timesteps.values() if v is not None}
        if len(steps) == 1 and all(v is not None for v in timesteps.values()):
            lag_ps = 10 * next(iter(timesteps.values()))
    lag_frames = _lag_frames(source, lag_ps, timesteps) if lag_ps is not None else None

    _note(progress, "building the candidate pool")
    pool = build_pool(source, selection=selection, kinds=kinds, cutoff=cutoff,
                      stride=prefilter_stride, coordination_r0=coordination_r0)
    notes = list(pool.notes) + source.notes
    atoms = pool.atom_indices()
    n_feat = pool.n_features
    _note(progress, f"pool: {len(pool)} descriptors, {n_feat} features; screening pass")

    # ---- pass 1: diagonal moments, counts, lagged diagonal statistics
    diag = [DiagonalMoments(n_feat) for _ in range(n_states)]
    seg_counts = np.zeros((len(source.segments), n_states), dtype=np.int64)
    min_box = None
    lag1 = None
    chunk_size = _chunk_frames(source, n_feat)
    last_time = {}
    for chunk in source.iter_chunks(atom_indices=atoms, chunk_size=chunk_size):
        x = pool.features(chunk.trajectory, atom_indices=atoms)
        si = chunk.segment_index
        _check_uniform_time(source, si, chunk, timesteps.get(si), last_time)
        if chunk.trajectory.unitcell_vectors is not None:
            h = _box_heights(chunk.trajectory.unitcell_vectors).min()
            min_box = h if min_box is None else min(min_box, h)
        if lag_frames is not None and lag1 is None:
            lag1 = _Series(n_feat, x[0].copy(), diagonal=True)
        for s, rows in _runs(chunk):
            diag[s] = diag[s].merge(DiagonalMoments.from_data(x[rows]))
            seg_counts[si, s] += rows.size
            if lag1 is not None:
                lag1.feed((si, s), chunk.frames[rows], x[rows], lag_frames[si])
    empty = [source.states[s] for s in range(n_states) if diag[s].count == 0]
    if empty:
        raise InputError(f"state(s) {', '.join(map(repr, empty))} have no frames; check the "
                         "files and frame ranges given for them")
    inputs = _describe_inputs(source, seg_counts, timesteps)
    run_ps = [seg_counts[si].sum() * dt for si, dt in timesteps.items() if dt is not None]
    longest_run_ps = float(max(run_ps)) if run_ps else None
    notes += _box_notes(pool, diag, min_box)
    unknown = [i["file"] for i in inputs if i["frame_step_ps"] is None]
    if unknown:
        notes.append("time step unknown for " + ", ".join(unknown[:5])
                     + (" ..." if len(unknown) > 5 else "")
                     + " (the format stores no times, or a single frame)")
    lagless = [] if lag1 is None else [
        s for s in range(n_states) if lag1.moments(lambda key, s=s: key[1] == s).count == 0]
    if lag1 is not None and len(lagless) == n_states:
        longest = _longest_run_text(seg_counts, timesteps)
        if objective in ("slow", "both"):
            raise InputError(
                f"lag={lag_ps:g} ps is longer than every run ({longest}): there are no lagged "
                f"pairs to measure slowness with, which objective {objective!r} needs; choose "
                "a shorter --lag or give longer runs")
        notes.append(f"slowness not measured: no run is longer than the lag ({lag_ps:g} ps; "
                     f"{longest}), so there are no lagged pairs; the autocorrelation and "
                     "timescale columns are left empty (give a shorter --lag to measure them)")
        lag1 = lag_frames = None
        lag_ps = None
    elif lagless:
        # the other states' runs alone would measure motion within those states, not the
        # slowness of a CV that separates them (the slow coordinate would look fast)
        names = ", ".join(repr(source.states[s]) for s in lagless)
        mask = np.zeros_like(seg_counts)
        mask[:, lagless] = seg_counts[:, lagless]
        longest = _longest_run_text(mask, timesteps)
        if objective in ("slow", "both"):
            raise InputError(
                f"lag={lag_ps:g} ps is longer than every run of state(s) {names} ({longest}): "
                "slowness would be measured on the other states' runs alone, within them, "
                f"which objective {objective!r} cannot rank on; choose a shorter --lag or give "
                "longer runs of those states")
        notes.append(f"slowness not measured: no run of state(s) {names} is longer than the "
                     f"lag ({lag_ps:g} ps; {longest}), and the other states' runs alone would "
                     "measure motion within those states, not between them; the "
                     "autocorrelation and timescale columns are left empty (give a shorter "
                     "--lag or longer runs of those states to measure them)")
        lag1 = lag_frames = None
        lag_ps = None
    elif lag_ps is not None:
        notes.append(f"lag: {lag_ps:g} ps"
                     + (" (default: 10 frames, for the slowness columns only)" if lag is None
                        else "")
                     + "; lagged pairs never span a file, a state change or a gap in frames")
    elif lag_frames is not None or lag is None:
        notes.append("slowness not scored: the files' time steps are unknown or differ; "
                     "give --lag PS (and --frame-step-ps PS for files that store no times)")

    means = np.array([d.mean for d in diag])
    variances = np.array([d.variance for d in diag])
    center = priors @ means
    scale = np.sqrt(priors @ (variances + (means - center) ** 2))
    constant = ~(scale > 1e-12 * (1.0 + np.abs(center)))
    scale[constant] = 1.0
    # a feature that does not move within some state (identical frames) has no
    # measurable spread there: its Fisher ratio would be infinite and a bias kernel along
    # it of zero width, so it is neither scored nor combined
    frozen_feat = ~constant & (variances.min(axis=0) <= (FROZEN_RELATIVE_SPREAD * scale) ** 2)
    unscored = constant | frozen_feat
    fisher_feat = fisher_ratio(means, variances, priors)
    fisher_feat[unscored] = 0.0
    if lag1 is not None:
        rho_feat = np.nan_to_num(lag1.moments().autocorrelation(), nan=0.0)
        rho_feat[unscored] = 0.0
        local_feat = np.nan_to_num(lag1.local_autocorrelation(), nan=0.0)
        local_feat[unscored] = 0.0
    else:
        rho_feat = local_feat = None
    # a descriptor is frozen when none of its features can be scored and one is frozen
    # (a dihedral near 0 whose cosine barely moves still moves through its sine)
    all_unscored = np.ones(len(pool), dtype=bool)
    np.logical_and.at(all_unscored, pool.feature_descriptor, unscored)
    frozen_desc = {}
    for f in np.flatnonzero(frozen_feat):
        i = int(pool.feature_descriptor[f])
        if all_unscored[i]:
            frozen_desc.setdefault(i, sorted({source.states[s] for s in range(n_states)
                                              if variances[s, f] <= (FROZEN_RELATIVE_SPREAD
                                                                     * scale[f]) ** 2}))
    if frozen_desc:
        first = pool.descriptors[min(frozen_desc)]
        notes.append(f"frozen: {len(frozen_desc)} descriptor(s) do not move within some state "
                     f"(e.g. {first.label} in state {frozen_desc[min(frozen_desc)][0]!r}: "
                     "every frame has the same value), so they are neither scored nor "
                     "combined; check that those trajectories are real dynamics, not repeated "
                     "frames")
    low = np.min([d.minimum for d in diag], axis=0)
    high = np.max([d.maximum for d in diag], axis=0)

    n_desc = len(pool)
    fisher_desc = np.zeros(n_desc)
    np.maximum.at(fisher_desc, pool.feature_descriptor, fisher_feat)
    rho_desc = local_desc = None
    if rho_feat is not None:
        rho_desc = np.full(n_desc, -np.inf)
        np.maximum.at(rho_desc, pool.feature_descriptor, rho_feat)
        local_desc = np.full(n_desc, -np.inf)
        np.maximum.at(local_desc, pool.feature_descriptor, local_feat)
    for i in frozen_desc:  # not scored, whatever its other features say
        fisher_desc[i] = 0.0
        if rho_desc is not None:
            rho_desc[i] = local_desc[i] = -np.inf
    if objective == "separate":
        screen_score = fisher_desc
    elif objective == "slow":
        screen_score = np.clip(rho_desc, 0.0, None)
    else:
        screen_score = fisher_desc / (1.0 + fisher_desc) * np.clip(rho_desc, 0.0, None)
    order = sorted(range(n_desc), key=lambda i: (-fisher_desc[i], i))
    screen_order = sorted(range(n_desc), key=lambda i: (-screen_score[i], i))
    screened = [i for i in screen_order if screen_score[i] > 0][:screen_size]
    if not screened:
        if frozen_desc:
            raise InputError(
                f"every descriptor that differs between the states is frozen within some "
                f"state ({len(frozen_desc)} descriptors; e.g. "
                f"{pool.descriptors[min(frozen_desc)].label} does not move in state "
                f"{frozen_desc[min(frozen_desc)][0]!r}): a separation cannot be measured "
                "without fluctuations within the states; give trajectories of real dynamics "
                "(not one repeated frame) for every state")
        what = ("differs between the states (every Fisher ratio is 0)" if objective != "slow"
                else "is correlated in time at the lag (every autocorrelation is 0)")
        raise InputError(f"no descriptor {what}; check the trajectories and the lag")
    # screened features, grouped by descriptor in screening order
    scr_feat = np.concatenate([pool.features_of([i]) for i in screened])
    groups, pos = [], 0
    for i in screened:
        n = len(pool.descriptors[i].transforms)
        groups.append(np.arange(pos, pos + n))
        pos += n

    folds = _Folds(source, seg_counts, n_folds)
    notes.append(folds.describe())
    _note(progress, f"statistics pass ({len(screened)} descriptors screened)")

    # ---- pass 2: histograms of all features; fold moments, lagged fold moments and
    # multi-lag autocorrelations of the screened features
    hist = Histograms(low, high, n_states=n_states, n_bins=_N_BINS)
    fold_m = [[Moments(scr_feat.size) for _ in range(folds.n_folds)] for _ in range(n_states)]
    shift2 = center[scr_feat]
    lag2 = _Series(scr_feat.size, shift2, diagonal=False) if lag_frames is not None else None
    uniform_dt = len({round(v, 9) if v is not None else None for v in timesteps.values()}) == 1
    iat_lags = _iat_lags(seg_counts) if uniform_dt else None
    iat = [_Series(scr_feat.size, shift2, diagonal=True) for _ in iat_lags] \
        if iat_lags is not None else []
    if iat_lags is None:
        notes.append("integrated autocorrelation times not computed: the files' time steps "
                     "differ (or some are unknown)")
    folds.reset()
    for chunk in source.iter_chunks(atom_indices=atoms, chunk_size=chunk_size):
        x = pool.features(chunk.trajectory, atom_indices=atoms)
        hist.add(x, chunk.states)
        f = folds.of(chunk)
        xs = x[:, scr_feat]
        si = chunk.segment_index
        for s, rows in _runs(chunk):
            for k in np.unique(f[rows]):
                r = rows[f[rows] == k]
                fold_m[s][k] = fold_m[s][k].merge(Moments.from_data(xs[r]))
                if lag2 is not None:
                    lag2.feed((si, s, int(k)), chunk.frames[r], xs[r], lag_frames[si])
            for acc, L in zip(iat, iat_lags if iat else ()):
                acc.feed((si, s), chunk.frames[rows], xs[rows], int(L))
    for s in range(n_states):
        for k in range(folds.n_folds):
            if fold_m[s][k].count == 0:
                raise InputError(f"state {source.states[s]!r} has no frames in held-out fold "
                                 f"{k + 1} of {folds.n_folds}; give more frames or trajectories")
    overlap_feat = overlap_coefficient(hist.counts)
    overlap_desc = np.ones(n_desc)
    np.minimum.at(overlap_desc, pool.feature_descriptor, overlap_feat)
    fold_lag = None
    if lag2 is not None:
        fold_lag = [lag2.moments(lambda key, k=k: key[2] == k) for k in range(folds.n_folds)]
        if objective in ("slow", "both") and any(m.count == 0 for m in fold_lag):
            raise InputError(f"a held-out fold has no lagged pairs at lag {lag_ps:g} ps; "
                             "choose a shorter --lag or give longer runs")
    fm = FoldMoments(fold_m, priors, fold_lag).standardized(center[scr_feat], scale[scr_feat])

    # integrated autocorrelation time of the screened descriptors (ps, or frames)
    iat_desc = {}
    dt_unit = next(iter(timesteps.values()))
    if iat and dt_unit is not None:
        # within runs: each (file, state) series about its own mean
        rho_grid = np.array([a.local_autocorrelation() for a in iat])
        tau, decayed, window = integrated_time(iat_lags, rho_grid, dt_unit, return_window=True)
        tau_lo, tau_hi = integrated_time_interval(tau, window, int(seg_counts.sum()))
        for gi, i in enumerate(screened):
            j = int(groups[gi][np.argmax(tau[groups[gi]])])
            ci = [float(tau_lo[j]), float(tau_hi[j])] if decayed[j] else None
            iat_desc[i] = (float(tau[j]), bool(decayed[j]), ci)

    # ---- shortlist: one representative per group of redundant descriptors
    pooled = fm.pooled()
    within = np.tensordot(priors, np.array([m.covariance for m in pooled]), axes=1)
    dcorr = descriptor_correlation(within, groups)
    search = {"objective": objective, "method": method, "shrinkage": shrinkage}
    adds_nothing = _AddsNothing(fm, groups, search, min_gain)
    graph = redundancy_graph(dcorr, max_correlation, adds_nothing=adds_nothing)
    reps = representatives(graph, {g: -float(g) for g in range(len(screened))})
    notes_by_desc, stands_for = {}, {}
    for rep, others in reps:
        stands_for[screened[rep]] = [pool.descriptors[screened[o]].id for o in others]
        for o in others:
            notes_by_desc[screened[o]] = (
                f"represented by {pool.descriptors[screened[rep]].id} "
                f"(|r|={dcorr[rep, o]:.3f}; together they score no better than alone)")
    short = [rep for rep, _ in reps][:shortlist_size]
    n_red = sum(len(o) for _, o in reps)
    notes.append(f"redundancy: {n_red} of the {len(screened)} screened descriptors are "
                 f"represented by a better one (pooled within-state |r| > {max_correlation:g} "
                 "and the pair's held-out score not more than "
                 f"{min_gain:.0%} above the better one alone; {adds_nothing.kept} correlated "
                 "pairs kept apart because their combination scores higher); shortlist: "
                 f"{len(short)} representatives")
    _note(progress, f"searching combinations of up to {max_terms} of {len(short)} descriptors")

    sub_groups = [groups[g] for g in short]
    combos = greedy_search(fm, sub_groups, max_terms=max_terms, n_seeds=n_seeds,
                           min_gain=min_gain, **search)
    ranked = rank_combinations(combos, limit=n_suggestions)
    notes.append(_search_note(objective, method, shrinkage, len(combos), min(n_seeds, len(short)),
                              min_gain))

    # ---- final fits on all data, and per-fold directions
    fits = []
    for comb in ranked:
        gidx = [short[m] for m in comb.members]
        idx = np.concatenate([groups[g] for g in gidx])
        w = cv_direction(fm, idx, **search)
        mu = np.array([m.mean[idx] for m in pooled])
        if mu[-1] @ w < mu[0] @ w:
            w = -w
        if objective == "slow":
            w = kinetic_map_scale(w, fm.lagged_pooled(), idx)
        fold_w = []
        for k in range(fm.n_folds):
            wk = cv_direction(fm, idx, fold=k, **search)
            fold_w.append(wk if wk @ w >= 0 else -wk)
        fits.append((gidx, idx, w, fold_w))

    _note(progress, "held-out and bootstrap pass")
    short_desc = sorted({screened[g] for g in short})
    block_frames = _block_frames(seg_counts, [iat_desc.get(screened[g]) for g in short],
                                 timesteps, lag_frames)
    card = card_desc = None
    if n_bootstrap:
        card, card_desc, card_feat, card_note = _card_setup(
            pool, order, seg_counts, list(iat_desc.values()), timesteps, lag_frames, center,
            low, high, lag1)
        notes.append(card_note)
    pass3 = _pass3(source, pool, screened, scr_feat, center, scale, fits, fm, folds,
                   short_desc, block_frames, lag_frames,
                   card=None if card is None else (card, card_feat))
    heldout_overlap = pass3["overlap"]

    boot = card_ci = None
    if n_bootstrap:
        _note(progress, f"bootstrap ({n_bootstrap} replicates)")
        boot = _bootstrap(pass3, fits, short, groups, screened, scr_feat, pool, priors,
                          fm, search, max_terms, min_gain, n_seeds, n_bootstrap, seed,
                          lag_frames)
        if boot is None:
            notes.append(f"uncertainties: none (blocks of {pass3['block_desc']}: a state has "
                         "fewer than two, so a bootstrap would resample nothing); give more "
                         "or longer runs per state")
        else:
            notes.append(f"uncertainties: block bootstrap, {n_bootstrap} replicates (seed "
                         f"{seed}), blocks of {pass3['block_desc']} resampled within each "
                         "state; 95 % percentile intervals")
        if boot is not None and boot.get("selection_skipped"):
            notes.append(boot["selection_skipped"])
        card_ci = _card_intervals(card, card_desc, card_feat, pool, center, priors, unscored,
                                  n_bootstrap, seed)
        if card_ci is None:
            notes.append("score card: no bootstrap intervals (a state has fewer than two "
                         "blocks); give more or longer runs")

    # ---- outputs
    scorecard = []
    screened_set = set(screened)
    short_set = {screened[g] for g in short}
    for i in order:
        d = pool.descriptors[i]
        tau = iat_desc.get(i)
        row = {
            "id": d.id, "kind": d.kind, "label": d.label, "atoms": list(d.atoms),
            **({"groups": [list(g) for g in d.groups]} if d.groups else {}),
            "fisher_ratio": None if i in frozen_desc else float(fisher_desc[i]),
            "overlap": _finite(overlap_desc[i]),
            "autocorrelation": None if rho_desc is None else _finite(rho_desc[i]),
            "autocorrelation_within_runs": None if local_desc is None else _finite(local_desc[i]),
            "integrated_time": None if tau is None else tau[0],
            "integrated_time_decayed": None if tau is None else tau[1],
            "screened": i in screened_set, "shortlisted": i in short_set,
            "stands_for": stands_for.get(i, []),
            "note": (f"frozen: does not move within state(s) {', '.join(frozen_desc[i])}; "
                     "not scored" if i in frozen_desc else notes_by_desc.get(i, "")),
        }
        if tau is not None and tau[2] is not None:
            row["integrated_time_ci"] = tau[2]
        if card_ci is not None and i in card_ci and i not in frozen_desc:
            row.update(card_ci[i])
        scorecard.append(row)

    params = {"objective": objective, "method": method, "lag_ps": lag_ps,
              "selection": selection, "kinds": list(kinds), "cutoff_nm": _finite(cutoff),
              **({"coordination_r0_nm": float(coordination_r0)} if "coordination" in kinds
                 else {}),
              "prefilter_stride": prefilter_stride, "max_terms": max_terms,
              "screen_size": screen_size, "shortlist_size": shortlist_size,
              "max_correlation": max_correlation, "n_folds": folds.n_folds,
              "n_seeds": n_seeds, "min_gain": min_gain,
              "fold_mode": folds.mode, "shrinkage": shrinkage, "n_bootstrap": n_bootstrap,
              "temperature_k": temperature, "md_step_fs": md_step_fs}
    checksums = [{"file": Path(p).name, "sha256": file_sha256(p),
                  "states": next(i["states"] for i in inputs if i["path"] == str(p))}
                 for p in source.files()]
    ranking, specs = [], []
    for rank, (comb, fit, ov) in enumerate(zip(ranked, fits, heldout_overlap), 1):
        entry = _ranking_entry(rank, comb, fit, ov, pool, screened, groups, scr_feat, center,
                               scale, pooled, priors, fm, source, objective, method, lag_ps,
                               boot)
        ts = entry["timescale_ps"]
        entry["timescale_resolved"] = None if ts is None else bool(
            longest_run_ps is not None and ts < longest_run_ps)
        entry["longest_run_ps"] = longest_run_ps
        taus = [iat_desc[screened[g]] for g in fit[0] if screened[g] in iat_desc]
        # within-run decorrelation time of the CV, bounded by its slowest term
        slowest = max(taus, key=lambda t: t[0]) if taus else None
        entry["integrated_time_ps"] = None if slowest is None else slowest[0]
        entry["integrated_time_ci_ps"] = None if slowest is None else slowest[2]
        entry["hints"], refused = _hints_for(entry, temperature, md_step_fs)
        if refused:
            entry["hints_refused"] = refused
            notes.append(f"bias hints refused for {entry['spec']}: {refused}")
        ranking.append(entry)
        specs.append(_spec_dict(source, pool, entry["spec"], entry, params, checksums,
                                seed if n_bootstrap else None))
    return Suggestions(states=list(source.states), pool=pool, scorecard=scorecard,
                       ranking=ranking, specs=specs, notes=notes, inputs=inputs,
                       input_files=output_inputs(source), objective=objective, lag_ps=lag_ps)


class _AddsNothing:
    """``adds_nothing(i, j)``: do screened descriptors i and j together score no better
    (held-out, by the search's own objective) than the better of the two alone, by more
    than the search's `min_gain`? Counts the correlated pairs it keeps apart."""

    def __init__(self, fm, groups, search, min_gain):
        self.fm, self.groups, self.search, self.min_gain = fm, groups, search, min_gain
        self._single = {}
        self.kept = 0

    def _score(self, members):
        idx = np.concatenate([self.groups[m] for m in members])
        return heldout_score(self.fm, idx, **self.search)[0]

    def __call__(self, i, j):
        for g in (i, j):
            if g not in self._single:
                self._single[g] = self._score((g,))
        best = max(self._single[i], self._single[j])
        redundant = not self._score((i, j)) > best + self.min_gain * abs(best)
        self.kept += not redundant
        return redundant


def kinetic_map_scale(w, lagged, idx):
    """Scale a slow direction to kinetic-map units (Noé and Clementi, J. Chem. Theory
    Comput. 2015): the CV's variance becomes ``lambda^2``, its autocorrelation at the lag
    squared, so distances along slow CVs of different runs or suggestions compare in
    kinetic terms. A direction with ``lambda <= 0`` is scaled to unit variance."""
    sub = lagged.subset(np.asarray(idx, dtype=np.intp))
    _, c0, ct = sub.covariances(reversible=True)
    var = float(w @ c0 @ w)
    if not var > 0:
        return w
    lam = float(w @ ct @ w) / var
    return w * (lam if lam > 0 else 1.0) / math.sqrt(var)


def _hints_for(entry, temperature, md_step_fs):
    """(bias-parameter hints, None) for a ranked CV, or (None, why they were refused)."""
    from ..bias.hints import suggest_hints

    try:
        return suggest_hints(entry["states"], temperature=temperature, md_step_fs=md_step_fs,
                             autocorrelation_time_ps=entry.get("integrated_time_ps"),
                             leave_out_frozen=True), None
    except ValueError as exc:
        return None, str(exc)


def _longest_run_text(seg_counts, timesteps):
    """'the longest run is N frames (T ps)': the longest series of one state in one file."""
    si, s = np.unravel_index(int(np.argmax(seg_counts)), seg_counts.shape)
    n = int(seg_counts[si, s])
    dt = timesteps.get(int(si))
    return f"the longest run is {n} frames" + ("" if dt is None else f" ({n * dt:g} ps)")


def _check_uniform_time(source, si, chunk, dt, last):
    """Refuse a file whose frames are not evenly spaced in time (when it stores times)."""
    path = source.segments[si].path
    if dt is None or not stores_time(path) or source.stored_times_ignored(si):
        return  # no times, or stored times replaced by the given frame spacing
    t = np.asarray(chunk.trajectory.time, dtype=np.float64)
    f = np.asarray(chunk.frames, dtype=np.float64)
    if si in last:
        t = np.concatenate([[last[si][0]], t])
        f = np.concatenate([[last[si][1]], f])
    last[si] = (t[-1], f[-1])
    if t.size < 2:
        return
    expected = np.diff(f) * dt
    # times are single precision: allow their rounding, and 0.1 % of a step
    tol = np.maximum(1e-3 * dt, 4 * np.abs(t[1:]) * 2.0**-23)
    bad = np.flatnonzero(np.abs(np.diff(t) - expected) > tol)
    if bad.size:
        i = int(bad[0])
        raise InputError(
            f"trajectory {str(path)!r} is not evenly spaced in time: frame {int(f[i + 1])} is at "
            f"{t[i + 1]:g} ps, but the first time step ({dt:g} ps) puts it at "
            f"{t[i] + expected[i]:g} ps; lags in ps need evenly spaced frames, so split the "
            "file where the spacing changes")


def _search_note(objective, method, shrinkage, n_combos, n_seeds, min_gain):
    what = {"separate": "held-out Fisher ratio of the discriminant direction",
            "slow": "held-out VAMP-2 of the slowest singular function (squared correlation "
                    "across the lag)",
            "both": "held-out J/(1+J) times the held-out autocorrelation at the lag"}[objective]
    disc = ("; the CV is the slowest TICA direction (reversible estimate) in kinetic-map "
            "scaling" if objective == "slow" else
            f"; {method.upper()} with shrinkage {shrinkage:g}, equal state weights")
    return (f"search ({objective}): {n_combos} combinations from greedy forward searches "
            f"started at the {n_seeds} best single descriptors, scored by {what}; a term is "
            f"added only if it raises the score by more than {min_gain:.0%}; ranked with the "
            f"one-standard-error rule{disc}")


def _box_notes(pool, diag, min_box):
    if min_box is None:
        return ["no periodic box: distances are plain Euclidean"]
    out = [f"periodic box: distances use the minimum image (smallest box height "
           f"{min_box:.3g} nm)"]
    is_dist = np.array([pool.descriptors[i].kind in ("distance", "center_distance")
                        for i in pool.feature_descriptor], dtype=bool)
    if is_dist.any():
        longest = float(np.max([d.maximum[is_dist].max() for d in diag]))
        if longest > 0.5 * min_box:
            out.append(f"warning: some distances reach {longest:.3g} nm, more than half the "
                       f"smallest box height ({min_box:.3g} nm), where the minimum image folds "
                       "them back; lower --cutoff or check the box")
    return out


def _block_frames(seg_counts, taus, timesteps, lag_frames):
    """Bootstrap block length in frames, or None for whole runs.

    At least twice the longest integrated autocorrelation time of `taus`
    (``(time, decayed, ...)`` or None each) and two lags; whole runs when that
    exceeds half the shortest run, when some motion did not decorrelate within
    the runs, or when no time is known.
    """
    dt = next(iter(timesteps.values())) or 1.0
    known = [t for t in taus if t is not None]
    if not known or any(not decayed for _, decayed, *_ in known):
        return None
    longest = max(t for t, *_ in known)
    b = max(1, int(math.ceil(2.0 * longest / dt)))
    if lag_frames:
        b = max(b, 2 * max(lag_frames.values()))
    shortest = int(seg_counts[seg_counts > 0].min())
    if b > shortest // 2:
        return None
    return b


def _box_heights(vectors):
    """Perpendicular heights (nm) of boxes given as row vectors, shape (n, 3)."""
    v = np.asarray(vectors, dtype=np.float64)
    vol = np.abs(np.linalg.det(v))
    out = np.empty(v.shape[:2])
    for i, (j, k) in enumerate(((1, 2), (2, 0), (0, 1))):
        out[:, i] = vol / np.linalg.norm(np.cross(v[:, j], v[:, k]), axis=1)
    return out


def _chunk_frames(source, n_features, budget=2_000_000):
    """Frames per chunk so that a chunk's feature matrix stays near `budget` numbers."""
    return int(min(source.chunk_size, max(8, budget // max(1, n_features))))


def _finite(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _validate_options(**kw):
    ints = {"max_terms": 1, "n_suggestions": 1, "screen_size": 1, "shortlist_size": 1,
            "n_folds": 2, "n_seeds": 1, "prefilter_stride": 1, "n_bootstrap": 0, "seed": 0}
    for name, lo in ints.items():
        v = kw[name]
        if not isinstance(v, (int, np.integer)) or v < lo:
            raise InputError(f"{name}={v!r} must be an integer of at least {lo}")
    if not 0 < kw["max_correlation"] <= 1:
        raise InputError(f"max_correlation={kw['max_correlation']!r} must be in (0, 1]")
    if not kw["min_gain"] >= 0:
        raise InputError(f"min_gain={kw['min_gain']!r} must be non-negative")
    if not 0 <= kw["shrinkage"] <= 1:
        raise InputError(f"shrinkage={kw['shrinkage']!r} must be in [0, 1]")


def _describe_inputs(source, seg_counts, timesteps):
    out = {}
    for si, seg in enumerate(source.segments):
        key = str(seg.path)
        row = out.setdefault(key, {"path": key, "file": seg.path.name, "states": [],
                                   "frames": 0, "frame_step_ps": timesteps.get(si)})
        for s in np.flatnonzero(seg_counts[si]):
            if source.states[s] not in row["states"]:
                row["states"].append(source.states[s])
        row["frames"] += int(seg_counts[si].sum())
        if row["frame_step_ps"] is None:
            row["frame_step_ps"] = timesteps.get(si)
    return list(out.values())


def _topology_provenance(source):
    if source.topology_path is None:
        return {"file": None, "sha256": None}
    return {"file": Path(source.topology_path).name, "sha256": file_sha256(source.topology_path)}


def _segments_provenance(source):
    """Which frames of which file were given to which state."""
    out = []
    for seg in source.segments:
        row = {"file": seg.path.name}
        if seg.labels is None:
            row.update({"state": seg.state, "start": seg.start, "stop": seg.stop})
        else:
            labels = [x for x in seg.labels]
            counts = {}
            for x in labels:
                if x is not None:
                    counts[x] = counts.get(x, 0) + 1
            row.update({"labels": {"n_frames": len(labels), "frames_per_state": counts,
                                   "sha256": _labels_sha256(labels)}})
        out.append(row)
    return out


def _labels_sha256(labels):
    import hashlib

    text = "\n".join("" if x is None else str(x) for x in labels)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _spec_dict(source, pool, name, entry, params, checksums, seed):
    from ..spec import atom_identity, residue_hashes, topology_fingerprint

    top = source.topology
    by_id = {d.id: d for d in pool.descriptors}
    seen, descriptors = set(), []
    for t in entry["terms"]:
        if t["descriptor"] in seen:
            continue
        seen.add(t["descriptor"])
        d = by_id[t["descriptor"]]
        doc = {"id": d.id, "kind": d.kind, "label": d.label, "periodic": d.periodic}
        if d.kind in GROUP_KINDS:
            doc["groups"] = [list(g) for g in d.groups]
            doc["atom_identities"] = [[atom_identity(top, a) for a in g] for g in d.groups]
            if d.kind == "center_distance":
                doc["weighting"] = pool.weighting(d)
                if doc["weighting"] == "mass":
                    doc["masses"] = [pool.group_masses(g) for g in d.groups]
            else:
                n, m = COORDINATION_EXPONENTS
                doc.update(r0=d.r0, n=n, m=m)
        else:
            doc["atoms"] = list(d.atoms)
            doc["atom_identities"] = [atom_identity(top, a) for a in d.atoms]
        descriptors.append(doc)
    terms = [{"descriptor": t["descriptor"], "transform": t["transform"], "center": t["center"],
              "scale": t["scale"], "weight": t["weight"]} for t in entry["terms"]]
    scores = {"rank": entry["rank"]}
    for key in ("heldout_score", "heldout_score_se", "heldout_fisher_ratio",
                "heldout_fisher_ratio_se", "heldout_overlap", "fisher_ratio_all",
                "heldout_autocorrelation", "autocorrelation_all", "timescale_ps", "lag_ps",
                "integrated_time_ps"):
        if entry.get(key) is not None:
            scores[key] = entry[key]
    return {
        "format": "cvdesign-spec", "version": 1, "name": name[:-5],
        "units": {"length": "nm", "angle": "rad", "time": "ps", "energy": "kJ/mol"},
        "topology": {"n_atoms": top.n_atoms, "fingerprint": topology_fingerprint(top),
                     "residues": residue_hashes(top)},
        "descriptors": descriptors, "terms": terms, "offset": 0.0, "periodic": False,
        "states": entry["states"], "scores": scores,
        **({"hints": entry["hints"]} if entry.get("hints") else
           {"hints": {"hints_refused": entry["hints_refused"]}} if entry.get("hints_refused")
           else {}),
        "provenance": {"cvdesign_version": __version__,
                       "method": f"{entry['method']} ({entry['objective']})",
                       "inputs": [{"file": c["file"], "sha256": c["sha256"],
                                   "state": ",".join(c["states"]) or None} for c in checksums],
                       "seed": seed, "parameters": params,
                       "topology": _topology_provenance(source),
                       "segments": _segments_provenance(source)},
        "caution": " ".join([CAUTION] + [f"Warning: {w}." for w in entry.get("warnings", [])]),
    }


def _card_setup(pool, order, seg_counts, taus, timesteps, lag_frames, center, low, high,
                lag1):
    """Block sums for the score card's intervals: which descriptors, what blocks."""
    bf = _block_frames(seg_counts, taus, timesteps, lag_frames)
    has_lag = lag1 is not None
    bf, kept = plan_card_blocks(seg_counts, bf, pool.n_features, n_bins=_N_BINS,
                                has_lag=has_lag)
    card_desc, n = [], 0
    for i in order:  # best separating first
        k = len(pool.descriptors[i].transforms)
        if n + k > kept:
            break
        card_desc.append(i)
        n += k
    card_feat = (np.concatenate([pool.features_of([i]) for i in card_desc]) if card_desc
                 else np.zeros(0, dtype=np.intp))
    means = None
    if has_lag:
        means = {key: m[card_feat] for key, m in lag1.run_means().items()}
    card = CardBlocks(center[card_feat], low[card_feat], high[card_feat], _N_BINS, bf,
                      lag_frames if has_lag else None, means)
    what = ("every descriptor" if len(card_desc) == len(pool)
            else f"the best {len(card_desc)} of {len(pool)} descriptors (memory budget)")
    blocks = f"blocks of {bf} frames" if bf else "whole runs as blocks"
    note = (f"score card: 95 % block-bootstrap intervals for {what}, {blocks} of each run "
            "resampled within each state (lagged pairs in the block of their first frame); "
            "integrated times: asymptotic 95 % intervals (Madras and Sokal 1988), since "
            "their window is longer than a block")
    return card, card_desc, card_feat, note


def _card_intervals(card, card_desc, card_feat, pool, center, priors, constant, n_boot, seed):
    """Score-card intervals by descriptor id: {index: {column_ci: [low, high]}}."""
    if not card_desc:
        return None
    local = {i: j for j, i in enumerate(card_desc)}
    feature_descriptor = np.array([local[int(pool.feature_descriptor[f])] for f in card_feat],
                                  dtype=np.intp)
    res = card_intervals(card, center[card_feat], priors, constant[card_feat],
                         feature_descriptor, len(card_desc), n_boot=n_boot, seed=seed + 2)
    if res is None:
        return None
    out = {}
    for j, i in enumerate(card_desc):
        out[i] = {f"{name}_ci": [_finite(lo[j]), _finite(hi[j])]
                  for name, (_, lo, hi) in res.items()}
    return out


def _pass3(source, pool, screened, scr_feat, center, scale, fits, fm, folds, short_desc,
           block_frames, lag_frames, card=None):
    """Held-out CV histograms of the ranked combinations, and per-block statistics of the
    shortlisted features and CV histograms (for the bootstrap), in one pass over the data.

    With ``card=(CardBlocks, pool feature indices)`` the pass also computes every
    feature of the pool and feeds the score card's block sums."""
    n_states, n_folds = source.n_states, folds.n_folds
    # all shortlisted features, as screened-local indices (columns of the fold moments)
    short_set = set(short_desc)
    local, pos = [], 0
    for i in screened:
        n = len(pool.descriptors[i].transforms)
        if i in short_set:
            local.extend(range(pos, pos + n))
        pos += n
    local = np.array(local, dtype=np.intp)
    if card is None:
        sub = pool.subset(short_desc)
        # pool feature index -> column of the subset pool's features
        col_of = {}
        for j, i in enumerate(short_desc):
            for fs, fp in zip(sub.features_of([j]), pool.features_of([i])):
                col_of[int(fp)] = int(fs)
        cols = np.array([col_of[int(scr_feat[i])] for i in local], dtype=np.intp)
    else:
        sub = pool
        cols = scr_feat[local]
    sub_atoms = sub.atom_indices()
    c, sc = center[scr_feat[local]], scale[scr_feat[local]]
    where = {int(i): p for p, i in enumerate(local)}
    plans = []
    for gidx, idx, w, fold_w in fits:
        p_idx = np.array([where[int(i)] for i in idx], dtype=np.intp)
        ranges = []
        for k in range(n_folds):
            test = fm.test(k)
            mu = np.array([m.mean[idx] @ fold_w[k] for m in test])
            sd = np.array([math.sqrt(max(fold_w[k] @ m.covariance[np.ix_(idx, idx)] @ fold_w[k],
                                         0.0)) for m in test])
            lo, hi = float(np.min(mu - 5 * sd)), float(np.max(mu + 5 * sd))
            if not hi > lo:
                lo, hi = lo - 1.0, hi + 1.0
            ranges.append((lo, hi))
        plans.append((p_idx, fold_w, ranges))

    def cv_hist(zr, k):
        """Histogram of each ranked CV (fold k's direction) over rows zr: (n_combos, bins)."""
        h = np.zeros((len(plans), _N_BINS))
        for ci, (p_idx, fold_w, ranges) in enumerate(plans):
            lo, hi = ranges[k]
            v = zr[:, p_idx] @ fold_w[k]
            b = np.clip(np.floor((v - lo) / (hi - lo) * _N_BINS).astype(np.intp), 0,
                        _N_BINS - 1)
            h[ci] = np.bincount(b, minlength=_N_BINS)
        return h

    block_m, block_h = {}, {}
    lagged = _Series(local.size, np.zeros(local.size), diagonal=False) if lag_frames else None
    seen = {}
    folds.reset()
    for chunk in source.iter_chunks(atom_indices=sub_atoms,
                                    chunk_size=_chunk_frames(source, sub.n_features)):
        x = sub.features(chunk.trajectory, atom_indices=sub_atoms)
        z = (x[:, cols] - c) / sc
        f = folds.of(chunk)
        si = chunk.segment_index
        for s, rows in _runs(chunk):
            if card is not None:
                card[0].add(si, s, chunk.frames[rows], x[rows][:, card[1]])
            for k in np.unique(f[rows]):
                r = rows[f[rows] == k]
                key3 = (si, s, int(k))
                rank = seen.get(key3, 0) + np.arange(r.size)
                seen[key3] = seen.get(key3, 0) + r.size
                blk = rank // block_frames if block_frames else np.zeros(r.size, dtype=np.intp)
                for bi in np.unique(blk):
                    rr = r[blk == bi]
                    key = (s, int(k), si, int(bi))
                    m = Moments.from_data(z[rr])
                    block_m[key] = m if key not in block_m else block_m[key].merge(m)
                    h = cv_hist(z[rr], int(k))
                    block_h[key] = h if key not in block_h else block_h[key] + h
                    if lagged is not None:
                        lagged.feed(key, chunk.frames[rr], z[rr], lag_frames[si])
    blocks = {}
    for key in sorted(block_m):
        lm = lagged.moments_of(key) if lagged is not None else None
        blocks.setdefault(key[:2], []).append((block_m[key], lm, ArraySum(h=block_h[key])))
    counts = np.zeros((n_folds, n_states, len(fits), _N_BINS))
    for (s, k), blist in blocks.items():
        for b in blist:
            counts[k, s] += b[2]["h"]
    overlap = [float(v) for v in _heldout_overlap(counts)] if fits else []
    n_blocks = sum(len(v) for v in blocks.values())
    desc = (f"{block_frames} frames" if block_frames else
            "whole runs (or their pieces in each fold)") + f" ({n_blocks} blocks)"
    return {"overlap": overlap, "blocks": blocks, "where": where,
            "block_desc": desc}


def _mean_finite(values):
    """Mean of the finite values (NaN when there are none: not measured)."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    return float(v.mean()) if v.size else float("nan")


def _heldout_overlap(counts):
    """Mean over folds of the states' overlap along each CV; counts (fold, state, cv, bin)."""
    return np.mean([overlap_coefficient(counts[k]) for k in range(counts.shape[0])], axis=0)


def _bootstrap(pass3, fits, short, groups, screened, scr_feat, pool, priors, fm, search,
               max_terms, min_gain, n_seeds, n_bootstrap, seed, lag_frames):
    """Confidence intervals of weights and scores, and how often terms are selected."""
    blocks, where = pass3["blocks"], pass3["where"]
    n_states, n_folds = fm.n_states, fm.n_folds
    per_state = [[b for k in range(n_folds) for b in blocks.get((s, k), [])]
                 for s in range(n_states)]
    if any(len(g) < 2 for g in per_state):
        return None
    has_lag = lag_frames is not None
    p_fits = [(np.array([where[int(i)] for i in idx], dtype=np.intp), w) for _, idx, w, _ in fits]
    fold_ws = [fold_w for *_, fold_w in fits]
    short_groups = [np.array([where[int(i)] for i in groups[g]], dtype=np.intp) for g in short]

    def stat(merged):
        states = [m[0] for m in merged]
        lag = merge_all([m[1] for m in merged]) if has_lag else None
        out = []
        for p_idx, w_ref in p_fits:
            if search["objective"] == "slow":
                w = slow_direction(lag, p_idx)[0]
            else:
                w = fit_direction(states, p_idx, priors, search["shrinkage"],
                                  method=search["method"])
            if w @ w_ref < 0:
                w = -w
            if search["objective"] == "slow":
                w = kinetic_map_scale(w, lag, p_idx)
            means, covs = state_arrays(states, p_idx)
            out.extend(w.tolist())
            out.append(rayleigh_quotient(w, means, covs, priors))
            out.append(autocorrelation_along(w, lag, p_idx) if has_lag else np.nan)
        return np.array(out)

    res = block_bootstrap(per_state, stat, n_boot=n_bootstrap, seed=seed)
    out = {"combos": []}
    pos = 0
    for p_idx, _ in p_fits:
        n = p_idx.size
        out["combos"].append({
            "weights_ci": [[_finite(a), _finite(b)] for a, b in
                           zip(res.low[pos:pos + n], res.high[pos:pos + n])],
            "fisher_ratio_ci": [_finite(res.low[pos + n]), _finite(res.high[pos + n])],
            "autocorrelation_ci": ([_finite(res.low[pos + n + 1]),
                                    _finite(res.high[pos + n + 1])] if has_lag else None),
        })
        pos += n + 2
    # How often each term of each ranked CV is kept when the whole search is rerun on a
    # bootstrap resample of the folds: in each refit, the CV's counterpart is the refit's
    # ranked combination sharing the most descriptors with it (ties: the better ranked),
    # and a term counts as selected when the counterpart holds it. The refits run the
    # main search (same seeds, objective and rule) over the terms of the ranked
    # combinations and the best SELECTION_POOL representatives, which bounds the cost.
    per_fold = [blocks.get((s, k), []) for s in range(n_states) for k in range(n_folds)]
    # blocks are resampled within each state and fold: a state and fold with a single
    # block would give every refit the same data (selection 100 %, intervals of zero
    # width), so the refits need at least two blocks in each
    if any(len(g) < 2 for g in per_fold):
        out["selection_skipped"] = (
            "no selection frequencies and no intervals for the held-out scores: some state "
            "has a single bootstrap block in a held-out fold (runs too short for the "
            f"blocks of {pass3['block_desc']}), so refits of the search on resampled folds "
            "would all see the same data; give more or longer runs per state")
    else:
        in_ranked = {short.index(g) for gidx, *_ in fits for g in gidx}
        cand = sorted(in_ranked | set(range(min(SELECTION_POOL, len(short)))))
        cand_groups = [short_groups[j] for j in cand]
        cpos = {j: c for c, j in enumerate(cand)}
        ranked_sets = [[cpos[short.index(g)] for g in gidx] for gidx, *_ in fits]
        n_terms_all = sum(len(m) for m in ranked_sets)

        def select(merged):
            grid = [[merged[s * n_folds + k][0] for k in range(n_folds)] for s in range(n_states)]
            lag = ([merge_all([merged[s * n_folds + k][1] for s in range(n_states)])
                    for k in range(n_folds)] if has_lag else None)
            boot_fm = FoldMoments(grid, priors, lag)
            combos = greedy_search(boot_fm, cand_groups, max_terms=max_terms, n_seeds=n_seeds,
                                   min_gain=min_gain, **search)
            refit = [frozenset(c.members) for c in rank_combinations(combos, limit=len(fits))]
            hit = np.zeros(n_terms_all + len(fits))
            pos = 0
            for ci, members in enumerate(ranked_sets):
                mine = frozenset(members)
                twin = max(refit, key=lambda r: (len(r & mine), -refit.index(r)))
                hit[pos:pos + len(members)] = [m in twin for m in members]
                hit[n_terms_all + ci] = twin == mine
                pos += len(members)
            # held-out scores of the ranked combinations on the resampled folds (refitted),
            # and their held-out overlap and autocorrelation along the fold directions
            held = []
            counts = np.array([[merged[s * n_folds + k][2]["h"] for s in range(n_states)]
                               for k in range(n_folds)])
            overlap = _heldout_overlap(counts)
            for ci, (p_idx, _) in enumerate(p_fits):
                held.append(heldout_score(boot_fm, p_idx, **search)[0])
                held.append(heldout_score(boot_fm, p_idx, objective="separate",
                                          method=search["method"],
                                          shrinkage=search["shrinkage"])[0])
                held.append(overlap[ci])
                held.append(_mean_finite([autocorrelation_along(fold_ws[ci][k], lag[k], p_idx)
                                          for k in range(n_folds)]) if has_lag else np.nan)
            return np.concatenate([hit, held])

        n_sel = min(n_bootstrap, SELECTION_REPLICATES)
        n_hit = n_terms_all + len(fits)
        sel = block_bootstrap(per_fold, select, n_boot=n_sel, seed=seed + 1)
        ok = np.isfinite(sel.replicates[:, :n_hit]).all(axis=1)
        freq = sel.replicates[ok, :n_hit].mean(axis=0) if ok.any() else np.full(n_hit, np.nan)
        low, high = percentile_interval(sel.replicates[ok, n_hit:])
        pos = 0
        for i, c in enumerate(out["combos"]):
            for j, key in enumerate(("heldout_score_ci", "heldout_fisher_ratio_ci",
                                     "heldout_overlap_ci", "heldout_autocorrelation_ci")):
                c[key] = [_finite(low[4 * i + j]), _finite(high[4 * i + j])]
            if not has_lag:
                c["heldout_autocorrelation_ci"] = None
            n = len(ranked_sets[i])
            c["selection"] = [_finite(v) for v in freq[pos:pos + n]]
            c["reproduced"] = _finite(freq[n_terms_all + i])
            pos += n
        out["n_selection"] = int(ok.sum())
    return out


#: A CV whose Fisher ratio exceeds this barely moves within the states: its within-state
#: spread is below 1/2000 of the distance between two state means.
NEAR_FROZEN_FISHER = 1e6


def _rigid_cv_warnings(state_stats, j_all, heldout):
    """Warnings for a CV that is (nearly) constant within the states."""
    if not (j_all > NEAR_FROZEN_FISHER or np.max(heldout) > NEAR_FROZEN_FISHER):
        return []
    narrow = min(state_stats, key=lambda k: state_stats[k]["std"])
    return [f"the CV barely moves within the states (Fisher ratio {j_all:.3g}; spread in "
            f"state {narrow!r} {state_stats[narrow]['std']:.3g} CV units): its descriptors "
            "are (nearly) rigidly tied within each state, which points at repeated or "
            "constrained frames, and a bias along it would need kernels narrower than the "
            "data resolve; check the runs before using it"]


def _ranking_entry(rank, comb, fit, overlap, pool, screened, groups, scr_feat, center, scale,
                   pooled, priors, fm, source, objective, method, lag_ps, boot):
    gidx, idx, w, fold_w = fit
    # held-out separation (arithmetic Fisher ratio) and autocorrelation of the fold directions
    sep, rho = [], []
    for k in range(fm.n_folds):
        means, covs = state_arrays(fm.test(k), idx)
        sep.append(min(rayleigh_quotient(fold_w[k], means, covs, priors), 1e12))
        if fm.lagged is not None:
            rho.append(autocorrelation_along(fold_w[k], fm.lagged_test(k), idx))
    sep = np.array(sep)
    mu, cov = state_arrays(pooled, idx)
    j_all = rayleigh_quotient(w, mu, cov, priors)
    rho_all = timescale = None
    if fm.lagged is not None:
        rho_all = autocorrelation_along(w, fm.lagged_pooled(), idx)
        timescale = float(timescales_from_eigenvalues([rho_all], lag_ps)[0])
    terms, local = [], 0
    ci = boot["combos"][rank - 1] if boot is not None else None
    sel = ci.get("selection") if ci is not None else None
    for g in gidx:
        desc = pool.descriptors[screened[g]]
        for t, fi in zip(desc.transforms, groups[g]):
            gf = scr_feat[fi]
            term = {"descriptor": desc.id, "label": desc.label, "kind": desc.kind,
                    "atoms": list(desc.atoms), "transform": t,
                    "center": float(center[gf]), "scale": float(scale[gf]),
                    "weight": float(w[local])}
            if ci is not None:
                term["weight_ci"] = ci["weights_ci"][local]
            if sel is not None:
                term["selection_frequency"] = sel[gidx.index(g)]
            terms.append(term)
            local += 1
    state_stats = {}
    for s, m in enumerate(pooled):
        var = float(w @ m.covariance[np.ix_(idx, idx)] @ w)
        state_stats[source.states[s]] = {"mean": float(m.mean[idx] @ w),
                                         "std": math.sqrt(max(var, 0.0)),
                                         "n_frames": int(round(m.count))}
    se = float(sep.std(ddof=1) / math.sqrt(len(sep))) if len(sep) > 1 else 0.0
    entry = {
        "rank": rank, "spec": f"cv-{rank:02d}.json", "n_terms": comb.n_terms,
        "objective": objective, "method": "tica" if objective == "slow" else method,
        "heldout_score": comb.score, "heldout_score_se": comb.se,
        "heldout_score_folds": [float(v) for v in comb.fold_scores],
        "heldout_fisher_ratio": float(sep.mean()), "heldout_fisher_ratio_se": se,
        "heldout_overlap": _finite(overlap), "fisher_ratio_all": _finite(j_all),
        "lag_ps": lag_ps,
        "heldout_autocorrelation": _finite(_mean_finite(rho)) if rho else None,
        "autocorrelation_all": _finite(rho_all) if rho_all is not None else None,
        "timescale_ps": _finite(timescale) if timescale is not None else None,
        "states": state_stats, "terms": terms,
        "warnings": _rigid_cv_warnings(state_stats, j_all, sep),
    }
    if ci is not None:
        entry["fisher_ratio_ci"] = ci["fisher_ratio_ci"]
        entry["autocorrelation_ci"] = ci["autocorrelation_ci"]
        entry["bootstrap_refits_for_selection"] = boot.get("n_selection")
        entry["reproduced_in_refits"] = ci.get("reproduced")
        for key in ("heldout_score_ci", "heldout_fisher_ratio_ci", "heldout_overlap_ci",
                    "heldout_autocorrelation_ci"):
            if ci.get(key) is not None:
                entry[key] = ci[key]
        aci = ci.get("autocorrelation_ci")
        if aci and lag_ps and None not in aci:
            # the implied timescale is monotonic in the autocorrelation
            entry["timescale_ci_ps"] = [
                _finite(v) for v in timescales_from_eigenvalues(np.clip(aci, -1.0, 1.0), lag_ps)]
    return entry
