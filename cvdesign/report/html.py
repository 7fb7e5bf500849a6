"""One self-contained ``report.html`` from an output directory (or a funnel spec).

:func:`build_report` turns the files of an output (:class:`~cvdesign.report.inputs.Output`)
into one HTML page: the caution, the ranking table, the figures (SVG embedded as
``data:`` URIs, each with alt text and a caption), the notes, the run's summary. The page
has no script and loads nothing (no external stylesheet, font, image or link); a print
stylesheet makes it read well printed to PDF. It is written as XHTML-compatible HTML (every
element closed, only XML's entities), so that an XML parser reads it too.

A figure whose data the output does not hold (``report-data.json`` missing, or a part of
it absent) is replaced by a visible note "not available: ...", listed again under Notes;
never by a broken image.

:func:`write_report` reads the output, renders it, and writes the page atomically. The
page is a function of the output's files only, so rebuilding it from the same files gives
the same bytes.
"""

import base64
import html
import re
from dataclasses import dataclass
from pathlib import Path

from .._version import __version__
from ..errors import CVDesignError, InputError
from ..io.atomic import atomic_paths
from ..pipeline.output import CAUTION, resolving_span_ps, shown_slowness, upper_bound_text
from . import figures as fg
from .inputs import read_output, report_data_name, report_path

__all__ = ["Report", "build_report", "write_report", "markdown"]


def write_report(target, out=None):
    """Write the report of an output directory (or funnel spec), atomically.

    Parameters
    ----------
    target : path-like
        A directory written by ``cvdesign suggest`` or ``cvdesign demo``, or the spec
        file written by ``cvdesign funnel``.
    out : path-like, optional
        The page to write; default ``target/report.html`` for a directory,
        ``NAME-report.html`` beside a funnel spec ``NAME.json``. Replaced if it exists
        (it is derived from the output), through a temporary file and a rename.

    Returns
    -------
    pathlib.Path
        The page written.

    Raises
    ------
    cvdesign.errors.InputError
        `target` is not a cvdesign output, one of its files is not as cvdesign wrote it,
        `out` is one of the files read, or the page cannot be written.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     write_report(tmp)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: '...' is not a cvdesign output directory: ...
    """
    output = read_output(target)
    path = Path(out) if out is not None else report_path(target)
    if path.resolve() in {p.resolve() for p in output.paths()}:
        raise InputError(f"the report {str(path)!r} would replace {path.name}, a file of the "
                         "output it describes; give another name")
    page = build_report(output).html
    try:
        with atomic_paths([path]) as (tmp,):  # permissions as the umask allows, like the tables
            with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
                fh.write(page)
    except OSError as exc:
        raise InputError(f"cannot write the report {str(path)!r}: {exc.strerror or exc}; "
                         "nothing was written") from None
    return path


@dataclass(frozen=True)
class Report:
    """A rendered report.

    Attributes
    ----------
    html : str
        The page (UTF-8 text, ``\\n`` line ends).
    figures : tuple of cvdesign.report.figures.Figure
        The figures embedded, in page order (with the numbers each drew).
    missing : tuple of str
        The "not available: ..." notes, in page order.
    """

    html: str
    figures: tuple
    missing: tuple


def build_report(output):
    """The report of an output's files: the page, its figures and what is not available.

    Parameters
    ----------
    output : cvdesign.report.inputs.Output
        From :func:`cvdesign.report.inputs.read_output`.

    Returns
    -------
    Report

    Raises
    ------
    cvdesign.errors.InputError
        A file is not as cvdesign writes it (the message names it).
    """
    parsed = output.parsed()
    page = _Page(output.name)
    try:
        if output.kind == "suggest":
            _suggest(page, output, parsed)
        else:
            _funnel(page, output, parsed)
    except (KeyError, TypeError, ValueError, IndexError) as exc:
        if isinstance(exc, CVDesignError):
            raise
        which = page.reading or "the output"
        raise InputError(f"{which}: a field is missing or malformed ({type(exc).__name__}: "
                         f"{exc}); the file is not as cvdesign wrote it, re-run the command "
                         "that made it") from None
    return Report(page.text(), tuple(page.figures), tuple(page.missing))


# ------------------------------------------------------------------------------ page
_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Helvetica, Arial, sans-serif;
       color: #111; background: #fff; margin: 0 auto; max-width: 60rem; padding: 1rem 1.5rem;
       line-height: 1.4; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.2rem; border-bottom: 1px solid #ccc; margin-top: 2rem; }
h3 { font-size: 1.05rem; margin-top: 1.4rem; }
h4 { font-size: 0.95rem; }
p.meta { color: #444; margin-top: 0; }
.caution { border: 2px solid #D55E00; background: #fff6ef; padding: 0.5rem 0.8rem; }
.missing { border: 1px dashed #888; background: #f4f4f4; padding: 0.5rem 0.8rem;
           color: #333; }
.warning { color: #8a3a00; }
table { border-collapse: collapse; margin: 0.6rem 0; font-size: 0.85rem; }
th, td { border: 1px solid #ccc; padding: 0.2rem 0.4rem; vertical-align: top; }
th { background: #f0f0f0; text-align: left; }
td.num { text-align: right; }
table.ranking { width: 100%; }
table.ranking td:nth-child(2) { white-space: nowrap; }
span.ci { display: block; font-size: 0.8em; color: #444; white-space: nowrap; }
span.ci.warning { color: #8a3a00; }
span.term { display: block; }
figure { margin: 1rem 0; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 0.85rem; color: #333; margin-top: 0.3rem; }
code { font-size: 0.9em; background: #f4f4f4; padding: 0 0.15rem; }
.swatch { display: inline-block; width: 0.8em; height: 0.8em; border: 1px solid #333;
          vertical-align: middle; margin-right: 0.3em; }
nav ul { columns: 2; }
@media print {
  @page { size: A4; margin: 14mm; }
  body { max-width: none; padding: 0; font-size: 9.5pt; }
  h2 { break-after: avoid; }
  h3, h4 { break-after: avoid; }
  figure, table, .caution, .missing { break-inside: avoid; }
  nav { display: none; }
  .caution, .missing { background: none; }
  a { color: inherit; text-decoration: none; }
}
"""


def _e(text):
    """Text escaped for HTML and XML alike (no named entity beyond XML's five)."""
    return html.escape(str(text), quote=True)


class _Page:
    """The page under construction: body parts, figures, notes of what is missing."""

    def __init__(self, name):
        self.name = name
        self.parts = []
        self.toc = []
        self.missing = []
        self.figures = []
        self.reading = None   # the file being read, for error messages
        self.parts_head = ""  # title, meta line and caution

    def add(self, text):
        self.parts.append(text)

    def section(self, level, ident, title):
        if level == 2:
            self.toc.append((ident, title))
        self.add(f'<h{level} id="{_e(ident)}">{_e(title)}</h{level}>')

    def figure(self, fig):
        self.figures.append(fig)
        data = base64.b64encode(fig.svg.encode("utf-8")).decode("ascii")
        self.add(f'<figure id="fig-{_e(fig.name)}"><img src="data:image/svg+xml;base64,'
                 f'{data}" alt="{_e(fig.alt)}" /><figcaption>{_e(fig.caption)}</figcaption>'
                 "</figure>")

    def not_available(self, what, why):
        text = f"not available: {what} ({why})"
        self.missing.append(text)
        self.add(f'<p class="missing">{_e(text)}</p>')

    def text(self):
        toc = "".join(f'<li><a href="#{_e(i)}">{_e(t)}</a></li>' for i, t in self.toc)
        head = ('<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8" />\n'
                '<meta name="viewport" content="width=device-width, initial-scale=1" />\n'
                f"<title>cvdesign report: {_e(self.name)}</title>\n"
                f"<style>{_CSS}</style>\n</head>\n<body>\n")
        nav = f"<nav><ul>{toc}</ul></nav>\n" if toc else ""
        body = "\n".join(self.parts)
        return head + self.parts_head + nav + body + "\n</body>\n</html>\n"


def _caution(text):
    return f'<p class="caution"><strong>Caution.</strong> {_e(text)}</p>'


def _num(x, spec=".3g"):
    return "" if x is None else format(x, spec)


def _ci(ci, spec=".3g"):
    if not ci or ci[0] is None or ci[1] is None:
        return ""
    return f" [{format(ci[0], spec)}, {format(ci[1], spec)}]"


class _Html(str):
    """Text that is already HTML (not escaped again by :func:`_table`)."""


def _with_ci(value, ci, spec=".3g", missing=""):
    """A number with its interval on a second, smaller line; `missing` when there is no
    number."""
    if value is None:
        return missing
    text = _e(_num(value, spec))
    interval = _ci(ci, spec).strip()
    return _Html(text + (f'<span class="ci">{_e(interval)}</span>' if interval else ""))


def _cell(c):
    return c if isinstance(c, _Html) else _e(c)


def _table(header, rows, numeric=(), cls=None):
    attr = f' class="{cls}"' if cls else ""
    out = [f"<table{attr}><thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in header)
           + "</tr></thead><tbody>"]
    for row in rows:
        out.append("<tr>" + "".join(
            f'<td class="num">{_cell(c)}</td>' if i in numeric else f"<td>{_cell(c)}</td>"
            for i, c in enumerate(row)) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _term_name(t):
    return t["label"] if t["transform"] == "identity" else f"{t['transform']}({t['label']})"


def _spec_ranges(spec):
    """(reachable, observed, {state: side}) of a spec (see ``Spec.states_at_bound``)."""
    return spec.reachable_range, spec.observed_range, spec.states_at_bound


def _interval_text(pair, spec=".4g"):
    """``[a, b]``, an unbounded side as -inf/+inf; empty when unknown."""
    if pair is None:
        return ""
    lo, hi = pair
    return (f"[{'-inf' if lo is None else format(lo, spec)}, "
            f"{'+inf' if hi is None else format(hi, spec)}]")


def _range_cell(spec, states):
    """The ranking table's cell: the reachable range and the states at a bound."""
    reach, _, at = _spec_ranges(spec)
    folded = "".join(f'<span class="ci warning">folded: {_e(s)} at the {_e(at[s])} '
                     "bound</span>" for s in states if s in at)
    return _Html(_e(_interval_text(reach)) + folded)


# --------------------------------------------------------------------------- suggest
#: What the held-out score of each objective but ``separate`` (whose score is J) is.
_OBJECTIVE_SCORES = {
    "slow": "the cross-validated VAMP-2 score of the CV's slowest mode at the lag, "
            "dimensionless, 0 to 1",
    "both": "J/(1 + J) \u00d7 (1 + max(autocorrelation, 0))/2 on held-out frames, "
            "dimensionless, 0 to 1",
}


def _summary_items(summary):
    """The list items of ``summary.md`` (``- `` lines with their continuation lines)."""
    items, current = [], None
    for line in (summary or "").splitlines():
        stripped = line.strip()
        if stripped.startswith("- "):
            current = [stripped[2:]]
            items.append(current)
        elif current is not None and stripped and not stripped.startswith(("|", "#")):
            current.append(stripped)
        else:
            current = None
    return [" ".join(i) for i in items]


_RUN_WARNING = re.compile(r"(\*\*warning\*\*|warning):\s*|(?=bias hints refused)", re.I)


def _run_warnings(summary):
    """The block after the caution: the run summary's notes that are warnings (``warning:``)
    or say that bias hints were refused; empty when there are none."""
    found = []
    for item in _summary_items(summary):
        m = _RUN_WARNING.match(item)
        if m:
            found.append(item[m.end():])
    if not found:
        return ""
    return ('<div class="warning" id="run-warnings"><p><strong>Warnings of this run</strong> '
            "(from the run summary below):</p><ul>"
            + "".join(f"<li>{_inline(w)}</li>" for w in found) + "</ul></div>\n")


def _hint_walls(walls):
    if walls is None:
        return "none (periodic CV)"
    if walls.get("restraint") is not None:
        return f"none on the CV: restraint {walls['restraint']!r} confines it"
    if walls.get("lower") is None and walls.get("upper") is None:
        return "none needed (both would stand at or beyond the CV's reachable ends)"
    return ", ".join(f"{side} {_interval_end(walls.get(side))}" for side in ("lower", "upper"))


def _walls_at(walls):
    """Whether the hints place a wall on the CV (lower or upper)."""
    return bool(walls) and walls.get("restraint") is None and (
        walls.get("lower") is not None or walls.get("upper") is not None)


def _interval_end(x):
    return "none" if x is None else format(x, ".4g")


def _hints_block(hints, spec_name):
    """Under a ranked CV: its bias hints as the spec holds them (a short table), their
    warnings and caution, or why they were refused."""
    hints = hints or {}
    if hints.get("hints_refused"):
        return (f'<p class="warning"><strong>Bias hints refused</strong> ({_e(spec_name)}): '
                f"{_e(hints['hints_refused'])}</p>")
    if "kernel" not in hints:
        return f"<p>{_e(spec_name)} holds no bias hints.</p>"
    k, dep, wt = hints["kernel"], hints["deposition"], hints["well_tempered"]
    md = (hints.get("inputs") or {}).get("md_step_fs")
    rows = [["kernel width (sigma)", _num(k["sigma"], ".4g"), "CV units",
             "Gaussian" if k["kind"] == "gaussian" else
             f"Lucy kernel, cutoff {_num(k.get('cutoff'), '.4g')} CV units"],
            ["kernel height (initial)", _num(hints["height_kj_mol"], ".4g"), "kJ/mol", ""],
            ["deposition interval", _num(dep["interval_ps"], ".4g"), "ps",
             f"{dep['interval_steps']} steps" + ("" if md is None else f" of {md:g} fs")
             + (" (capped)" if dep.get("capped") else "")],
            ["bias factor (well-tempered)",
             "n/a" if wt.get("bias_factor") is None else _num(wt["bias_factor"], ".3g"), "",
             "no barrier given: the spec's hints.well_tempered.table gives one per barrier"
             if wt.get("bias_factor") is None else
             f"for a barrier of {_num(wt.get('barrier_kj_mol'), '.3g')} kJ/mol"],
            ["walls", _hint_walls(hints.get("walls")),
             "CV units" if _walls_at(hints.get("walls")) else "", ""]]
    out = [f'<h4 id="{_e(Path(spec_name).stem)}-hints">Bias hints ({_e(spec_name)}, '
           "<code>hints</code>)</h4>",
           _table(["hint", "value", "unit", "note"], rows, numeric=(1,))]
    out += [f'<p class="warning"><strong>Warning</strong> (bias hints): {_e(w)}</p>'
            for w in hints.get("warnings") or []]
    if hints.get("caution"):
        out.append(f'<p class="caution"><strong>Caution.</strong> {_e(hints["caution"])}</p>')
    return "\n".join(out)


def _suggest(page, output, parsed):
    ranking, specs = parsed["ranking"], parsed["specs"]
    data = parsed["report_data"]
    data_name = report_data_name("suggest")
    states = list(data["states"]) if data is not None else list(ranking["states"])
    if set(states) != set(ranking["states"]):
        raise InputError(f"{data_name}: states {states} differ from those of ranking.json "
                         f"({ranking['states']}); the files come from different runs")
    colors = fg.state_colors(states)
    lag = ranking.get("lag_ps")
    caution = ranking.get("caution") or CAUTION
    runs = "states.csv" in output.files
    page.parts_head = (
        f"<h1>cvdesign report: {_e(output.name)}</h1>\n"
        f'<p class="meta">cvdesign {_e(__version__)}; '
        + ("states proposed from unlabelled runs: " if runs else "states: ")
        + ", ".join(f'<span class="swatch" style="background:{colors[s]}"></span>{_e(s)}'
                    for s in states)
        + f"; objective <code>{_e(ranking.get('objective'))}</code>"
        + ("" if lag is None else f"; lag {lag:g} ps") + ".</p>\n"
        + _caution(caution) + "\n" + _run_warnings(output.files.get("summary.md")))
    if data is None:
        page.add(f'<p class="missing">This directory has no {data_name}: the figures drawn '
                 "from the tables are shown, those that need the stored held-out histograms, "
                 "traces and timescales are marked \u201cnot available\u201d.</p>")

    # ranking table
    page.section(2, "ranking", "Ranking")
    entries = ranking["ranking"]
    objective = ranking.get("objective")
    scored = objective in _OBJECTIVE_SCORES
    intervals = any(_ci(r.get("heldout_fisher_ratio_ci")) or any(
        _ci(t.get("weight_ci")) for t in r["terms"]) for r in entries)
    refits = any(r.get("reproduced_in_refits") is not None or any(
        t.get("selection_frequency") is not None for t in r["terms"]) for r in entries)
    biased = _biased_runs(data)
    page.add("<p>Ranked CVs, best first"
             + (f", by the held-out {_e(objective)} score ({_OBJECTIVE_SCORES[objective]})"
                if scored else "")
             + ". Held-out J is the Fisher ratio (between-state over "
             "within-state variance, dimensionless) on frames the fit never saw; overlap is "
             + ("the overlapping coefficient of the two states that overlap most along the "
                "CV (held-out histograms; 0 = disjoint, 1 = the same)" if len(states) > 2 else
                "the overlapping coefficient of the states' held-out histograms (0 = disjoint)")
             + "; the autocorrelation is at the lag"
             + (" in rescaled time (the runs are biased: each frame's step dt exp(V/kT); "
                "the timescale too)" if biased else "")
             + " (1 = does not relax within it"
             + ("; along the runs that cross between the states, each run about its own "
                "mean, the pairs spanning the crossings"
                + (", which objective both ranks on here" if any(
                    r.get("slowness_ranked_on") == "transitions" for r in ranking["ranking"])
                   else "")
                if any(shown_slowness(r) == "_transitions" for r in ranking["ranking"]) else
                "; within the states, each state's runs about its own mean, which objective "
                "both ranks on" if ranking.get("objective") == "both" else
                "; all runs about one common mean, so a run that stays in its state counts "
                "as slow") + "). "
             + ("Brackets: nominal 95 % bootstrap intervals (measured coverage 87-92 %: "
                "somewhat narrow). " if intervals else
                "No intervals: this run computed no bootstrap intervals (--bootstrap 0 or too "
                "few blocks). ")
             + ("Selection: how often bootstrap refits of the search keep the term. "
                if refits else "")
             + ("" if lag is not None else
                "No lag was given, so slowness was not measured: those cells read n/a. ")
             + "Reachable range: the values the CV can take, from its terms (cos and "
             "sin of a dihedral are bounded; -inf/+inf: unbounded on that side); "
             "<em>folded</em>: a state sits at a bound of it, where the bias force along "
             "the CV fades.</p>")
    rows = []
    for r in entries:
        terms = _Html("".join(
            f'<span class="term">{_e(_term_name(t))} {t["weight"]:+.3f}'
            + _e(_ci(t.get("weight_ci"), "+.3f"))
            + ("" if t.get("selection_frequency") is None
               else f", {t['selection_frequency']:.0%}") + "</span>" for t in r["terms"]))
        within = shown_slowness(r)
        ts = r.get(f"timescale{within}_ps")
        bound = resolving_span_ps(r, f"timescale{within}")
        unmeasured = "n/a (no lag)" if lag is None else "n/a (not measured: see the summary)"
        ts_ci = r.get(f"timescale{within}_ci_ps")
        if ts is not None and r.get(f"timescale{within}_resolved") is False and bound:
            ts_text = f"> {bound:.3g} (not resolved)"
        elif ts is not None and upper_bound_text(ts_ci) is not None:
            ts_text = upper_bound_text(ts_ci)
        else:
            ts_text = _with_ci(ts, r.get(f"timescale{within}_ci_ps"), missing=unmeasured)
        rho = r.get(f"heldout_autocorrelation{within}")
        rows.append([r["rank"], r["spec"], terms]
                    + ([_with_ci(r.get("heldout_score"), r.get("heldout_score_ci"),
                                 missing="n/a (not measured)")] if scored else [])
                    + [_with_ci(r["heldout_fisher_ratio"], r.get("heldout_fisher_ratio_ci")),
                       _with_ci(r["heldout_overlap"], r.get("heldout_overlap_ci")),
                       _with_ci(rho, r.get(f"heldout_autocorrelation{within}_ci"),
                                missing=unmeasured),
                       ts_text, "n/a (no bootstrap refits)"
                       if r.get("reproduced_in_refits") is None
                       else _num(r["reproduced_in_refits"], ".0%"),
                       _range_cell(specs[r["spec"]], states)])
    page.add(_table(["rank", "spec", "descriptors (weight"
                     + (" [nominal 95 % CI]" if intervals else "")
                     + (", selection" if refits else "") + ")"]
                    + ([f"held-out {objective} score (ranked by)"] if scored else [])
                    + ["held-out J", "overlap"
                       + (" (closest pair)" if len(states) > 2 else ""), "autocorr."
                       + ("" if lag is None else f" at {lag:g} ps")
                       + (" (rescaled time)" if biased else ""),
                       "timescale (ps" + (", rescaled time" if biased else "") + ")",
                       "found again in refits", "reachable range (CV units)"], rows,
                    numeric=tuple(range(3, 9 if scored else 8)) + (0,), cls="ranking"))
    for r in entries:
        for w in r.get("warnings", []) or []:
            page.add(f'<p class="warning"><strong>Warning</strong> (rank {_e(r["rank"])}, '
                     f"{_e(r['spec'])}): {_e(w)}.</p>")

    # one section per ranked CV
    by_spec = {}
    if data is not None:
        page.reading = data_name
        by_spec = {c["spec"]: c for c in data["cvs"]}
    page.section(2, "cvs", "The ranked CVs")
    for r in ranking["ranking"]:
        page.reading = r["spec"]
        spec = specs[r["spec"]]
        stem = Path(r["spec"]).stem
        label = f"rank {r['rank']} ({r['spec']})"
        page.section(3, stem, f"Rank {r['rank']}: {r['spec']}")
        sts = spec.states
        reach, seen, at = _spec_ranges(spec)
        page.add(_table(["state", "mean (CV units)", "std (CV units)", "min (CV units)",
                         "max (CV units)", "at a bound", "frames"],
                        [[s, _num(sts[s]["mean"], ".6g"), _num(sts[s]["std"], ".4g"),
                          _num(sts[s].get("min"), ".6g"), _num(sts[s].get("max"), ".6g"),
                          f"{at[s]} (folded)" if s in at else "no",
                          sts[s].get("n_frames", "")] for s in states if s in sts],
                        numeric=(1, 2, 3, 4, 6)))
        page.add(f'<p class="range">Range (CV units): reachable {_e(_interval_text(reach))} '
                 "(from the terms)"
                 + ("" if seen is None else
                    f"; observed {_e(_interval_text(seen))} in the input frames")
                 + ("." if not at else
                    "; <strong>folded</strong>: " + ", ".join(
                        f"{_e(s)} at the {_e(at[s])} bound" for s in states if s in at)
                    + ": the bias force along the CV fades there.") + "</p>")
        cv = by_spec.get(r["spec"])
        units = cv.get("units", "CV units") if cv else "CV units"
        page.reading = data_name
        if data is None:
            page.not_available(f"held-out histograms and \u2212kT ln p per state of {label}",
                               f"{data_name} is missing")
        elif cv is None or cv.get("heldout") is None:
            page.not_available(f"held-out histograms and \u2212kT ln p per state of {label}",
                               f"{data_name} has no held-out histograms for {r['spec']}")
        else:
            page.figure(fg.cv_distributions(f"{stem}-distributions", label, cv["heldout"],
                                            sts, states=states,
                                            temperature_k=data["temperature_k"],
                                            units=units, reachable=reach, at_bound=at))
        if data is None:
            page.not_available(f"the CV along time of {label}", f"{data_name} is missing")
        elif cv is None or not cv.get("traces"):
            page.not_available(f"the CV along time of {label}",
                               f"{data_name} has no traces for {r['spec']}")
        else:
            page.figure(fg.cv_traces(f"{stem}-traces", label, cv["traces"], states=states,
                                     units=units, reachable=reach, at_bound=at))
        page.reading = "ranking.json"
        page.figure(fg.term_weights(f"{stem}-weights", label, r["terms"]))
        page.reading = r["spec"]
        page.add(_hints_block(spec.hints, r["spec"]))

    # the pool
    page.section(2, "pool", "The pool")
    card = parsed["scorecard"]
    page.reading = "scorecard.csv"
    if card is None:
        page.not_available("the score card's best descriptors and the redundancy groups",
                           "scorecard.csv is missing")
    else:
        page.figure(fg.pool_scores(card, lag_ps=lag))
        labels = {row["id"]: row["label"] for row in card}
        groups = [(row["label"], [labels.get(m, m) for m in row["stands_for"]])
                  for row in card if row["stands_for"]]
        if groups:
            page.figure(fg.redundancy_groups(groups))
            page.add(_table(["representative", "stands for"],
                            [[rep, ", ".join(members)] for rep, members in groups]))
        else:
            page.add("<p>Redundancy: no descriptor is represented by another (no strongly "
                     "correlated pair that adds nothing when combined).</p>")

    # slow modes
    page.section(2, "slow-modes", "Slow modes")
    page.reading = data_name
    tica = data.get("tica") if data is not None else None
    curves, within = [], []
    if data is not None:
        for c in data["cvs"]:
            t = c.get("timescales")
            if t is not None:
                curves.append((f"rank {c['rank']}", t["lag_ps"], t["timescale_ps"]))
                if t.get("timescale_within_runs_ps") is not None:
                    within.append((f"rank {c['rank']}", t["lag_ps"],
                                   t["timescale_within_runs_ps"]))
    # the span the pooled curves are resolved within (pairs within one state: the longest
    # run or visit of one state), or with --runs the longest run, TICA's
    longest = (tica.get("longest_run_ps") if tica is not None else
               resolving_span_ps(ranking["ranking"][0], "timescale") if ranking["ranking"]
               else None)
    if curves or tica is not None:
        page.figure(fg.implied_timescales(
            curves, tica=None if tica is None else {
                "lag_ps": tica["lag_ps"], "timescales_ps": tica["timescales_ps"],
                "resolved": tica.get("timescales_resolved")},
            within=within, crossing=any(shown_slowness(r) == "_transitions"
                                        for r in ranking["ranking"]), biased=biased,
            longest_run_ps=longest,
            longest_what="longest run" if tica is not None else "longest run in one state"))
    else:
        page.not_available("implied timescales against the lag",
                           f"{data_name} is missing" if data is None else
                           f"{data_name} holds none (no lag: slowness was not measured)"
                           if lag is None else f"{data_name} holds none")
    if runs:
        page.section(2, "proposed-states", "Proposed states")
        if tica is None or tica.get("coords") is None:
            page.not_available("the frames in the two slowest TICA coordinates by proposed "
                               "state", f"{data_name} is missing" if data is None
                               else f"{data_name} has no TICA coordinates" if tica is None
                               else "TICA found a single coordinate")
        else:
            page.figure(fg.tica_states(tica["coords"], tica["state"], states=states,
                                       lag_ps=tica["lag_ps"],
                                       timescales_ps=tica.get("timescales_ps"),
                                       n_slow=tica.get("n_slow"), biased=biased,
                                       longest_run_ps=tica.get("longest_run_ps"),
                                       resolved=tica.get("timescales_resolved")))
        page.add("<p>Every frame's proposed state is in <code>states.csv</code>; each state's "
                 "fraction of the frames (reweighted for biased runs; an equilibrium "
                 "population only when the runs enter and leave it many times), staying "
                 "probabilities and transitions are in the run summary below.</p>")
    page.reading = "summary.md"
    _notes_and_summary(page, output.files.get("summary.md"), caution)


def _biased_runs(data):
    """Whether some input run is biased, from the report data: a state whose held-out counts
    are sums of frame weights (``heldout.weighted``, written when some run is biased)."""
    if data is None:
        return False
    return any((c.get("heldout") or {}).get("weighted") for c in data.get("cvs", []))


def _notes_and_summary(page, summary, caution):
    page.section(2, "notes", "Notes")
    if page.missing:
        page.add("<ul>" + "".join(f"<li>{_e(m)}</li>" for m in page.missing) + "</ul>")
    else:
        page.add("<p>Every figure of this report was drawn.</p>")
    page.add("<p>Colours: Okabe\u2013Ito palette (Okabe and Ito 2008), the same colour for a "
             "state in every figure. The report is rebuilt from the output's files alone by "
             f"<code>cvdesign report</code>; cvdesign {_e(__version__)}.</p>")
    page.add(_caution(caution))
    if summary is not None:
        page.section(2, "summary", "Run summary (summary.md)")
        page.add(markdown(summary, shift=2))


# ---------------------------------------------------------------------------- funnel
_SHAPE_ROWS = (("lower_wall_z_nm", "lower wall, z", "nm"),
               ("upper_wall_z_nm", "upper wall, z", "nm"),
               ("cone_end_z_nm", "end of the cone, z", "nm"),
               ("cone_half_angle_rad", "cone half-angle", "rad"),
               ("cylinder_radius_nm", "cylinder radius", "nm"),
               ("blend_half_width_nm", "blend half-width", "nm"),
               ("wall_force_constant_kj_mol_nm2", "wall force constant", "kJ/mol/nm\u00b2"))


def _funnel(page, output, parsed):
    spec, data = parsed["spec"], parsed["report_data"]
    data_name = report_data_name("funnel", output.spec_name)
    page.reading = output.spec_name
    restraint = next(r for r in spec.restraints if r["kind"] == "funnel")
    sizing = (spec.hints or {}).get("funnel_sizing", {})
    page.parts_head = (f"<h1>cvdesign report: {_e(output.name)}</h1>\n"
                       f'<p class="meta">cvdesign {_e(__version__)}; funnel restraint: '
                       f"{_e(restraint.get('label', ''))}.</p>\n" + _caution(spec.caution) + "\n")
    page.section(2, "funnel", "The funnel")
    axis = ", ".join(f"{v:.4f}" for v in restraint["axis"])
    page.add(_table(["parameter", "value", "unit"],
                    [["axis (reference pocket frame)", axis, "unit vector"]]
                    + [[lab, _num(restraint[k], ".4g"), unit] for k, lab, unit in _SHAPE_ROWS
                       if k in restraint], numeric=(1,)))
    ref = sizing.get("reference")
    if ref:
        page.add(f"<p>Reference pocket: frame {_e(ref['frame'])} of {_e(ref['file'])}; hold "
                 "the pocket in this orientation (restrained or aligned) during the biased "
                 "run.</p>")
    positions = None
    if data is not None:
        page.reading = data_name
        if data.get("spec") not in (None, output.spec_name):
            raise InputError(f"{data_name}: it describes {data['spec']!r}, not "
                             f"{output.spec_name!r}; the files come from different runs")
        positions = data.get("positions")
    page.figure(fg.funnel_positions(restraint, positions))
    if positions is None:
        page.not_available("the ligand positions in the frame of the restraint",
                           f"{data_name} is missing" if data is None
                           else f"{data_name} has no positions")
    page.reading = output.spec_name
    for w in sizing.get("warnings", []) or []:
        page.add(f'<p class="warning"><strong>Warning</strong>: {_e(w)}</p>')
    if sizing.get("reasoning"):
        page.section(2, "reasoning", "How it was sized")
        page.add("<ul>" + "".join(f"<li>{_e(x)}</li>" for x in sizing["reasoning"]) + "</ul>")
    bound = spec.states
    page.add(_table(["state", "pocket\u2013ligand centre distance, mean (nm)", "std (nm)",
                     "frames"],
                    [[s, _num(v["mean"], ".4g"), _num(v["std"], ".3g"), v.get("n_frames", "")]
                     for s, v in bound.items()], numeric=(1, 2, 3)))
    _notes_and_summary(page, None, spec.caution)


# -------------------------------------------------------------------------- markdown
_INLINE = (
    (re.compile(r"`([^`]+)`"), r"<code>\1</code>"),
    (re.compile(r"\*\*(.+?)\*\*"), r"<strong>\1</strong>"),
)


def _inline(text):
    out = _e(text)
    for pattern, repl in _INLINE:
        out = pattern.sub(repl, out)
    return out


def _cells(line):
    return [c.strip() for c in line.strip().strip("|").split(" | ")]


def markdown(text, shift=0):
    """HTML for the markdown subset cvdesign writes (``summary.md``).

    Headings (``#``), pipe tables (a separator row of ``---``; ``---:`` right-aligns),
    ``- `` lists, paragraphs, ``code`` and ``**bold**``; everything else is text, escaped.

    Parameters
    ----------
    text : str
    shift : int, default=0
        Added to heading levels (``#`` becomes ``h{1 + shift}``), at most ``h6``.

    Examples
    --------
    >>> print(markdown("# Title\\n\\n- a `b`\\n\\n| x | y |\\n| --- | ---: |\\n| 1 | 2 |", shift=1))
    <h2>Title</h2>
    <ul><li>a <code>b</code></li></ul>
    <table><thead><tr><th>x</th><th>y</th></tr></thead><tbody><tr><td>1</td><td class="num">2</td></tr></tbody></table>
    """
    out, para, items, table = [], [], [], []

    def flush():
        if para:
            out.append("<p>" + _inline(" ".join(para)) + "</p>")
            para.clear()
        if items:
            out.append("<ul>" + "".join(f"<li>{_inline(i)}</li>" for i in items) + "</ul>")
            items.clear()
        if table:
            header = _cells(table[0])
            align = _cells(table[1]) if len(table) > 1 else []
            right = [a.endswith(":") for a in align]
            rows = ["<table><thead><tr>" + "".join(f"<th>{_inline(h)}</th>" for h in header)
                    + "</tr></thead><tbody>"]
            for line in table[2:]:
                rows.append("<tr>" + "".join(
                    (f'<td class="num">{_inline(c)}</td>' if k < len(right) and right[k]
                     else f"<td>{_inline(c)}</td>") for k, c in enumerate(_cells(line)))
                    + "</tr>")
            out.append("".join(rows) + "</tbody></table>")
            table.clear()

    for line in text.splitlines():
        stripped = line.strip()
        heading = re.match(r"(#{1,6})\s+(.*)", stripped)
        if not stripped:
            flush()
        elif heading:
            flush()
            level = min(6, len(heading.group(1)) + shift)
            out.append(f"<h{level}>{_inline(heading.group(2))}</h{level}>")
        elif stripped.startswith("|"):
            if not table:
                flush()
            table.append(stripped)
        elif stripped.startswith("- "):
            if para or table:
                flush()
            items.append(stripped[2:])
        elif items and not para:
            items[-1] += " " + stripped
        else:
            if table:
                flush()
            para.append(stripped)
    flush()
    return "\n".join(out)
