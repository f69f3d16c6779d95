"""The self-contained HTML report of an evaluation, and the page pieces it is built from.

``render_report(evaluation, audit=None)`` renders an Evaluation (and an Audit) as one page:
inline CSS and SVG figures (matplotlib), no scripts and no outside requests.
``write_report(folder)`` loads an evaluation folder and writes its ``report.html``.
``casemix.report.page`` holds the general pieces (sections, tables, figures) that other pages reuse.
``write_public_release(folder, n)`` applies the disclosure rule (``disclosure``) and writes
the public tables and report to a folder of their own.
"""

from casemix.report.build import render_report, write_report
from casemix.report.page import Section, facts_html, figure_svg, render_page, table_html
from casemix.report.release import write_public_release
from casemix.report.suppress import suppress_counts

__all__ = [
    "Section",
    "facts_html",
    "figure_svg",
    "render_page",
    "render_report",
    "suppress_counts",
    "table_html",
    "write_public_release",
    "write_report",
]
