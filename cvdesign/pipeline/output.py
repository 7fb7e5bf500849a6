"""What :func:`~cvdesign.pipeline.suggest.suggest` returns and writes.

:class:`Suggestions` holds the ranking, the score card, the spec documents and
the notes of a run, renders them (CSV, JSON, markdown, a plain-text table; in a
notebook a short text and an HTML table; pandas DataFrames with the CSV files'
columns) and writes an output directory all or nothing. Floats are rounded to 12
significant digits in JSON, so files are stable against the last bits of
summation order.
"""

import csv
import html
import io
import json
import math
import re
from dataclasses import dataclass, field
from typing import NamedTuple

from .._version import __version__
from ..io.atomic import prepare_output_dir, write_dir_atomically
from ..spec.ranges import FOLD_SPREADS

__all__ = ["Suggestions", "SuggestionFrames", "CAUTION", "is_output_file", "output_inputs",
           "dumps", "run_file_names"]

#: Printed with, and stored in, every output that guides a simulation.
CAUTION = (
    "These CVs and numbers are starting points to validate, not guarantees: check "
    "that the CV separates your states in your own data, and that a biased run "
    "along it behaves, before relying on it."
)

_OUTPUT_NAME = re.compile(r"(ranking\.csv|ranking\.json|scorecard\.csv|summary\.md|"
                          r"states\.csv|cv-\d+\.json|report\.html|report-data\.json)")


def run_file_names(paths):
    """How the outputs name run files: the file name when no two runs share it, else every
    run by its full path (``states.csv``, the representative frames, ``tica.files``, the
    report data's traces, the ``file`` column of ``cvdesign apply``).

    Parameters
    ----------
    paths : iterable of str or os.PathLike
        The run files (a path given twice is one run).

    Returns
    -------
    dict of str to str
        Each distinct path (as ``str``) to its name in the outputs.

    Examples
    --------
    >>> run_file_names(["x/run1.xtc", "x/run2.xtc"])
    {'x/run1.xtc': 'run1.xtc', 'x/run2.xtc': 'run2.xtc'}
    >>> run_file_names(["dup/a/run.xtc", "dup/b/run.xtc"])
    {'dup/a/run.xtc': 'dup/a/run.xtc', 'dup/b/run.xtc': 'dup/b/run.xtc'}
    """
    paths = list(dict.fromkeys(str(p) for p in paths))
    names = [p.replace("\\", "/").rsplit("/", 1)[-1] for p in paths]
    unique = len(set(names)) == len(names)
    return {p: (name if unique else p) for p, name in zip(paths, names)}


def is_output_file(name):
    """Whether `name` is a file :meth:`Suggestions.write` writes (``--force`` replaces
    only a directory holding nothing else).

    Examples
    --------
    >>> is_output_file("cv-01.json"), is_output_file("notes.txt")
    (True, False)
    """
    return _OUTPUT_NAME.fullmatch(name) is not None


class SuggestionFrames(NamedTuple):
    """The tables of a :class:`Suggestions` as pandas DataFrames (:meth:`Suggestions.to_frames`).

    Attributes
    ----------
    ranking : pandas.DataFrame
        One row per ranked CV, best first: the columns of ``ranking.csv``.
    scorecard : pandas.DataFrame
        One row per descriptor of the score card, best separating first: the
        columns of ``scorecard.csv``.
    terms : pandas.DataFrame
        One row per term of each ranked CV (the per-term cells of ``ranking.csv`` as
        numbers): ``rank``, ``spec``, ``term`` (1, 2, ... within the CV),
        ``descriptor``, ``label``, ``kind``, ``transform``, ``weight``,
        ``weight_ci_low``, ``weight_ci_high``, ``selection_frequency``, ``center``
        and ``scale`` (the transformed descriptor's unit: nm, rad or 1), as in the
        spec files.
    """

    ranking: object
    scorecard: object
    terms: object


@dataclass(repr=False)
class Suggestions:
    """Result of :func:`suggest`.

    In a notebook the result shows as a few lines (``repr``: states, objective,
    pool size, the rank-1 CV and its held-out scores) or an HTML table of the top
    suggestions; :meth:`to_frames` gives the tables as pandas DataFrames.

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
    exploration : cvdesign.pipeline.explore.Exploration or None
        The proposed states, when the states were proposed from unlabelled runs.
    selection : str or None
        The atoms the pool was built from: the selection, how many atoms, in
        which residues, with mdtraj's 0-based indices
        (:func:`cvdesign.io.source.describe_selection`).
    report_data : dict or None
        What the report draws beyond the tables (``docs/report-data-v1.md``): per
        ranked CV the held-out histograms in CV units, the traces and the implied
        timescales; :meth:`report_data_json` adds the exploration's TICA coordinates.
        None: no ``report-data.json`` is written.

    Examples
    --------
    >>> import json
    >>> from cvdesign.io.demo import demo_data_dir
    >>> from cvdesign.io.source import Source
    >>> from cvdesign.pipeline.suggest import suggest
    >>> data = demo_data_dir()
    >>> manifest = json.loads((data / "manifest.json").read_text(encoding="utf-8"))
    >>> source = Source.from_states(str(data / manifest["topology"]["file"]),
    ...                             {name: [str(data / f) for f in entry["files"]]
    ...                              for name, entry in manifest["states"].items()})
    >>> result = suggest(source, max_terms=1, n_suggestions=2, n_bootstrap=0)
    >>> result  # weights apply to standardized descriptors (see the spec files)
    <Suggestions: states closed, open; objective separate, lag 2 ps
     pool of 62 descriptors; 2 ranked CVs
     rank 1 (cv-01.json), weight and term:
       -1 cos(dihedral LCH1:C3-C4-C5-C6)
       -0.00025 sin(dihedral LCH1:C3-C4-C5-C6)
     held-out J 1.26e+03 +/- 34, overlap 0.000, autocorr. 0.999
     (starting points to validate, not guarantees)>
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
    selection: str = None
    report_data: dict = None

    # ----------------------------------------------------------- renderings
    def scorecard_csv(self):
        """The score card as CSV text (``*_ci_low``/``*_ci_high``: 95 % interval)."""
        return _csv_text(_SCORECARD_TABLE, self.scorecard)

    def _ranked_on(self):
        """The slowness the ranking's score used (``'transitions'``, ``'within_states'``,
        ``'all_pairs'`` or None; see ``slowness_ranked_on`` of the entries)."""
        return self.ranking[0].get("slowness_ranked_on") if self.ranking else None

    def _n_folds(self):
        """The number of cross-validation folds behind the held-out scores (None unknown)."""
        folds = self.ranking[0].get("heldout_fisher_ratio_folds") if self.ranking else None
        return None if folds is None else len(folds)

    def _has_intervals(self):
        """Whether any ranked CV's terms carry bootstrap intervals or selection frequencies."""
        return any(t.get("weight_ci") or t.get("selection_frequency") is not None
                   for r in self.ranking for t in r["terms"])

    def ranking_csv(self):
        """The ranking as CSV text (one row per combination)."""
        return _csv_text(_RANKING_TABLE, self.ranking)

    def to_frames(self):
        """The ranking, the score card and the terms of the ranked CVs as pandas DataFrames.

        The ranking and the score card have the columns (names, units, order) of
        ``ranking.csv`` and ``scorecard.csv``, with numbers at full precision (the
        CSV files round them to 6 significant digits): a missing value (no
        interval without a bootstrap, an empty cell of the CSV file; a reachable
        bound where the CV is unbounded) is NaN, or None in a text column; the
        yes/no columns (``timescale_resolved``, ``folded``,
        ``integrated_time_decayed``, ``screened``, ``shortlisted``; 1/0 in the CSV
        files) are pandas' nullable booleans. pandas is imported only here; it is
        not a dependency of cvdesign (``pip install cvdesign[pandas]``).

        Returns
        -------
        SuggestionFrames
            A named tuple ``(ranking, scorecard, terms)`` of DataFrames.

        Raises
        ------
        ModuleNotFoundError
            When pandas is not installed.

        Examples
        --------
        Without a ranking (the shape of the tables; see :class:`Suggestions` for a run):

        >>> frames = Suggestions(["a", "b"], pool=None, scorecard=[], ranking=[],
        ...                      specs=[]).to_frames()
        >>> frames.ranking.columns[:6].tolist(), len(frames.ranking)
        (['rank', 'spec', 'n_terms', 'objective', 'method', 'heldout_score'], 0)
        >>> frames.terms.columns[:6].tolist()
        ['rank', 'spec', 'term', 'descriptor', 'label', 'kind']
        """
        pd = _import_pandas("Suggestions.to_frames()")
        terms = [{"rank": r["rank"], "spec": r["spec"], "term": k, **t}
                 for r in self.ranking for k, t in enumerate(r["terms"], 1)]
        return SuggestionFrames(_frame(pd, _RANKING_TABLE, self.ranking),
                                _frame(pd, _SCORECARD_TABLE, self.scorecard),
                                _frame(pd, _TERM_TABLE, terms))

    def ranking_json(self):
        """The ranking as JSON text."""
        return dumps({"format": "cvdesign-ranking", "version": 1, "states": self.states,
                       "objective": self.objective, "lag_ps": self.lag_ps,
                       "ranking": self.ranking, "caution": CAUTION})

    def report_data_json(self):
        """``report-data.json`` as JSON text (see ``docs/report-data-v1.md``), or None when
        there is no report data; with an :attr:`exploration`, its ``tica`` entry holds
        the frames in the two slowest TICA coordinates."""
        if self.report_data is None:
            return None
        doc = dict(self.report_data)
        if self.exploration is not None:
            doc["tica"] = self.exploration.report_tica
        return dumps(doc, compact=True)

    def top_table(self, n=5):
        """A plain-text table of the top `n` suggestions (separation and slowness)."""
        lines = [f"{'rank':>4}  {'spec':<11} {'descr':>5}  {'held-out J':>10}  "
                 f"{'overlap':>7}  {'autocorr':>8}  descriptors"]
        for r in self.ranking[:n]:
            names = ", ".join(dict.fromkeys(t["label"] for t in r["terms"]))
            rho, ov = _shown_autocorrelation(r), r["heldout_overlap"]
            lines.append(f"{r['rank']:>4}  {r['spec']:<11} {r['n_terms']:>5}  "
                         f"{r['heldout_fisher_ratio']:>10.3g}  "
                         f"{'' if ov is None else format(ov, '.3f'):>7}  "
                         f"{'' if rho is None else format(rho, '.3f'):>8}  {names}")
        if any(shown_slowness(r) == "_transitions" for r in self.ranking[:n]):
            lines.append("autocorr: held-out, along the runs that cross between the states "
                         "(transition slowness"
                         + (", which objective both ranked on" if any(
                             _ranked_on_transitions(r) for r in self.ranking[:n]) else "")
                         + ")")
        return "\n".join(lines)

    def __repr__(self):
        """A few lines: states, objective, pool and ranking sizes, the rank-1 CV's terms
        (at most ``_REPR_TERMS`` of them) and held-out scores; lines are clipped, so the
        text stays short whatever the pool and the names."""
        lag = "" if self.lag_ps is None else f", lag {self.lag_ps:g} ps"
        proposed = "" if self.exploration is None else " (proposed from unlabelled runs)"
        pool = "" if self.pool is None else f"pool of {len(self.pool)} descriptors; "
        lines = [f"<Suggestions: states {', '.join(map(str, self.states))}{proposed}; "
                 f"objective {self.objective}{lag}",
                 f" {pool}{len(self.ranking)} ranked CVs"]
        if self.ranking:
            r = self.ranking[0]
            terms = r["terms"]
            lines.append(f" rank 1 ({r['spec']}), weight and term:")
            lines += [_clip(f"   {t['weight']:+.3g} {_term_name(t)}", _REPR_TERM_WIDTH)
                      for t in terms[:_REPR_TERMS]]
            if len(terms) > _REPR_TERMS:
                lines.append(f"   ... and {len(terms) - _REPR_TERMS} more terms")
            lines.append(" held-out " + ", ".join(_heldout_scores(r)))
        lines.append(" (starting points to validate, not guarantees)>")
        return "\n".join(_clip(line, _REPR_WIDTH) for line in lines)

    def _repr_html_(self):
        """An HTML table of the top 5 suggestions (for notebooks; no external resources)."""
        esc = html.escape
        lag = "" if self.lag_ps is None else f", lag {self.lag_ps:g} ps"
        pool = "" if self.pool is None else f"; pool of {len(self.pool)} descriptors"
        shown = min(len(self.ranking), 5)
        head = ["rank", "spec", _J_HEAD, "overlap", "autocorr.", "timescale (ps)",
                "descriptors (weight [nominal 95 % CI], selection)"]
        out = ['<div class="cvdesign-suggestions">',
               "<p><strong>cvdesign suggestions</strong>: states "
               + ", ".join(f"<code>{esc(str(s))}</code>" for s in self.states)
               + f"; objective <code>{esc(self.objective)}</code>{esc(lag)}{esc(pool)}; "
               f"{len(self.ranking)} ranked CVs (top {shown} shown).</p>",
               "<table>", "<thead><tr>" + "".join(f"<th>{esc(h)}</th>" for h in head)
               + "</tr></thead>", "<tbody>"]
        for r in self.ranking[:shown]:
            out.append("<tr>" + "".join(f"<td>{esc(c)}</td>" for c in _top_cells(r)) + "</tr>")
        out += ["</tbody>", "</table>",
                f"<p><small>{esc(_TOP_LEGEND)}</small></p>",
                f"<p><strong>Caution.</strong> {esc(CAUTION)}</p>", "</div>"]
        return "\n".join(out)

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
        if self.selection:
            out += ["", f"Atoms of the pool: {self.selection}."]
        if self.exploration is not None:
            out += [""] + self.exploration.summary_lines()
        out += ["", "## What was done", ""] + [f"- {n}" for n in self.notes]
        out += ["", "## Top suggestions", "",
                "Held-out J is the Fisher ratio (between-state over within-state variance "
                "of the CV, dimensionless) on frames not used to fit it: each "
                "cross-validation fold's frames along the direction fitted without them, "
                "the folds pooled, so that runs of a state at different places along the "
                "CV count against it (the best of many "
                "such scores, so somewhat optimistic; ranking.csv's "
                "heldout_fisher_ratio_noise is what noise alone gives one fixed direction), "
                "± its jackknife standard error over the folds (from the folds, so given "
                "also when there are no bootstrap uncertainties"
                + ("; with two folds it is half the difference of the two folds' own "
                   "scores, a rough error that can come out small by chance"
                   if self._n_folds() == 2 else "")
                + "); overlap is the "
                "histogram overlapping coefficient of the states along the CV on those frames "
                "(0 = fully separated, 1 = identical); autocorrelation is the held-out "
                "normalized autocorrelation of the CV at the lag (1 = does not relax within "
                + ("the lag, along the runs that cross between the states ("
                   + ("the runs given with --runs, each frame labelled by its proposed state"
                      if self.exploration is not None else
                      "runs given with per-frame labels, such as biased runs fed back")
                   + "): each run's lagged pairs, spanning the "
                   "crossings and the frames between the states, about that run's own mean, "
                   "on held-out blocks of each run"
                   + (", which objective `both` ranks on (`slowness_ranked_on` = "
                      "`transitions`" if self._ranked_on() == "transitions" else
                      " (pairs within one state keep the offsets between the states on such "
                      "runs, and make every separating CV look slow")
                   + "; the columns `heldout_autocorrelation_transitions`, "
                   "`autocorrelation_transitions` and `timescale_transitions_ps` of "
                   "ranking.csv), and the timescale is -lag/ln(autocorrelation) along those "
                   "runs on all their data; "
                   if self.ranking and shown_slowness(self.ranking[0]) == "_transitions" else
                   "the lag, within the states: each state's runs about that state's own mean, "
                   "how slowly the CV moves inside the basins, which objective `both` ranks "
                   "on; about one common mean every separating CV would look slow, since the "
                   "lagged pairs never leave their state; the columns `heldout_autocorrelation` "
                   "and `timescale_ps` of ranking.csv hold that common-mean measure), and the "
                   "timescale is -lag/ln(autocorrelation) within the states on all data; "
                   if self.objective == "both" else
                   "the lag, here with all runs about their common mean, so a run that never "
                   "leaves its state counts as slow; ranking.csv also holds the measure "
                   "within the states, `heldout_autocorrelation_within_states`), and the "
                   "timescale is -lag/ln(autocorrelation) on all data; ")
                + "a timescale longer than the longest run (for pairs within one state: "
                "the longest run or visit of one state) is only a lower bound, and so is one "
                "held up by the offsets between the states (pairs that never leave their "
                "state stay correlated through them): both are shown as not resolved."
                + (" Intervals are nominal 95 % block-bootstrap intervals (in our checks, "
                   "blocks of about two integrated times covered 87-92 %: read them as "
                   "somewhat narrow); selection is the fraction of "
                   "bootstrap refits of the whole search in which the descriptor is kept in "
                   "the refit's counterpart of this CV (its ranked combination sharing the "
                   "most descriptors with it)." if self._has_intervals() else
                   " No bootstrap intervals or selection frequencies were computed (see "
                   "'uncertainties' above)."), "",
                f"| rank | spec | {_J_HEAD} | overlap | autocorr. | timescale (ps) | "
                "descriptors (weight [nominal 95 % CI], selection) |",
                "| ---: | --- | ---: | ---: | ---: | ---: | --- |"]
        for r in self.ranking[:5]:
            out.append("| " + " | ".join(_top_cells(r)) + " |")
        out += _range_lines(self.ranking[:5])
        for r in self.ranking:
            for w in r.get("warnings", []):
                out += ["", f"**Warning** (rank {r['rank']}, {r['spec']}): {w}."]
        hinted = [(r, len((r.get("hints") or {}).get("warnings") or [])) for r in self.ranking]
        hinted = [(r, n) for r, n in hinted if n]
        if hinted:
            out += ["", "Bias hints with warnings (each spec's `hints.warnings`; read them "
                    "before using its kernel width, height or deposition interval): "
                    + ", ".join(f"{r['spec']} {n}" for r, n in hinted) + "."]
        out += ["", "Files: `ranking.csv`, `ranking.json`, `scorecard.csv` (every descriptor), "
                "`cv-NN.json` (one spec per suggestion; evaluate with `cvdesign apply`)"
                + (", `report-data.json` (what the report's figures draw)"
                   if self.report_data is not None else "") + ".",
                "", f"**Caution.** {CAUTION}", ""]
        return "\n".join(out)

    def write(self, out_dir, *, force=False, extra=None):
        """Write every output into `out_dir`, all or nothing.

        Files are written into a temporary directory beside `out_dir`, which
        is then renamed onto it, so an interrupted run leaves no partial output:
        the files of :meth:`output_files`, and `extra`. The HTML report is not
        written here unless it is given in `extra` (``cvdesign.report.write_report``
        writes it into a written directory; the command line builds it from
        :meth:`output_files` first and writes it with the rest).

        Parameters
        ----------
        out_dir : path-like
        force : bool, default=False
            Replace an existing non-empty directory.
        extra : dict of str to str, default=None
            More files, ``{name: text}`` (e.g. ``report.html``).
        """
        out_dir = prepare_output_dir(out_dir, force=force, inputs=self.input_files,
                                     owned=is_output_file,
                                     marker="ranking.json")
        write_dir_atomically(out_dir, {**self.output_files(), **(extra or {})})
        return out_dir

    def output_files(self):
        """The outputs as ``{file name: text}``: ``ranking.csv``, ``ranking.json``,
        ``scorecard.csv``, ``summary.md``, the ``cv-NN.json`` specs, ``states.csv`` with an
        exploration, and ``report-data.json`` (:meth:`report_data_json`) when there is
        report data."""
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
        data = self.report_data_json()
        if data is not None:
            files["report-data.json"] = data
        return files


#: Score-card columns with an interval, in CSV order; the integrated time is in ps.
_CARD_COLUMNS = ("fisher_ratio", "overlap", "autocorrelation", "autocorrelation_within_runs",
                 "integrated_time")

# Tables: (column, kind, value of a row) per column, shared by the CSV files and the
# DataFrames. Kinds: "int", "number" (None when unknown), "flag" (True, False or None;
# 1, 0 or empty in CSV), "text" ("" or None when empty). A value of None in place of the
# function is the row's position, 1, 2, ...


def _value(key):
    return lambda row: row.get(key)


def _interval(name, key, unit=""):
    """Columns ``name_ci_low``/``name_ci_high`` (then `unit`) of the interval ``row[key]``."""
    return [(f"{name}_ci_{side}{unit}", "number",
             lambda row, i=i: (row.get(key) or (None, None))[i])
            for i, side in enumerate(("low", "high"))]


def _numbers(*names):
    return [(name, "number", _value(name)) for name in names]


_RANKING_TABLE = (
    [("rank", "int", _value("rank")), ("spec", "text", _value("spec")),
     ("n_terms", "int", _value("n_terms")), ("objective", "text", _value("objective")),
     ("method", "text", _value("method"))]
    + _numbers("heldout_score", "heldout_score_se")
    + _interval("heldout_score", "heldout_score_ci")
    + _numbers("heldout_fisher_ratio", "heldout_fisher_ratio_se")
    + _interval("heldout_fisher_ratio", "heldout_fisher_ratio_ci")
    + _numbers("heldout_overlap") + _interval("heldout_overlap", "heldout_overlap_ci")
    + _numbers("fisher_ratio_all") + _interval("fisher_ratio", "fisher_ratio_ci")
    + _numbers("lag_ps", "heldout_autocorrelation")
    + _interval("heldout_autocorrelation", "heldout_autocorrelation_ci")
    + _numbers("autocorrelation_all") + _interval("autocorrelation", "autocorrelation_ci")
    + _numbers("timescale_ps") + _interval("timescale", "timescale_ci_ps", "_ps")
    + [("timescale_resolved", "flag", _value("timescale_resolved"))]
    + _numbers("heldout_autocorrelation_within_states")
    + _interval("heldout_autocorrelation_within_states",
                "heldout_autocorrelation_within_states_ci")
    + _numbers("autocorrelation_within_states")
    + _interval("autocorrelation_within_states", "autocorrelation_within_states_ci")
    + _numbers("timescale_within_states_ps")
    + _interval("timescale_within_states", "timescale_within_states_ci_ps", "_ps")
    + [("timescale_within_states_resolved", "flag",
        _value("timescale_within_states_resolved"))]
    + [("slowness_ranked_on", "text", _value("slowness_ranked_on"))]
    + _numbers("heldout_autocorrelation_transitions")
    + _interval("heldout_autocorrelation_transitions", "heldout_autocorrelation_transitions_ci")
    + _numbers("autocorrelation_transitions")
    + _interval("autocorrelation_transitions", "autocorrelation_transitions_ci")
    + _numbers("timescale_transitions_ps")
    + _interval("timescale_transitions", "timescale_transitions_ci_ps", "_ps")
    + [("timescale_transitions_resolved", "flag", _value("timescale_transitions_resolved"))]
    + _numbers("integrated_time_ps") + _interval("integrated_time", "integrated_time_ci_ps", "_ps")
    + [("terms", "text", lambda r: "; ".join(_term_name(t) for t in r["terms"])),
       ("weights", "text", lambda r: " ".join(_fmt(t["weight"]) for t in r["terms"])),
       ("weight_ci", "text", lambda r: _per_term(
           [("[" + ",".join(_fmt(v) for v in t["weight_ci"]) + "]") if t.get("weight_ci")
            else None for t in r["terms"]])),
       ("selection_frequency", "text",
        lambda r: _per_term([t.get("selection_frequency") for t in r["terms"]]))]
    + _numbers("reproduced_in_refits")
    + [(f"{which}_{side}", "number", lambda r, k=f"{which}_range", side=side:
        (r.get(k) or {}).get(side)) for which in ("reachable", "observed")
       for side in ("lower", "upper")]
    + [("folded", "flag", lambda r: None if "reachable_range" not in r
        else any(st.get("at_bound") for st in r["states"].values())),
       ("states_at_bound", "text", lambda r: "; ".join(
           f"{name}:{st['at_bound']}" for name, st in r["states"].items()
           if st.get("at_bound")))]
    + [("integrated_time_decayed", "flag", _value("integrated_time_decayed"))]
    + _numbers("frame_spacing_ps")
    + [("integrated_time_state", "text", _value("integrated_time_state"))]
    + _numbers("heldout_fisher_ratio_noise"))

_SCORECARD_TABLE = (
    [("order", "int", None), ("id", "text", _value("id")), ("kind", "text", _value("kind")),
     ("label", "text", _value("label")),
     ("atoms", "text", lambda row: (" / ".join(" ".join(map(str, g)) for g in row["groups"])
                                    if "groups" in row else " ".join(map(str, row["atoms"]))))]
    + [column for name in _CARD_COLUMNS
       for unit in ["_ps" if name == "integrated_time" else ""]
       for column in [(name + unit, "number", _value(name))] + _interval(name, f"{name}_ci", unit)]
    + [("integrated_time_decayed", "flag", _value("integrated_time_decayed")),
       ("screened", "flag", _value("screened")), ("shortlisted", "flag", _value("shortlisted")),
       ("stands_for", "text", lambda row: " ".join(row["stands_for"])),
       ("note", "text", _value("note"))])

_TERM_TABLE = (
    [("rank", "int", _value("rank")), ("spec", "text", _value("spec")),
     ("term", "int", _value("term"))]
    + [(name, "text", _value(name)) for name in ("descriptor", "label", "kind", "transform")]
    + _numbers("weight") + _interval("weight", "weight_ci")
    + _numbers("selection_frequency", "center", "scale"))


def _cells(table, rows):
    """Per row, the list of its raw values in the columns of `table`."""
    for i, row in enumerate(rows, 1):
        yield [i if get is None else get(row) for _, _, get in table]


def _csv_text(table, rows):
    """CSV text of `rows`: numbers to 6 significant digits, flags 1/0, unknown empty."""
    write = {"int": str, "number": _fmt, "flag": _flag, "text": lambda v: v or ""}
    kinds = [write[kind] for _, kind, _ in table]
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([name for name, _, _ in table])
    for cells in _cells(table, rows):
        w.writerow([f(v) for f, v in zip(kinds, cells)])
    return buf.getvalue()


def _frame(pd, table, rows):
    """A DataFrame of `rows` in the columns of `table` (unknown numbers NaN, empty text None)."""
    columns = list(zip(*_cells(table, rows))) or [()] * len(table)
    dtypes = {"int": "int64", "number": "float64", "flag": "boolean", "text": object}
    data = {}
    for (name, kind, _), values in zip(table, columns):
        if kind == "text":
            values = [v or None for v in values]
        elif kind == "number":
            values = [math.nan if v is None else v for v in values]
        data[name] = pd.Series(values, dtype=None if kind == "text" and values else dtypes[kind])
    return pd.DataFrame(data)


def _import_pandas(what):
    """pandas, or a clear error naming it when it is not installed."""
    try:
        import pandas
    except ImportError as exc:
        raise ModuleNotFoundError(
            f"{what} needs pandas, which is not installed: install it with "
            "'pip install pandas' (or 'pip install cvdesign[pandas]')", name="pandas") from exc
    return pandas


#: ``repr(Suggestions)``: longest line and longest term line, characters (longer lines
#: end in "..."), and the number of terms of the rank-1 CV listed.
_REPR_WIDTH, _REPR_TERM_WIDTH, _REPR_TERMS = 100, 72, 3

#: The top table's column of the held-out Fisher ratio and its standard error over the
#: cross-validation folds (given with or without bootstrap uncertainties).
_J_HEAD = "held-out J ± SE over folds"

_TOP_LEGEND = ("Held-out J: Fisher ratio (between-state over within-state variance of the CV, "
               "dimensionless) on frames not used to fit it, the held-out folds pooled, ± its "
               "jackknife standard error over the folds; overlap: 0 = states fully separated "
               "along the CV, 1 = identical; "
               "autocorr.: held-out normalized autocorrelation at the lag; intervals: nominal "
               "95 % block bootstrap; selection: fraction of bootstrap refits keeping the "
               "descriptor. Every column: summary.md and ranking.csv of the output directory.")


def _clip(text, width):
    return text if len(text) <= width else text[:width - 3] + "..."


def _ranked_on_transitions(r):
    """Whether a ranking entry's score used the crossing runs' transition slowness."""
    return r.get("slowness_ranked_on") == "transitions"


def shown_slowness(r):
    """Which slowness of a ranking entry the tables and the report show, as a key suffix:
    for objective ``both`` what it ranked on (``'_transitions'``, along the runs that cross
    between the states, or ``'_within_states'`` after its fallback or without such runs);
    otherwise ``'_transitions'`` when there are such runs (pairs within one state keep the
    offsets between the states there, so a separating CV looks slow), else ``''`` (all runs
    about one mean).

    Examples
    --------
    >>> shown_slowness({"objective": "separate", "timescale_transitions_ps": 5.0})
    '_transitions'
    >>> shown_slowness({"objective": "both"}), shown_slowness({"objective": "separate"})
    ('_within_states', '')
    >>> shown_slowness({"objective": "both", "timescale_transitions_ps": 5.0,
    ...                 "slowness_ranked_on": "within_states"})  # (its fallback)
    '_within_states'
    """
    if r.get("objective") == "both":  # what it ranked on, also after its fallback
        return "_transitions" if _ranked_on_transitions(r) else "_within_states"
    return "_transitions" if r.get("timescale_transitions_ps") is not None else ""


def _heldout_scores(r):
    """The held-out scores of a ranking entry as short texts."""
    out = []
    if r.get("objective", "separate") != "separate" and r.get("heldout_score") is not None:
        out.append(f"{r['objective']} score {r['heldout_score']:.3g} "
                   f"+/- {r['heldout_score_se']:.2g}")
    out.append(f"J {r['heldout_fisher_ratio']:.3g} +/- {r['heldout_fisher_ratio_se']:.2g}")
    if r.get("heldout_overlap") is not None:
        out.append(f"overlap {r['heldout_overlap']:.3f}")
    rho = _shown_autocorrelation(r)
    if rho is not None:
        within = {"_transitions": " (transitions)",
                  "_within_states": " (within states)"}.get(shown_slowness(r), "")
        out.append(f"autocorr.{within} {rho:.3f}")
    return out


def _shown_autocorrelation(r):
    """The held-out autocorrelation the tables show (:func:`shown_slowness`)."""
    return r.get(f"heldout_autocorrelation{shown_slowness(r)}")


def _top_cells(r):
    """The cells of a ranking entry in the top table of summary.md and of the HTML."""
    rho, overlap = _shown_autocorrelation(r), r["heldout_overlap"]
    return [str(r["rank"]), r["spec"],
            f"{r['heldout_fisher_ratio']:.3g} ± {r['heldout_fisher_ratio_se']:.2g}",
            "" if overlap is None else format(overlap, ".3f"),
            "" if rho is None else format(rho, ".3f"),
            _timescale_text(r), "; ".join(_term_text(t) for t in r["terms"])]


def _range_lines(ranking):
    """The summary's table of the CVs' reachable and observed ranges (CV units)."""
    rows = [r for r in ranking if "reachable_range" in r]
    if not rows:
        return []
    out = ["", "### Ranges", "",
           "Reachable: the values the CV can take, from its terms (cos and sin of a dihedral "
           "are bounded, a distance has no largest value); observed: its smallest and largest "
           f"value in the input frames. A state *at a bound* has its mean within "
           f"{FOLD_SPREADS:g} of its standard deviations of a reachable end: a folded "
           "coordinate (see the warnings).",
           "", "| rank | spec | reachable | observed | states at a bound |",
           "| ---: | --- | --- | --- | --- |"]
    for r in rows:
        reach, seen = r["reachable_range"], r["observed_range"]
        ends = [("-inf" if reach["lower"] is None else f"{reach['lower']:.4g}"),
                ("+inf" if reach["upper"] is None else f"{reach['upper']:.4g}")]
        at = [f"`{name}` ({st['at_bound']})" for name, st in r["states"].items()
              if st.get("at_bound")]
        out.append(f"| {r['rank']} | {r['spec']} | [{ends[0]}, {ends[1]}] | "
                   f"[{seen['lower']:.4g}, {seen['upper']:.4g}] | {', '.join(at) or 'none'} |")
    return out


def _per_term(values):
    """One CSV cell of per-term values separated by spaces; empty when none is known."""
    if all(v is None for v in values):
        return ""
    return " ".join(v if isinstance(v, str) else _fmt(v) for v in values)


def _term_name(t):
    return t["label"] if t["transform"] == "identity" else f"{t['transform']}({t['label']})"


def _timescale_text(r):
    key = f"timescale{shown_slowness(r)}"
    ts = r.get(f"{key}_ps")
    if ts is None:
        return ""
    resolved = r.get(f"{key}_resolved")
    bound = resolving_span_ps(r, key)
    if resolved is False and bound:
        return f"> {bound:.3g} (not resolved by these runs)"
    bound_text = upper_bound_text(r.get(f"{key}_ci_ps"))
    return bound_text if bound_text is not None else format(ts, ".3g")


def upper_bound_text(ci):
    """A timescale shown as its upper bound, when its interval (ps) has no lower end (the
    autocorrelation's interval reaches 0); else None.

    >>> upper_bound_text([None, 0.61]), upper_bound_text([0.1, 0.3])
    ('< 0.61 (autocorrelation at the lag not distinguished from 0)', None)
    """
    if ci is None or ci[0] is not None or ci[1] is None:
        return None
    return f"< {ci[1]:.3g} (autocorrelation at the lag not distinguished from 0)"


def resolving_span_ps(entry, key):
    """The span (ps) below which the timescale `key` of a ranking entry is resolved: the
    longest run for those along the crossing runs, else the longest run or visit of one
    state (``longest_visit_ps``; entries written before it have ``longest_run_ps`` only).

    Examples
    --------
    >>> e = {"longest_run_ps": 100.0, "longest_visit_ps": 30.0}
    >>> resolving_span_ps(e, "timescale"), resolving_span_ps(e, "timescale_transitions")
    (30.0, 100.0)
    """
    if key == "timescale_transitions" or entry.get("longest_visit_ps") is None:
        return entry.get("longest_run_ps")
    return entry["longest_visit_ps"]


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


def dumps(obj, *, compact=False):
    """JSON text of `obj`: sorted keys, floats rounded to 12 significant digits, no NaN.

    Parameters
    ----------
    obj : JSON-ready object
    compact : bool, default=False
        No indentation and no spaces after separators (for long arrays of numbers,
        such as ``report-data.json``); indented by two spaces otherwise.

    Examples
    --------
    >>> dumps({"b": [0.1 + 0.2], "a": 1}, compact=True)
    '{"a":1,"b":[0.3]}\\n'
    """
    if compact:
        return json.dumps(_rounded(obj), separators=(",", ":"), sort_keys=True,
                          allow_nan=False) + "\n"
    return json.dumps(_rounded(obj), indent=2, sort_keys=True, allow_nan=False) + "\n"


def output_inputs(source):
    """Every file a source reads (topology and trajectories)."""
    files = [str(p) for p in source.files()]
    if source.topology_path:
        files.append(source.topology_path)
    return files
