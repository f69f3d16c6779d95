"""The parts of the evaluation report, each built from an Evaluation as one Section.

Every function returns a :class:`~casemix.report.page.Section` whose HTML is made of escaped
fragments only. Counts go through :func:`counts_text` so that small-count suppression applies
everywhere a count is shown.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import pandas as pd
from markupsafe import Markup

from casemix.errors import plural
from casemix.evaluation.evaluate import Evaluation
from casemix.report.page import MISSING, Section, anchor_for, facts_html, figure_svg, table_html
from casemix.report.plots import (
    FUNNEL_LEVELS,
    VERDICT_WORDS,
    at_risk_times,
    casemix_figure,
    caterpillar_figure,
    funnel_figure,
    numbers_at_risk,
    survival_figure,
)
from casemix.report.public import exclusions_by_reason
from casemix.report.suppress import suppress_counts, suppress_value
from casemix.stats.verdict import verdict_colours

__all__ = [
    "ReportOptions",
    "audit_section",
    "counts_text",
    "data_quality_section",
    "each_program_section",
    "evaluated_section",
    "glance_headers",
    "interval_text",
    "model_section",
    "overview_section",
    "prior_text",
    "program_anchor",
    "reach_text",
    "rules_text",
    "scale_section",
    "table_section",
    "verdict_html",
    "what_if_text",
]

AUDIT_ROWS_SHOWN = 200
"""At most this many rows of an audit CSV are shown in the report (the rest stay in the file)."""


@dataclass(frozen=True)
class ReportOptions:
    """Choices that change what the report shows.

    Attributes
    ----------
    suppress_below : int or None
        Hide counts from 1 to this minus one (``None``: show every count).
    log_expected : bool
        Logarithmic E axis in the funnel plot.
    """

    suppress_below: int | None = None
    log_expected: bool = False


def counts_text(values: Sequence[float], options: ReportOptions) -> list[str]:
    """Counts as text, suppressed when asked; missing counts show as an en dash."""
    out = []
    for value in values:
        if isinstance(value, str):  # already text (a public release's "<N" or "withheld")
            out.append(value)
        elif pd.isna(value):
            out.append(MISSING)
        elif options.suppress_below and 1 <= value < options.suppress_below:
            out.append(suppress_value(value, options.suppress_below))
        else:
            out.append(f"{int(value):,}")
    return out


def _count(value: float, options: ReportOptions) -> str:
    return counts_text([value], options)[0]


def _num(value: float, digits: int = 2) -> str:
    return MISSING if pd.isna(value) else f"{value:.{digits}f}"


def interval_text(centre: float, lower: float, upper: float, digits: int = 2) -> str:
    """A value with its interval, ``"1.14 (0.85–1.52)"``; an en dash when missing."""
    if pd.isna(centre):
        return MISSING
    return f"{centre:.{digits}f} ({_num(lower, digits)}–{_num(upper, digits)})"


def program_anchor(position: int, code: str) -> str:
    """Return the id of a program's sub-section (its position makes it unique)."""
    return anchor_for(code, prefix=f"program-{position + 1}")


def verdict_html(verdict: str, palette: dict[str, str] | None = None) -> Markup:
    """Return a verdict as its word with a colour chip beside it."""
    palette = palette or verdict_colours()
    return Markup('<span class="verdict"><span class="chip" style="background:{}"></span>{}'
                  "</span>").format(palette[verdict], VERDICT_WORDS[verdict])


def _figure_block(fig, caption: str, alt: str) -> Markup:
    return Markup("<figure>{}<figcaption>{}</figcaption></figure>").format(
        Markup(figure_svg(fig, alt=alt)), caption
    )


def _join(*parts: object) -> str:
    return str(Markup("").join(parts))


# -- 1. What was evaluated -----------------------------------------------------------------


def _window_text(window: object) -> str:
    if not window:
        return "every recipient in the records up to the cut-off"
    return f"transplanted {window[0]} to {window[1]}"


def prior_text(prior: dict) -> str:
    """The prior of run.json in words (kind, mean and spread)."""
    shape, rate = prior.get("shape"), prior.get("rate")
    mean = prior.get("mean", shape / rate if shape and rate else None)
    method = str(prior.get("method", "")).replace("_", " ")
    if prior.get("method") == "hierarchical":
        count = len(prior.get("components") or ())
        form = (f"a mixture of {count} gammas over the hyperposterior" if count
                else "integrated over the hyperposterior (components not published)")
        return f"hierarchical: {form} (mean {_num(mean, 3)}, sd {_num(prior.get('sd'), 3)})"
    return f"gamma, shape {_num(shape, 3)}, rate {_num(rate, 3)} (mean {_num(mean, 3)}); {method}"


def _network_text(network: dict | None) -> str:
    if not network:
        return MISSING
    return (f"O/E {_num(network['oe'])} ({network.get('level', 0.95):.0%} exact "
            f"{_num(network['oe_lower'])}–{_num(network['oe_upper'])}); exact test of O/E = 1: "
            f"p = {network['p_value']:.2g}")


def _multiplicity_text(many: dict | None) -> str:
    if not many:
        return MISSING
    return (f"{many['expected_false_flags']:.2f} of {many['programs_judged']} programs judged "
            "would be called excess or favorable if every true hazard ratio were 1 "
            f"(this network has {many['flags']})")


def rules_text(rules: dict) -> str:
    """The verdict rules of run.json in words."""
    probability = rules.get("probability", 0.975)
    upper, lower = rules.get("upper_margin", 1.0), rules.get("lower_margin", 1.0)
    return (
        f"excess when P(HR > {upper:g}) ≥ {probability:g}; favorable when "
        f"P(HR < {lower:g}) ≥ {probability:g}; too little data when E < "
        f"{rules.get('min_expected', 1.0):g}; otherwise consistent"
    )


def _inputs_frame(inputs: object) -> pd.DataFrame:
    if isinstance(inputs, dict):
        rows = [{"input": k, **(v if isinstance(v, dict) else {"path": v})}
                for k, v in inputs.items()]
    else:
        rows = list(inputs or [])
    frame = pd.DataFrame(rows)
    return frame.reindex(columns=[c for c in ("input", "path", "sha256") if c in frame])


def evaluated_section(data: Evaluation, options: ReportOptions) -> Section:
    """Outcome, horizon, window, cut-off, reference model, prior, rules and record counts."""
    run = data.run
    model, prior, counts = run["model"], run["prior"], run["counts"]
    facts = [
        ("Outcome", str(run["outcome"]).replace("_", " ")),
        ("Horizon", f"{run['horizon_days']} days after transplant"),
        ("Evaluation cohort", _window_text(run.get("window"))),
        ("Data cut-off", run["cutoff"]),
        ("Reference model", f"{_count(model.get('n'), options)} recipients, "
                            f"{_count(model.get('events'), options)} events; concordance "
                            f"{_num(model.get('concordance'), 3)}; ties: {model.get('ties')}"),
        ("Model fingerprint", model.get("fingerprint")),
        ("Prior", prior_text(prior)),
        ("About the prior", prior.get("note")),
        ("Shrunk towards", prior.get("centre", MISSING)),
        ("Whole network", _network_text(run.get("network"))),
        ("Expected false flags", _multiplicity_text(run.get("multiplicity"))),
        ("Credible intervals", f"{run.get('credible_level', 0.95):.0%}"),
        ("Verdict rules", rules_text(run["rules"])),
        ("Records", f"{_count(counts.get('read'), options)} read, "
                    f"{_count(counts.get('kept'), options)} kept, "
                    f"{_count(counts.get('excluded'), options)} excluded"
                    + ("" if "corrected" not in counts else
                       f"; {_count(counts['corrected'], options)} kept with a correction")),
    ]
    inputs = _inputs_frame(run.get("inputs"))
    body = [Markup(facts_html(facts))]
    if len(inputs):
        body.append(Markup(table_html(inputs, caption="Input files and their SHA-256 digests")))
    return Section("What was evaluated", _join(*body), anchor="evaluated")


# -- 3. Programs at a glance ---------------------------------------------------------------


def _verdict_counts(verdicts: pd.Series) -> str:
    counts = verdicts.value_counts()
    parts = [f"{counts[v]} {VERDICT_WORDS[v]}" for v in VERDICT_WORDS if v in counts]
    return f"{plural(len(verdicts), 'program')}: " + ", ".join(parts) + "."


def _survival_cell(row: pd.Series, column: str) -> str:
    lower, upper = row.get(f"{column}_lower"), row.get(f"{column}_upper")
    if lower is None or upper is None:
        return _num(row[column], 3)
    return interval_text(row[column], lower, upper, 3)


def _glance_frame(data: Evaluation, options: ReportOptions) -> pd.DataFrame:
    programs = data.programs
    return pd.DataFrame({
        "program": programs["program"].to_numpy(object),
        "verdict": programs["verdict"].to_numpy(object),
        "reach": [reach_text(r) for _, r in programs.iterrows()],
        "recipients": counts_text(programs["recipients"], options),
        "observed": counts_text(programs["observed"], options),
        "expected": [_num(e, 1) for e in programs["expected"]],
        "oe": [interval_text(*r)
               for r in programs[["oe_ratio", "oe_lower", "oe_upper"]].to_numpy()],
        "hr": [interval_text(*r)
               for r in programs[["hr_mean", "hr_lower", "hr_upper"]].to_numpy()],
        "p_above": [_num(p, 3) for p in programs["p_above"]],
        "p_below": [_num(p, 3) for p in programs["p_below"]],
        "observed_survival": [_survival_cell(r, "observed_survival")
                              for _, r in programs.iterrows()],
        "expected_survival": [_num(s, 3) for s in programs["expected_survival"]],
    })


def _glance_html(data: Evaluation) -> dict[str, list[Markup]]:
    """The program links and verdict chips of the glance table, kept out of the frame."""
    palette = verdict_colours()
    codes = data.programs["program"]
    return {
        "program": [Markup('<a href="#{}">{}</a>').format(program_anchor(i, code), code)
                    for i, code in enumerate(codes)],
        "verdict": [verdict_html(v, palette) for v in data.programs["verdict"]],
    }


def glance_headers(run: dict) -> dict[str, str]:
    """Column headings of the program table, from run.json's rules, horizon and level."""
    rules, horizon = run["rules"], run["horizon_days"]
    level = run.get("credible_level", 0.95)
    return {
        "program": "Program", "verdict": "Verdict",
        "reach": f"Could be called ({rules.get('power', 0.8):.0%} chance, true HR)",
        "recipients": "Recipients",
        "observed": "Observed (O)", "expected": "Expected (E)", "oe": "O/E (exact 95%)",
        "hr": f"Hazard ratio ({level:.0%} credible)",
        "p_above": f"P(HR\u00a0>\u00a0{rules.get('upper_margin', 1.0):g})",
        "p_below": f"P(HR\u00a0<\u00a0{rules.get('lower_margin', 1.0):g})",
        "observed_survival": f"Observed survival at {horizon} days (95%)",
        "expected_survival": f"Expected survival at {horizon} days",
    }


def overview_section(data: Evaluation, options: ReportOptions) -> Section:
    """The program table: verdict in words with its colour, O, E, O/E, HR and survival."""
    headers = glance_headers(data.run)
    table = table_html(_glance_frame(data, options), headers=headers,
                       numeric=[c for c in headers if c not in ("program", "verdict", "reach")],
                       wide=True, html=_glance_html(data))
    centre = data.run["prior"].get("centre", "the prior's mean")
    intro = Markup(
        "<p>{} The hazard ratio is the observed-to-expected ratio after shrinkage towards "
        "{}: small programs are pulled further towards it. Programs are listed by code. "
        "“Could be called” gives, for each program, the true hazard ratios at which it "
        "would be called excess or favorable with the stated chance: a consistent verdict "
        "where favorable is out of reach says little.</p>"
    ).format(_verdict_counts(data.programs["verdict"]), centre)
    return Section("Programs at a glance", _join(intro, Markup(table)), anchor="programs")


# -- 4. All programs on one scale ----------------------------------------------------------


def scale_section(data: Evaluation, options: ReportOptions) -> Section:
    """Funnel plot and caterpillar plot of all programs."""
    programs = data.programs
    no_e = programs.loc[programs["expected"] <= 0, "program"].tolist()
    levels = " and ".join(f"{lv * 100:g}%" for lv in FUNNEL_LEVELS)
    funnel_caption = (
        f"Each point is a program's observed-to-expected ratio against its expected events. "
        f"The lines are exact Poisson limits ({levels}): if a program's hazard were the "
        "reference's, its O/E would lie above the upper line, or below the lower one, with "
        "a chance of at most half of one minus the level (2.5% and 0.1%) at every E. They "
        "step because events are whole numbers, and narrow as E grows."
    )
    if no_e:
        funnel_caption += f" Not drawn (no expected events): {', '.join(no_e)}."
    if len(programs) > 40:
        funnel_caption += " Only programs outside the widest limits are labelled."
    level = data.run.get("credible_level", 0.95)
    caterpillar_caption = (
        f"Left: hazard ratio after shrinkage with its {level:.0%} credible interval; right: raw "
        "O/E with its exact 95% interval, on the same scale. Sorted by the hazard ratio; an "
        "arrow head marks an interval that runs past the edge of the plot."
    )
    shown = programs[programs["expected"] > 0]
    body = [
        _figure_block(funnel_figure(programs, log_expected=options.log_expected),
                      funnel_caption, "Funnel plot of O/E against expected events"),
    ]
    if len(shown):
        body.append(_figure_block(caterpillar_figure(shown, credible_level=level),
                                  caterpillar_caption,
                                  "Hazard ratios and O/E with their intervals"))
    return Section("All programs on one scale", _join(*body), anchor="scale")


# -- 5. Program by program -----------------------------------------------------------------


def _count_or_none(value) -> int | None:
    return None if value is None or pd.isna(value) else int(value)


def what_if_text(row: pd.Series, min_expected: float = 1.0) -> str:
    """Say in words how far a program's verdict is from changing, in each direction.

    Parameters
    ----------
    row : pandas.Series
        One row of programs.csv (``verdict``, ``expected``, ``events_to_excess``,
        ``events_to_favorable``, ``events_more_to_change``, ``events_fewer_to_change``).
    min_expected : float, default 1.0
        The rules' minimum E for a verdict.
    """
    verdict, expected = row["verdict"], row["expected"]
    if verdict == "too_little_data":
        return (f"Too few expected events for a verdict (E = {expected:.2f}, below the minimum "
                f"of {min_expected:g}); what-if distances are not given.")
    to_excess = _count_or_none(row["events_to_excess"])
    to_favorable = _count_or_none(row["events_to_favorable"])
    more = _count_or_none(row.get("events_more_to_change"))
    fewer = _count_or_none(row.get("events_fewer_to_change"))
    held = f"At the same expected count (E = {expected:.1f}) and with the prior held fixed, "
    if verdict == "excess":
        if fewer is None:
            return held + "no smaller number of events would change the excess verdict."
        goes_to = "favorable" if fewer == to_favorable else "consistent"
        text = f"{plural(fewer, 'fewer event')} would make the verdict {goes_to}"
        if to_favorable is not None and goes_to == "consistent":
            text += f", and {to_favorable} fewer would make it favorable"
        elif to_favorable is None:
            text += "; no count would make it favorable"
        return held + text + "."
    if verdict == "favorable":
        goes_to = "excess" if more == to_excess else "consistent"
        text = f"{plural(more, 'more event')} would make the verdict {goes_to}"
        if goes_to == "consistent":
            text += f", and {to_excess} more would make it excess"
        return held + text + "."
    text = f"{plural(to_excess, 'more event')} would make the verdict excess; "
    if to_favorable is None:
        text += ("favorable is out of reach here: even no events at all would not make it "
                 "favorable")
    else:
        text += f"{to_favorable} fewer would make it favorable"
    return held + text + "."


def reach_text(row: pd.Series) -> str:
    """Which verdicts a program can reach and the true hazard ratios at which it would be.

    Parameters
    ----------
    row : pandas.Series
        One row of programs.csv (``verdict``, ``detectable_hr_excess``,
        ``detectable_hr_favorable``, ``favorable_reachable``).

    Returns
    -------
    str
        E.g. ``"excess if HR ≥ 1.49; favorable if HR ≤ 0.61"`` (non-breaking spaces inside
        each part), or ``"…; favorable out of reach"``; an en dash for too little data.
    """
    if row["verdict"] == "too_little_data" or pd.isna(row.get("detectable_hr_excess")):
        return MISSING
    parts = [f"excess if HR ≥ {row['detectable_hr_excess']:.2f}"]
    if bool(row.get("favorable_reachable")) and not pd.isna(row.get("detectable_hr_favorable")):
        parts.append(f"favorable if HR ≤ {row['detectable_hr_favorable']:.2f}")
    else:
        parts.append("favorable out of reach")
    return "; ".join(part.replace(" ", "\u00a0") for part in parts)


def _at_risk_row(data: Evaluation, code: str, options: ReportOptions) -> list[str]:
    times = data.recipients.loc[data.recipients["program"] == code, "time"].to_numpy(float)
    counts = numbers_at_risk(times, at_risk_times(data.run["horizon_days"]))
    return counts_text(counts, options)


def _program_figures(data: Evaluation, code: str, options: ReportOptions) -> list:
    horizon = data.run["horizon_days"]
    curve = data.curves[data.curves["program"] == code]
    groups = data.casemix[data.casemix["program"] == code]
    blocks = []
    if len(curve):
        fig = survival_figure(curve, horizon_days=horizon,
                              at_risk=_at_risk_row(data, code, options))
        blocks.append(_figure_block(
            fig, "Observed Kaplan-Meier survival (shaded: 95% interval) against the survival "
                 "the reference model expects for these same recipients; numbers still "
                 "followed below.", f"Survival curves of program {code}"))
    else:
        blocks.append(Markup('<p class="note">No survival curve for this program in '
                             "curves.csv.</p>"))
    if len(groups):
        blocks.append(_figure_block(
            casemix_figure(groups),
            "How each covariate group raises (right of 1) or lowers (left of 1) this "
            "program's expected events; it describes the recipients, not the results.",
            f"Case-mix contributions of program {code}"))
    else:
        blocks.append(Markup('<p class="note">No case-mix contributions for this program '
                             "in casemix.csv.</p>"))
    return blocks


def _program_block(data: Evaluation, position: int, row: pd.Series,
                   options: ReportOptions, palette: dict[str, str]) -> Markup:
    code = row["program"]
    facts = Markup("<p>{} · {} {} · observed {} · expected {:.1f} · O/E {} · hazard "
                   "ratio {}</p>").format(
        verdict_html(row["verdict"], palette), _count(row["recipients"], options),
        "recipient" if row["recipients"] == 1 else "recipients",
        _count(row["observed"], options), row["expected"],
        interval_text(row["oe_ratio"], row["oe_lower"], row["oe_upper"]),
        interval_text(row["hr_mean"], row["hr_lower"], row["hr_upper"]))
    rules = data.run["rules"]
    what_if = Markup("<p>{}</p><p>What this program can show: {} (true hazard ratios at which "
                     "the verdict would be reached with a {:.0%} chance, under the rules in "
                     "force).</p>").format(
        what_if_text(row, rules.get("min_expected", 1.0)), reach_text(row),
        rules.get("power", 0.8))
    return Markup('<div class="program" id="{}"><h3>{}</h3>{}{}<div class="pair">{}</div>'
                  "</div>").format(
        program_anchor(position, code), code, facts, what_if,
        Markup("").join(_program_figures(data, code, options)))


def each_program_section(data: Evaluation, options: ReportOptions) -> Section:
    """One sub-section per program (by code): survival curves, case mix, what-if distances."""
    palette = verdict_colours()
    codes = data.programs["program"]
    index = Markup('<ul class="program-index">{}</ul>').format(Markup("").join(
        Markup('<li><a href="#{}">{}</a></li>').format(program_anchor(i, c), c)
        for i, c in enumerate(codes)))
    blocks = [_program_block(data, i, row, options, palette)
              for i, row in data.programs.iterrows()]
    return Section("Program by program", _join(index, *blocks), anchor="each-program")


# -- 6. Data quality -----------------------------------------------------------------------


def data_quality_section(data: Evaluation, options: ReportOptions) -> Section:
    """Exclusions by reason, follow-up completeness and loss to follow-up per program."""
    reasons = exclusions_by_reason(data.exclusions)
    if len(reasons):
        reasons = reasons.assign(records=counts_text(reasons["records"], options))
        excluded = Markup(table_html(reasons, headers={"reason": "Reason",
                                                       "records": "Records excluded"},
                                     numeric=["records"]))
    else:
        excluded = Markup("<p>No records were excluded.</p>")
    followup = data.followup.sort_values("program", kind="stable")
    followup = suppress_counts(followup, ["recipients", "lost_to_followup"],
                               options.suppress_below) if options.suppress_below else followup
    table = table_html(
        followup[["program", "recipients", "completeness", "lost_to_followup"]],
        headers={"program": "Program", "recipients": "Recipients",
                 "completeness": "Follow-up completeness", "lost_to_followup": "Lost to follow-up"},
        formats={"completeness": "{:.1%}"}, numeric=["recipients", "lost_to_followup"])
    note = Markup("<p>Follow-up completeness is the share of the follow-up that would be "
                  "possible up to the horizon or the cut-off that was actually observed.</p>")
    return Section("Data quality", _join(Markup("<h3>Records excluded, by reason</h3>"),
                                         excluded,
                                         Markup("<h3>Records kept with a correction</h3>"),
                                         _corrections_html(data, options),
                                         Markup("<h3>Follow-up per program</h3>"),
                                         note, Markup(table)), anchor="data-quality")


_CORRECTION_WORDS = {
    "event_after_last_seen": "Event after last seen (follow-up extended to the event)",
    "event_after_cutoff": "Event after the cut-off (not counted; follow-up not lengthened)",
    "last_seen_after_cutoff": "Last seen after the cut-off (follow-up ends at the cut-off)",
}


def _corrections_html(data: Evaluation, options: ReportOptions) -> Markup:
    """Corrections of kept records per program and kind (counts suppressed as elsewhere)."""
    if data.corrections is None:
        return Markup("<p>Not recorded: this folder was written by an older version "
                      "without corrections.csv.</p>")
    if data.corrections.empty:
        return Markup("<p>No kept record needed a correction.</p>")
    table = (data.corrections.groupby(["program", "kind"], sort=True).size()
             .unstack("kind", fill_value=0))
    kinds = [k for k in (*_CORRECTION_WORDS, *sorted(table.columns)) if k in table.columns]
    table = table[list(dict.fromkeys(kinds))]
    table["total"] = data.corrections.groupby("program", sort=True)["row"].nunique()
    table = table.reset_index()
    counts = [c for c in table.columns if c != "program"]
    for column in counts:
        table[column] = counts_text(table[column], options)
    headers = {"program": "Program", "total": "Records corrected",
               **{k: _CORRECTION_WORDS.get(k, k) for k in kinds}}
    return Markup(table_html(table, headers=headers, numeric=counts))


# -- 7. The reference model ----------------------------------------------------------------


def model_section(data: Evaluation, options: ReportOptions) -> Section:
    """Coefficients with hazard ratios and confidence limits, and the model's fit facts."""
    model = data.run["model"]
    facts = facts_html([
        ("Recipients", _count(model.get("n"), options)),
        ("Events", _count(model.get("events"), options)),
        ("Concordance (Harrell's C)", _num(model.get("concordance"), 3)),
        ("Ties", model.get("ties")),
        ("Log partial likelihood", _num(model.get("loglik"), 2)),
        ("Model file format", model.get("format_version")),
    ])
    coefficients = data.coefficients[["term", "coef", "se", "hr", "hr_lower", "hr_upper",
                                      "p_value"]]
    table = table_html(
        coefficients,
        headers={"term": "Term", "coef": "Coefficient", "se": "Standard error",
                 "hr": "Hazard ratio", "hr_lower": "95% lower", "hr_upper": "95% upper",
                 "p_value": "p-value"},
        formats={"coef": "{:.4f}", "se": "{:.4f}", "hr": "{:.3f}", "hr_lower": "{:.3f}",
                 "hr_upper": "{:.3f}", "p_value": _p_value})
    return Section("The reference model", _join(Markup(facts), Markup(table)), anchor="model")


def _p_value(p: float) -> str:
    return "< 0.0001" if p < 1e-4 else f"{p:.4f}"


# -- 8. Audit ------------------------------------------------------------------------------


def table_section(name: str, frame: pd.DataFrame) -> Markup:
    """A titled table of one audit table (at most AUDIT_ROWS_SHOWN rows, saying so)."""
    note = ""
    if len(frame) > AUDIT_ROWS_SHOWN:
        note = Markup('<p class="note">The first {} of {} rows; the rest are in {}.</p>').format(
            AUDIT_ROWS_SHOWN, len(frame), f"{name}.csv")
    title = name.replace("_", " ").capitalize()
    return Markup("<h3>{}</h3>{}{}").format(
        title, Markup(table_html(frame.head(AUDIT_ROWS_SHOWN))), note)


def audit_section(audit) -> Section:
    """The audit's findings and every table, in the order of their file names.

    ``audit`` is an :class:`~casemix.audit.Audit` (in memory or read back with
    ``Audit.load``); :func:`casemix.audit.agreement.check_audit` says whether it may be
    shown beside an evaluation.
    """
    listed = (Markup("<ul>{}</ul>").format(Markup("").join(
        Markup("<li>{}</li>").format(f) for f in audit.findings))
        if audit.findings else Markup("<p>The audit listed no findings.</p>"))
    tables = [table_section(name, audit.tables[name]) for name in sorted(audit.tables)]
    return Section("Statistical audit", _join(Markup("<h3>Findings</h3>"), listed, *tables),
                   anchor="audit")
