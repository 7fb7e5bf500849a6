"""What :func:`~cvdesign.pipeline.suggest.suggest` returns and writes.

:class:`Suggestions` holds the ranking, the score card, the spec documents and
the notes of a run, renders them (CSV, JSON, markdown, a plain-text table) and
writes an output directory all or nothing. Floats are rounded to 12
significant digits in JSON, so files are stable against the last bits of
summation order.
"""

import csv
import io
import json
import math
import re
from dataclasses import dataclass, field

from .._version import __version__
from ..io.atomic import prepare_output_dir, write_dir_atomically

__all__ = ["Suggestions", "CAUTION", "is_output_file", "output_inputs", "dumps"]

#: Printed with, and stored in, every output that guides a simulation.
CAUTION = (
    "These CVs and numbers are starting points to validate, not guarantees: check "
    "that the CV separates your states in your own data, and that a biased run "
    "along it behaves, before relying on it."
)

_OUTPUT_NAME = re.compile(r"(ranking\.csv|ranking\.json|scorecard\.csv|summary\.md|"
                          r"states\.csv|cv-\d+\.json|report\.html|report-data\.json)")


def is_output_file(name):
    """Whether `name` is a file :meth:`Suggestions.write` writes (``--force`` replaces
    only a directory holding nothing else).

    Examples
    --------
    >>> is_output_file("cv-01.json"), is_output_file("notes.txt")
    (True, False)
    """
    return _OUTPUT_NAME.fullmatch(name) is not None


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
        return dumps({"format": "cvdesign-ranking", "version": 1, "states": self.states,
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
            files[r["spec"]] = dumps(spec)
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


def dumps(obj):
    """JSON text of `obj`: sorted keys, floats rounded to 12 significant digits, no NaN."""
    return json.dumps(_rounded(obj), indent=2, sort_keys=True, allow_nan=False) + "\n"


def output_inputs(source):
    """Every file a source reads (topology and trajectories)."""
    files = [str(p) for p in source.files()]
    if source.topology_path:
        files.append(source.topology_path)
    return files
