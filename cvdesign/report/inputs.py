"""What the report reads: a ``suggest`` output directory, or a ``funnel`` spec.

:func:`read_output` reads the files of an output as text (nothing else: no
trajectory), checks that they are a cvdesign output, and returns an
:class:`Output` whose :meth:`Output.parsed` gives the ranking, the score card, the
specs and ``report-data.json`` as Python objects. A report is a function of these
texts only (:func:`cvdesign.report.html.build_report`), so a report rebuilt from the
same files has the same bytes.

Layout of a ``suggest`` (or ``demo``) directory: ``ranking.json`` (its marker),
``ranking.csv``, ``scorecard.csv``, ``summary.md``, ``cv-NN.json``, ``states.csv`` with
``--runs``, and ``report-data.json`` when the pipeline wrote it; the report is
``report.html``. A ``funnel`` output is its spec ``NAME.json``, with
``NAME-report-data.json`` beside it; the report is ``NAME-report.html``.
"""

import csv
import io
import json
import re
from dataclasses import dataclass
from pathlib import Path

from ..errors import CVDesignError, InputError

__all__ = ["Output", "read_output", "report_path", "report_data_name", "REPORT_DATA_FORMAT",
           "REPORT_DATA_VERSION"]

REPORT_DATA_FORMAT = "cvdesign-report-data"
REPORT_DATA_VERSION = 1
#: The version of ``ranking.json`` this report reads (``Suggestions.ranking_json`` writes it).
RANKING_VERSION = 1

_SPEC_NAME = re.compile(r"cv-\d+\.json")
_DIR_FILES = ("ranking.json", "ranking.csv", "scorecard.csv", "summary.md", "states.csv",
              "report-data.json")


@dataclass(frozen=True)
class Output:
    """The files of one cvdesign output, as text.

    Attributes
    ----------
    kind : {'suggest', 'funnel'}
    name : str
        What the report calls it: the directory's name, or the funnel spec's file name.
    files : dict
        ``{file name: text}``: every file the report reads.
    spec_name : str or None
        For a funnel, the spec's file name.
    root : pathlib.Path or None
        The directory holding the files (None for files not read from disk).
    """

    kind: str
    name: str
    files: dict
    spec_name: str = None
    root: Path = None

    def paths(self):
        """The paths of the files read (empty when not read from disk)."""
        return [] if self.root is None else [self.root / name for name in self.files]

    def parsed(self):
        """The files as Python objects (see the module docstring); bad content raises
        :class:`~cvdesign.errors.InputError` naming the file."""
        return _parse_suggest(self) if self.kind == "suggest" else _parse_funnel(self)


def report_data_name(kind, spec_name=None):
    """The name of the file holding the report's data: ``report-data.json`` in a
    ``suggest`` directory, ``NAME-report-data.json`` beside a funnel spec ``NAME.json``.

    Examples
    --------
    >>> report_data_name("suggest"), report_data_name("funnel", "site.json")
    ('report-data.json', 'site-report-data.json')
    """
    if kind == "suggest":
        return "report-data.json"
    return f"{Path(spec_name).stem}-report-data.json"


def report_path(target):
    """Where the report of an output goes by default: ``DIR/report.html`` for a
    directory, ``NAME-report.html`` beside a funnel spec ``NAME.json``.

    Examples
    --------
    >>> str(report_path("runs/site.json"))
    'runs/site-report.html'
    """
    target = Path(target)
    if target.is_dir():
        return target / "report.html"
    return target.with_name(f"{target.stem}-report.html")


def _read_text(path):
    try:
        return path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{str(path)!r} is not UTF-8 text; it is not a file cvdesign "
                         "wrote") from None
    except OSError as exc:
        raise InputError(f"cannot read {str(path)!r}: {exc.strerror or exc}") from None


def read_output(target):
    """Read an output directory of ``suggest``/``demo``, or a ``funnel`` spec file.

    Parameters
    ----------
    target : path-like
        The directory, or the funnel's spec file.

    Returns
    -------
    Output

    Raises
    ------
    cvdesign.errors.InputError
        `target` is missing, or is not a cvdesign output (no ``ranking.json`` in a
        directory; a file that is not a funnel spec).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     read_output(tmp)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: '...' is not a cvdesign output directory: it has no ranking.json...
    """
    path = Path(target)
    if not path.exists():
        raise InputError(f"{str(path)!r} does not exist; give the directory that "
                         "'cvdesign suggest' or 'cvdesign demo' wrote, or the spec file that "
                         "'cvdesign funnel' wrote")
    if path.is_dir():
        if not (path / "ranking.json").is_file():
            raise InputError(f"{str(path)!r} is not a cvdesign output directory: it has no "
                             "ranking.json (what 'cvdesign suggest' and 'cvdesign demo' "
                             "write); give such a directory, or the spec file of "
                             "'cvdesign funnel'")
        files = {name: _read_text(path / name) for name in _DIR_FILES
                 if (path / name).is_file()}
        for p in sorted(path.iterdir()):
            if _SPEC_NAME.fullmatch(p.name) and p.is_file():
                files[p.name] = _read_text(p)
        return Output("suggest", path.resolve().name, files, root=path)
    text = _read_text(path)
    doc = _json(text, path.name)
    if not (isinstance(doc, dict) and doc.get("format") == "cvdesign-spec"
            and any(isinstance(r, dict) and r.get("kind") == "funnel"
                    for r in doc.get("restraints", []) or [])):
        raise InputError(f"{str(path)!r} is not a cvdesign output: give the directory that "
                         "'cvdesign suggest' or 'cvdesign demo' wrote, or a spec with a funnel "
                         "restraint written by 'cvdesign funnel'")
    files = {path.name: text}
    data = path.with_name(report_data_name("funnel", path.name))
    if data.is_file():
        files[data.name] = _read_text(data)
    return Output("funnel", path.name, files, spec_name=path.name, root=path.parent)


def _json(text, name):
    try:
        return json.loads(text)
    except ValueError as exc:
        raise InputError(f"{name}: not valid JSON ({exc}); it is not as cvdesign wrote it, "
                         "re-run the command that made it") from None


def _bad(name, what):
    """The error for a file whose content is not what cvdesign writes."""
    return InputError(f"{name}: {what}; the file is not as cvdesign wrote it, re-run the "
                      "command that made it")


def _spec(text, name):
    from ..spec import Spec

    try:
        return Spec.from_json(text)
    except CVDesignError as exc:
        raise _bad(name, f"not a valid spec ({exc})") from None


def _parse_suggest(out):
    files = out.files
    ranking = _json(files["ranking.json"], "ranking.json")
    if not (isinstance(ranking, dict) and ranking.get("format") == "cvdesign-ranking"
            and isinstance(ranking.get("ranking"), list)
            and isinstance(ranking.get("states"), list)):
        raise _bad("ranking.json", "no cvdesign ranking (format 'cvdesign-ranking' with "
                  "'states' and 'ranking')")
    version = ranking.get("version")
    if isinstance(version, bool) or version != RANKING_VERSION:
        raise InputError(f"ranking.json: version {version!r} of the ranking; this cvdesign "
                         f"reads version {RANKING_VERSION}. Re-run the command that made it "
                         "with this version")
    specs = {}
    for r in ranking["ranking"]:
        name = r.get("spec") if isinstance(r, dict) else None
        if name is None or name not in files:
            raise _bad("ranking.json", f"rank {r.get('rank') if isinstance(r, dict) else '?'} "
                      f"names the spec {name!r}, which is not in the directory")
        specs[name] = _spec(files[name], name)
    card = _scorecard(files["scorecard.csv"]) if "scorecard.csv" in files else None
    data = _report_data(files, "suggest")
    return {"ranking": ranking, "specs": specs, "scorecard": card,
            "summary": files.get("summary.md"), "report_data": data}


def _parse_funnel(out):
    spec = _spec(out.files[out.spec_name], out.spec_name)
    data = _report_data(out.files, "funnel", out.spec_name)
    return {"spec": spec, "report_data": data}


def _report_data(files, kind, spec_name=None):
    name = report_data_name(kind, spec_name)
    if name not in files:
        return None
    doc = _json(files[name], name)
    if not isinstance(doc, dict) or doc.get("format") != REPORT_DATA_FORMAT:
        raise _bad(name, f"no report data (format {REPORT_DATA_FORMAT!r})")
    if doc.get("version") != REPORT_DATA_VERSION:
        raise InputError(f"{name}: version {doc.get('version')!r} of the report data; this "
                         f"cvdesign reads version {REPORT_DATA_VERSION}. Re-run the command "
                         "that made it with this version")
    if doc.get("kind") != kind:
        raise _bad(name, f"kind {doc.get('kind')!r}, expected {kind!r}")
    return doc


def _number(text):
    if text == "":
        return None
    return float(text)


def _scorecard(text):
    """Score-card rows: numbers as floats (None when empty), intervals as [low, high]."""
    rows = []
    try:
        for raw in csv.DictReader(io.StringIO(text)):
            row = {"id": raw["id"], "label": raw["label"], "kind": raw["kind"],
                   "stands_for": raw["stands_for"].split(), "note": raw["note"]}
            for key in ("fisher_ratio", "overlap", "autocorrelation",
                        "autocorrelation_within_runs"):
                row[key] = _number(raw[key])
                lo, hi = _number(raw[f"{key}_ci_low"]), _number(raw[f"{key}_ci_high"])
                row[f"{key}_ci"] = None if lo is None or hi is None else [lo, hi]
            rows.append(row)
    except (KeyError, ValueError, TypeError) as exc:
        raise _bad("scorecard.csv", f"a column is missing or not a number ({exc})") from None
    return rows
