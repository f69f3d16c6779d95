"""The public report: the HTML page of a :class:`~casemix.report.disclosure.PublicRelease`.

It is rendered from the release alone (never from the internal folder), so that it cannot
show a figure the disclosure rule withheld; it says what was withheld and why. The parts
that carry no program count (what was evaluated, the reference model) are the internal
report's own sections.
"""

from __future__ import annotations

from dataclasses import replace

import pandas as pd
from markupsafe import Markup

from casemix.errors import plural
from casemix.evaluation.evaluate import Evaluation
from casemix.report.build import report_page
from casemix.report.disclosure import WITHHELD, PublicRelease
from casemix.report.page import MISSING, Section, figure_svg, table_html
from casemix.report.plots import (
    VERDICT_WORDS,
    at_risk_times,
    casemix_figure,
    caterpillar_figure,
    funnel_figure,
    survival_figure,
)
from casemix.report.sections import (
    ReportOptions,
    evaluated_section,
    glance_headers,
    model_section,
    program_anchor,
    verdict_html,
    what_if_text,
)
from casemix.stats.verdict import rules_from_dict, verdict_colours

__all__ = ["public_folder", "render_public_report"]

_PLACEHOLDER_COLUMNS = {
    "recipients": ["recipient", "program", "time", "event", "expected"],
    "exclusions": ["row", "recipient", "reason", "kind"],
}


def public_folder(release: PublicRelease) -> Evaluation:
    """The release as an Evaluation with no recipient-level rows (for shared sections).

    Its prior is None: a release publishes the prior's summary only.
    """
    tables = release.tables
    return Evaluation(
        programs=release.programs,
        recipients=pd.DataFrame(columns=_PLACEHOLDER_COLUMNS["recipients"]),
        exclusions=pd.DataFrame(columns=_PLACEHOLDER_COLUMNS["exclusions"]),
        followup=tables["followup.csv"],
        casemix=tables["casemix.csv"],
        curves=tables["curves.csv"],
        coefficients=tables["coefficients.csv"],
        out_of_range=tables.get("out_of_range.csv"),
        prior=None,
        rules=rules_from_dict(release.run["rules"], source="the public run.json"),
        run=release.run,
    )


def _num(value: object, digits: int, protected: bool) -> str:
    if protected:
        return WITHHELD
    return MISSING if pd.isna(value) else f"{value:.{digits}f}"


def _interval(row: pd.Series, centre: str, lower: str, upper: str, digits: int = 2) -> str:
    if row["protected"]:
        return WITHHELD
    if pd.isna(row[centre]):
        return MISSING
    return (f"{row[centre]:.{digits}f} ({_num(row[lower], digits, False)}–"
            f"{_num(row[upper], digits, False)})")


def _verdict(verdict: str, palette: dict[str, str]) -> object:
    return WITHHELD if verdict == WITHHELD else verdict_html(verdict, palette)


def _glance(release: PublicRelease) -> Section:
    programs, palette = release.programs, verdict_colours()
    rows = [r for _, r in programs.iterrows()]
    # The links and verdict chips go beside the frame (html=), never in it, so that no pandas
    # dtype can turn them into text.
    html = {
        "program": [Markup('<a href="#{}">{}</a>').format(program_anchor(i, r["program"]),
                                                          r["program"])
                    for i, r in enumerate(rows)],
        "verdict": [_verdict(r["verdict"], palette) for r in rows],
    }
    frame = pd.DataFrame({
        "program": [r["program"] for r in rows],
        "verdict": [r["verdict"] for r in rows],
        "recipients": [r["recipients"] for r in rows],
        "observed": [r["observed"] for r in rows],
        "expected": [_num(r["expected"], 1, r["protected"]) for r in rows],
        "oe": [_interval(r, "oe_ratio", "oe_lower", "oe_upper") for r in rows],
        "hr": [_interval(r, "hr_mean", "hr_lower", "hr_upper") for r in rows],
        "p_above": [_num(r["p_above"], 3, r["protected"]) for r in rows],
        "p_below": [_num(r["p_below"], 3, r["protected"]) for r in rows],
        "observed_survival": [_interval(r, "observed_survival", "observed_survival_lower",
                                        "observed_survival_upper", 3) for r in rows],
        "expected_survival": [_num(r["expected_survival"], 3, r["protected"]) for r in rows],
    }, dtype=object)
    headers = glance_headers(release.run)
    headers.pop("reach")  # what a program could show follows from its E: not published
    table = table_html(frame, headers=headers, wide=True, html=html,
                       numeric=[c for c in headers if c not in ("program", "verdict")])
    counts = programs["verdict"].value_counts()
    parts = [f"{counts[v]} {VERDICT_WORDS.get(v, v)}" for v in (*VERDICT_WORDS, WITHHELD)
             if v in counts]
    intro = Markup(
        "<p>{}: {}. The hazard ratio is the observed-to-expected ratio after shrinkage "
        "towards {}. “{}” marks a figure left out under the disclosure rule "
        "(see the last part).</p>"
    ).format(plural(len(programs), "program"), ", ".join(parts),
             release.run["prior"].get("centre", "the prior's mean"), WITHHELD)
    return Section("Programs at a glance", str(intro + Markup(table)), anchor="programs")


def _figure_block(fig, caption: str, alt: str) -> Markup:
    return Markup("<figure>{}<figcaption>{}</figcaption></figure>").format(
        Markup(figure_svg(fig, alt=alt)), caption)


def _scale(release: PublicRelease, log_expected: bool) -> Section:
    programs = release.programs
    shown = programs[~programs["protected"] & (programs["expected"] > 0)]
    left_out = programs.loc[programs["protected"], "program"].tolist()
    note = (f" Not drawn (withheld under the disclosure rule): {', '.join(left_out)}."
            if left_out else "")
    if not len(shown):
        return Section("All programs on one scale", str(Markup("<p>{}</p>").format(
            "No program can be drawn without showing a withheld figure." + note)),
            anchor="scale")
    level = release.run.get("credible_level", 0.95)
    body = [
        _figure_block(funnel_figure(shown, log_expected=log_expected),
                      "Each point is a program's observed-to-expected ratio against its "
                      "expected events, with exact Poisson limits." + note,
                      "Funnel plot of O/E against expected events"),
        _figure_block(caterpillar_figure(shown, credible_level=level),
                      f"Left: hazard ratio after shrinkage with its {level:.0%} credible "
                      "interval; right: raw O/E with its exact 95% interval." + note,
                      "Hazard ratios and O/E with their intervals"),
    ]
    return Section("All programs on one scale", str(Markup("").join(body)), anchor="scale")


def _at_risk_texts(curve: pd.DataFrame, horizon: float) -> list[str]:
    by_time = dict(zip(curve["time"].astype(float), curve["at_risk"], strict=True))
    return [str(by_time.get(float(t), MISSING)) for t in at_risk_times(horizon)]


def _program(release: PublicRelease, position: int, row: pd.Series,
             palette: dict[str, str]) -> Markup:
    code, n = row["program"], release.threshold
    horizon = float(release.run["horizon_days"])
    facts = Markup("<p>{} · {} recipients · observed {} · expected {} · O/E {} · hazard "
                   "ratio {}</p>").format(
        _verdict(row["verdict"], palette), row["recipients"], row["observed"],
        _num(row["expected"], 1, row["protected"]),
        _interval(row, "oe_ratio", "oe_lower", "oe_upper"),
        _interval(row, "hr_mean", "hr_lower", "hr_upper"))
    if row["protected"]:
        why = (f"fewer than {plural(n, 'recipient')}" if row["recipients"] == f"<{n}"
               else f"from 1 to {n - 1} events, or as few recipients without the event")
        text = (f"This program has {why}: every figure from which its counts could be worked "
                "out is withheld, including its curves, its case mix and the distance to "
                "another verdict.")
        if row["verdict"] == WITHHELD:
            text += " Its verdict is withheld too: it would narrow down the hidden count."
        return Markup('<div class="program" id="{}"><h3>{}</h3>{}<p class="note">{}</p>'
                      "</div>").format(program_anchor(position, code), code, facts, text)
    what_if = what_if_text(row, release.run["rules"].get("min_expected", 1.0))
    curve = release.tables["curves.csv"]
    curve = curve[curve["program"] == code]
    groups = release.tables["casemix.csv"]
    groups = groups[groups["program"] == code]
    figures = [_figure_block(
        survival_figure(curve, horizon_days=horizon, at_risk=_at_risk_texts(curve, horizon)),
        f"Observed Kaplan-Meier survival (shaded: 95% interval) at the quarter points of the "
        f"horizon, a step only after {n} or more events, against the survival the reference "
        "model expects for these recipients; numbers at risk only where shown.",
        f"Survival curves of program {code}")]
    if len(groups):
        figures.append(_figure_block(
            casemix_figure(groups),
            "How each covariate group raises (right of 1) or lowers (left of 1) this "
            "program's expected events; it describes the recipients, not the results.",
            f"Case-mix contributions of program {code}"))
    return Markup('<div class="program" id="{}"><h3>{}</h3>{}<p>{}</p><div class="pair">{}'
                  "</div></div>").format(program_anchor(position, code), code, facts,
                                         what_if, Markup("").join(figures))


def _each_program(release: PublicRelease) -> Section:
    palette = verdict_colours()
    codes = release.programs["program"]
    index = Markup('<ul class="program-index">{}</ul>').format(Markup("").join(
        Markup('<li><a href="#{}">{}</a></li>').format(program_anchor(i, c), c)
        for i, c in enumerate(codes)))
    blocks = [_program(release, i, row, palette) for i, row in release.programs.iterrows()]
    return Section("Program by program", str(index + Markup("").join(blocks)),
                   anchor="each-program")


def _data_quality(release: PublicRelease) -> Section:
    reasons = release.tables["exclusions_by_reason.csv"]
    excluded = (Markup(table_html(reasons, headers={"reason": "Reason",
                                                    "records": "Records excluded"},
                                  numeric=["records"]))
                if len(reasons) else Markup("<p>No records were excluded.</p>"))
    followup = release.tables["followup.csv"]
    table = table_html(
        followup,
        headers={"program": "Program", "recipients": "Recipients",
                 "completeness": "Follow-up completeness", "lost_to_followup": "Lost to follow-up"},
        formats={"completeness": "{:.1%}"}, numeric=["recipients", "lost_to_followup"])
    return Section("Data quality", str(Markup("<h3>Records excluded, by reason</h3>") + excluded
                                       + Markup("<h3>Follow-up per program</h3>")
                                       + Markup(table)), anchor="data-quality")


_RUN_FACTS = {
    "read": "records read", "kept": "recipients kept", "excluded": "records excluded",
    "corrected": "records kept with a correction",
}


def _evaluated_note(release: PublicRelease) -> Markup:
    """Say in words which facts of "What was evaluated" show MISSING because withheld."""
    counts, run = release.run["counts"], release.run
    gone = [what for key, what in _RUN_FACTS.items() if key in counts and counts[key] is None]
    if "network" in run and run["network"] is None:
        gone.append("the whole network's events, O/E and exact test")
    if "multiplicity" in run and run["multiplicity"] is None:
        gone.append("the expected false flags and the number of programs flagged")
    if not gone:
        return Markup("")
    return Markup(
        '<p class="note">“{}” above marks a figure withheld under the disclosure rule: {}. '
        "Each is a total (or follows from one) that, minus the figures shown, would give back "
        "a hidden count or a withheld verdict; the last part of this report lists why, "
        "figure by figure.</p>").format(MISSING, "; ".join(gone))


def _withheld(release: PublicRelease) -> Section:
    n = release.threshold
    intro = Markup(
        "<p>This is a public release. Counts from 1 to {} are shown as “&lt;{}”, and every "
        "figure from which such a count could be worked out (exactly or to within one) is "
        "withheld or coarsened, including totals that would give it back by subtraction. "
        "The threshold {} was chosen by whoever made this release: values around 10 or 11 "
        "are common practice, and the rules that apply locally take precedence. The full "
        "rule is in the casemix documentation (docs/disclosure.md).</p>"
    ).format(n - 1, n, n)
    table = table_html(release.withheld, headers={"scope": "Where", "figure": "Withheld",
                                                  "reason": "Why"})
    return Section("What this public release withholds", str(intro + Markup(table)),
                   anchor="withheld")


def _with_note(section: Section, note: Markup) -> Section:
    return replace(section, html=str(Markup(section.html) + note))


def render_public_report(release: PublicRelease, *, log_expected: bool = False) -> str:
    """Return the public HTML report of a release.

    Parameters
    ----------
    release : PublicRelease
        From :func:`~casemix.report.disclosure.make_release`.
    log_expected : bool, default False
        Logarithmic E axis in the funnel plot.

    Returns
    -------
    str
        One self-contained HTML document, the same for the same release.
    """
    data = public_folder(release)
    options = ReportOptions(suppress_below=release.threshold, log_expected=log_expected)
    sections = [
        _with_note(evaluated_section(data, options), _evaluated_note(release)),
        _glance(release),
        _scale(release, log_expected),
        _each_program(release),
        _data_quality(release),
        model_section(data, options),
        _withheld(release),
    ]
    return report_page("Observed and expected outcomes by program (public release)",
                       sections, data, options)
