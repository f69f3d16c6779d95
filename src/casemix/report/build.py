"""Build the self-contained HTML report of one evaluation folder."""

from __future__ import annotations

from pathlib import Path

from casemix._io import atomic_write_text
from casemix.audit.agreement import check_audit_folder
from casemix.errors import InputError
from casemix.report.folder import EvaluationFolder, read_evaluation_folder
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


def report_cautions(data: EvaluationFolder, options: ReportOptions) -> list[str]:
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
    folder: str | Path,
    *,
    suppress_below: int | None = None,
    audit_folder: str | Path | None = None,
    log_expected: bool = False,
) -> str:
    """Return the HTML report of an evaluation folder.

    Parameters
    ----------
    folder : str or Path
        The folder written by ``Evaluation.save`` (programs.csv, recipients.csv,
        exclusions.csv, followup.csv, casemix.csv, curves.csv, coefficients.csv, run.json).
    suppress_below : int, optional
        Return the public report instead: the disclosure rule with threshold N (at least 2)
        is applied first (:func:`casemix.report.disclosure.make_release`), so counts from 1
        to N - 1 and every figure that gives them back are withheld or coarsened.
    audit_folder : str or Path, optional
        A folder written by the audit: its findings and every CSV become a last section
        (internal report only: the audit is not part of a public release).
    log_expected : bool, default False
        Logarithmic E axis in the funnel plot.

    Returns
    -------
    str
        One self-contained HTML document (inline CSS and SVG, no scripts, no outside
        requests). The same folder always gives the same text.

    Raises
    ------
    InputError
        For a missing or malformed file in the folder, or a bad ``suppress_below``.
    """
    if suppress_below is not None:
        return _public_report(folder, check_threshold(suppress_below), audit_folder,
                              log_expected)
    options = ReportOptions(log_expected=log_expected)
    if audit_folder is not None and not Path(audit_folder).is_dir():
        raise InputError(f"{audit_folder}: audit folder not found; pass the folder `casemix "
                         "audit` wrote, or leave it out.")
    data = read_evaluation_folder(folder)
    sections = [
        evaluated_section(data, options),
        overview_section(data, options),
        scale_section(data, options),
        each_program_section(data, options),
        data_quality_section(data, options),
        model_section(data, options),
    ]
    competing = competing_section(data, options)
    if competing is not None:
        sections.insert(-1, competing)
    if audit_folder is not None:
        audit = audit_section(audit_folder, data.run["model"].get("fingerprint"))
        check_audit_folder(audit_folder, data.run)  # same rules and prior as the evaluation
        sections.append(audit)
    return report_page("Observed and expected outcomes by program", sections, data, options)


def report_page(title: str, sections: list, data: EvaluationFolder,
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


def _public_report(folder, n: int, audit_folder, log_expected: bool) -> str:
    # Imported here: the public report reuses this module's cautions.
    from casemix.report.disclosure import make_release
    from casemix.report.public_report import render_public_report

    if audit_folder is not None:
        raise InputError("the audit is not part of a public release; leave out the audit "
                         "folder when suppressing counts.")
    release = make_release(read_evaluation_folder(folder), n)
    return render_public_report(release, log_expected=log_expected)


def write_report(
    folder: str | Path,
    out: str | Path | None = None,
    *,
    suppress_below: int | None = None,
    audit_folder: str | Path | None = None,
    log_expected: bool = False,
) -> Path:
    """Write the HTML report of an evaluation folder (atomically) and return its path.

    Parameters
    ----------
    folder : str or Path
        The evaluation folder (see :func:`render_report`).
    out : str or Path, optional
        The file to write; default ``folder / "report.html"``, and for a public report
        (``suppress_below``) ``folder / "public" / "report.html"``: a public report is never
        written over the internal one.
    suppress_below, audit_folder, log_expected
        As in :func:`render_report`.

    Returns
    -------
    Path
        The file written.
    """
    html = render_report(folder, suppress_below=suppress_below, audit_folder=audit_folder,
                         log_expected=log_expected)
    internal = Path(folder) / "report.html"
    if suppress_below is None:
        target = internal if out is None else Path(out)
    else:
        target = Path(folder) / "public" / "report.html" if out is None else Path(out)
        if target.resolve() == internal.resolve():
            raise InputError(f"{target}: the public report cannot replace the internal one; "
                             "write it to another file (default public/report.html).")
    return atomic_write_text(target, html)
