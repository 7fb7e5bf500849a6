"""The report: figures and one self-contained HTML page from an output directory.

At the top of the data flow beside the command line: it reads what ``suggest``,
``demo`` and ``funnel`` wrote (never a trajectory) and draws it. ``figures`` draws
(matplotlib, off-screen, deterministic SVG), ``inputs`` reads and checks an output,
``html`` assembles and writes ``report.html``.
"""

from .html import Report, build_report, write_report
from .inputs import read_output, report_path

__all__ = ["Report", "build_report", "read_output", "report_path", "write_report"]
