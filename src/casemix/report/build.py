"""Build the self-contained HTML report of one evaluation, in memory or read from its folder."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from casemix._io import atomic_write_text
from casemix.audit.agreement import check_audit
from casemix.errors import InputError
from casemix.evaluation.evaluate import Evaluation
from casemix.report.incidence import competing_section
from casemix.report.page import render_page
from casemix.report.sections import (
    ReportOptions,
    audit_section,
    data_quality_section,
    each_program_section,
    evaluated_section,
    model_section,
    overview_section,
    scale_section,
)
from casemix.report.suppress import check_threshold, suppressed_text

if TYPE_CHECKING:  # casemix.audit.run imports this package for the audit page
    from casemix.audit.run import Audit

__all__ = ["REPORT_CAUTIONS", "render_report", "report_cautions", "report_page", "write_report"]

REPORT_CAUTIONS = (
    ("quality of care",
     "This is a statistical indicator, not a finding about the quality of care: it compares "
     "a program's outcomes with what a model of the reference population predicts for the "
     "same recipients, and the model cannot see everything that matters clinically."),
    ("small programs",
     "Small programs are uncertain: with few expected events their hazard ratios have wide "
     "intervals and are pulled strongly towards the prior's centre, so a single event can "
     "change the picture."),
    ("clinical review",
     "Decisions about a program belong to clinical review under the applicable rules and "
     "licensed practice, not to this report."),
)
"""Cautions every report shows: (topic, sentence). A sentence is left out only when a caution
recorded in run.json already names its topic, so that the page does not say it twice."""


def report_cautions(data: Evaluation, options: ReportOptions) -> list[str]:
    """Return the cautions of a report: run.json's, the standing ones, then this report's."""
    cautions = [str(c) for c in data.run.get("cautions", [])]
    recorded = " ".join(cautions).lower()
    cautions += [text for topic, text in REPORT_CAUTIONS if topic not in recorded]
    if options.suppress_below:
        n = options.suppress_below
        cautions.append(
            f"Public release: counts from 1 to {n - 1} are shown as “{suppressed_text(n)}”, and "
            "figures from which they could be worked out are withheld or coarsened (listed in "
            "the last part)."
        )
    no_e = data.programs.loc[data.programs["expected"] <= 0, "program"].tolist()
    if no_e:
        cautions.append(
            f"No expected events for {', '.join(no_e)}: no ratio can be computed there."
        )
    return cautions


def render_report(
    evaluation: Evaluation,
    *,
    audit: Audit | None = None,
    suppress_below: int | None = None,
    log_expected: bool = False,
) -> str:
    """Return the HTML report of an evaluation.

    Parameters
    ----------
    evaluation : Evaluation
        The evaluation, as :func:`casemix.evaluation.evaluate` returns it or as
        ``Evaluation.load`` reads it back from its folder (both give the same page).
    audit : Audit, optional
        An audit of the same model, rules and prior (:func:`casemix.audit.run_audit`, or
        ``Audit.load``): its findings and every table become a last section (internal
        report only: the audit is not part of a public release).
    suppress_below : int, optional
        Return the public report instead: the disclosure rule with threshold N (at least 2)
        is applied first (:func:`casemix.report.disclosure.make_release`), so counts from 1
        to N - 1 and every figure that gives them back are withheld or coarsened.
    log_expected : bool, default False
        Logarithmic E axis in the funnel plot.

    Returns
    -------
    str
        One self-contained HTML document (inline CSS and SVG, no scripts, no outside
        requests). The same evaluation always gives the same text.

    Raises
    ------
    InputError
        An audit of another model, rules or prior, an audit with ``suppress_below``, or a bad
        ``suppress_below``.
    """
    if suppress_below is not None:
        return _public_report(evaluation, check_threshold(suppress_below), audit, log_expected)
    options = ReportOptions(log_expected=log_expected)
    if audit is not None:
        check_audit(audit, evaluation.run)  # same model, rules and prior as the evaluation
    sections = [
        evaluated_section(evaluation, options),
        overview_section(evaluation, options),
        scale_section(evaluation, options),
        each_program_section(evaluation, options),
        data_quality_section(evaluation, options),
        model_section(evaluation, options),
    ]
    competing = competing_section(evaluation, options)
    if competing is not None:
        sections.insert(-1, competing)
    if audit is not None:
        sections.append(audit_section(audit))
    return report_page("Observed and expected outcomes by program", sections, evaluation,
                       options)


def report_page(title: str, sections: list, data: Evaluation,
                options: ReportOptions) -> str:
    """Render a report's sections as a page with its cautions, summary line and footer."""
    run = data.run
    outcome = str(run["outcome"]).replace("_", " ")
    return render_page(
        title,
        sections,
        cautions=report_cautions(data, options),
        cautions_at=1,
        summary=f"{outcome.capitalize()} within {run['horizon_days']} days of transplant; "
                f"data to {run['cutoff']}."
                + (f" Outcome: {run['outcome_definition']}." if "outcome_definition" in run
                   else ""),
        footer=f"Made with casemix {run.get('casemix_version', '(version not recorded)')}.",
    )


def _public_report(evaluation: Evaluation, n: int, audit: Audit | None,
                   log_expected: bool) -> str:
    # Imported here: the public report reuses this module's cautions.
    from casemix.report.disclosure import make_release
    from casemix.report.public_report import render_public_report

    if audit is not None:
        raise InputError("the audit is not part of a public release; leave out the audit "
                         "when suppressing counts.")
    return render_public_report(make_release(evaluation, n), log_expected=log_expected)


def write_report(
    folder: str | Path,
    out: str | Path | None = None,
    *,
    suppress_below: int | None = None,
    audit_folder: str | Path | None = None,
    log_expected: bool = False,
) -> Path:
    """Read an evaluation folder (and an audit folder), write its HTML report atomically.

    Parameters
    ----------
    folder : str or Path
        The folder written by ``Evaluation.save``, read with ``Evaluation.load``.
    out : str or Path, optional
        The file to write; default ``folder / "report.html"``, and for a public report
        (``suppress_below``) ``folder / "public" / "report.html"``: a public report is never
        written over the internal one.
    suppress_below, log_expected
        As in :func:`render_report`.
    audit_folder : str or Path, optional
        A folder written by ``Audit.save``, read with ``Audit.load``.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        For a missing or malformed file in either folder, or as :func:`render_report`.
    """
    internal = Path(folder) / "report.html"
    if suppress_below is None:
        target = internal if out is None else Path(out)
    else:
        target = Path(folder) / "public" / "report.html" if out is None else Path(out)
        if target.resolve() == internal.resolve():
            raise InputError(f"{target}: the public report cannot replace the internal one; "
                             "write it to another file (default public/report.html).")
    from casemix.audit.run import Audit  # see the import at the top

    evaluation = Evaluation.load(folder)
    audit = None if audit_folder is None else Audit.load(audit_folder)
    html = render_report(evaluation, audit=audit, suppress_below=suppress_below,
                         log_expected=log_expected)
    return atomic_write_text(target, html)
