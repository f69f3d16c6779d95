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

__all__ = ["REPORT_CAUTIONS", "render_report", "report_cautions", "write_report"]

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
            f"Counts from 1 to {n - 1} are hidden and shown as “{suppressed_text(n)}” "
            "(recipients, events, numbers at risk, excluded records). Ratios, survival figures "
            "and intervals are still shown and can let a reader work out a hidden count: "
            "review them before public release."
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
        Hide counts from 1 to ``suppress_below - 1`` (shown as ``"<N"``); at least 2.
    audit_folder : str or Path, optional
        A folder written by the audit: its findings and every CSV become a last section.
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
    options = ReportOptions(
        suppress_below=None if suppress_below is None else check_threshold(suppress_below),
        log_expected=log_expected,
    )
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
    run = data.run
    outcome = str(run["outcome"]).replace("_", " ")
    return render_page(
        "Observed and expected outcomes by program",
        sections,
        cautions=report_cautions(data, options),
        cautions_at=1,
        summary=f"{outcome.capitalize()} within {run['horizon_days']} days of transplant; "
                f"data to {run['cutoff']}."
                + (f" Outcome: {run['outcome_definition']}." if "outcome_definition" in run
                   else ""),
        footer=f"Made with casemix {run.get('casemix_version', '(version not recorded)')}.",
    )


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
        The file to write; default ``folder / "report.html"``.
    suppress_below, audit_folder, log_expected
        As in :func:`render_report`.

    Returns
    -------
    Path
        The file written.
    """
    html = render_report(folder, suppress_below=suppress_below, audit_folder=audit_folder,
                         log_expected=log_expected)
    target = Path(folder) / "report.html" if out is None else Path(out)
    return atomic_write_text(target, html)
