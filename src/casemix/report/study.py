"""The report of a whole study: an index page, a network page and a page per program.

:func:`render_study_report` turns a :class:`~casemix.evaluation.study.Study` (in memory, or
read back with ``Study.load``) into pages, each one self-contained HTML document made with
:func:`casemix.report.page.render_page` (inline CSS and SVG, no scripts, no outside
requests), so that a program's page can be forwarded on its own:

- ``index.html``: what the report holds, the analyses and a link to every page;
- ``network.html``: what was evaluated (every analysis with its outcome, horizon, cohort
  and reference windows and model), the cautions, the matrix of programs by analyses (verdict
  in words with its colour, hazard ratio with its credible interval), a funnel and a
  caterpillar plot per analysis, and data quality;
- ``programs/<name>.html`` (:func:`page_names`): the program's row of every analysis, then per
  analysis its Kaplan-Meier curve against the expected curve with numbers at risk, its case
  mix in a chart and a sentence, how many events would change its verdict, and its own
  data-quality counts.

Every number is the evaluation's own (programs.csv, curves.csv, casemix.csv, followup.csv),
formatted as in the single report (:mod:`casemix.report.sections`). The figures are light SVG
written directly (:mod:`casemix.report.svg`: why, and what it costs).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from markupsafe import Markup

from casemix._io import atomic_write_text, replace_folder
from casemix.data.cohort import WINDOW_KIND
from casemix.errors import InputError, plural
from casemix.evaluation.evaluate import Evaluation
from casemix.evaluation.study import Study
from casemix.report.build import report_cautions
from casemix.report.page import MISSING, Section, anchor_for, facts_html, render_page, table_html
from casemix.report.plots import FUNNEL_LEVELS, VERDICT_WORDS, at_risk_times, numbers_at_risk
from casemix.report.public import exclusions_by_reason
from casemix.report.sections import (
    ReportOptions,
    counts_text,
    interval_text,
    prior_text,
    reach_text,
    rules_text,
    verdict_html,
    what_if_text,
)
from casemix.report.svg import casemix_svg, caterpillar_svg, funnel_svg, survival_svg
from casemix.stats.verdict import verdict_colours

__all__ = [
    "INDEX_PAGE",
    "NETWORK_PAGE",
    "PROGRAMS_FOLDER",
    "page_names",
    "render_study_report",
    "write_study_report",
]

INDEX_PAGE = "index.html"
NETWORK_PAGE = "network.html"
PROGRAMS_FOLDER = "programs"
_OPTIONS = ReportOptions()


def page_names(codes: Iterable[str]) -> dict[str, str]:
    """Return program code -> file name of its page inside :data:`PROGRAMS_FOLDER`.

    A code is free text ("NA", "007", "A/B", ".."), so the name is a readable part (ASCII
    letters, digits and hyphens, at most 40, from :func:`~casemix.report.page.anchor_for`)
    and the first 8 hex digits of the SHA-256 of the exact code: deterministic, safe on every
    file system and distinct for codes that differ only in case or punctuation.

    Parameters
    ----------
    codes : iterable of str
        The program codes, each once.

    Returns
    -------
    dict
        In the order given; names end in ``.html``.

    Raises
    ------
    InputError
        A code given twice, or two codes with the same name.
    """
    names: dict[str, str] = {}
    for code in map(str, codes):
        if code in names:
            raise InputError(f"program code '{code}' is given twice; give each code once.")
        digest = hashlib.sha256(code.encode("utf-8")).hexdigest()[:8]
        names[code] = f"{anchor_for(code, 'program')[:40].rstrip('-')}-{digest}.html"
    if len(set(names.values())) != len(names):
        raise InputError("two program codes give the same page name; rename one of them.")
    return names


def _program_codes(study: Study) -> list[str]:
    """Every program of every analysis: the first analysis' order, then new ones as met."""
    codes: dict[str, None] = {}
    for evaluation in study.evaluations.values():
        codes.update(dict.fromkeys(map(str, evaluation.programs["program"])))
    return list(codes)


@dataclass(frozen=True)
class _ByProgram:
    """One analysis' tables split by program once (a page per program then only looks up)."""

    rows: dict[str, pd.Series]
    curves: dict[str, pd.DataFrame]
    casemix: dict[str, pd.DataFrame]
    times: dict[str, np.ndarray]
    followup: dict[str, pd.Series]
    excluded: dict[str, dict[str, int]]
    corrected: dict[str, int] | None

    @classmethod
    def of(cls, evaluation: Evaluation) -> _ByProgram:
        def split(frame: pd.DataFrame) -> dict[str, pd.DataFrame]:
            return {str(code): part for code, part in
                    frame.groupby(frame["program"].astype(str), sort=False)}

        other = evaluation.exclusions[evaluation.exclusions["kind"] != WINDOW_KIND]
        excluded: dict[str, dict[str, int]] = {}
        other = other.dropna(subset=["program"])
        counts = other.groupby([other["program"].astype(str), other["kind"]], sort=True).size()
        for (code, kind), n in counts.items():
            excluded.setdefault(str(code), {})[str(kind)] = int(n)
        corrections = evaluation.corrections
        return cls(
            rows={str(r["program"]): r for _, r in evaluation.programs.iterrows()},
            curves=split(evaluation.curves),
            casemix=split(evaluation.casemix),
            times={c: part["time"].to_numpy(float)
                   for c, part in split(evaluation.recipients).items()},
            followup={str(r["program"]): r for _, r in evaluation.followup.iterrows()},
            excluded=excluded,
            corrected=None if corrections is None else {
                c: part["row"].nunique() for c, part in split(corrections).items()},
        )


def _entry(name: str, evaluation: Evaluation) -> dict:
    """The analysis entry of run.json (a single run's facts when it has none)."""
    run = evaluation.run
    model = run.get("model", {})
    return run.get("analysis") or {
        "name": name, "outcome": run["outcome"], "horizon_days": run["horizon_days"],
        "cohort_window": run.get("window"),
        "reference_window": model.get("reference_window", [None, None]),
        "reference_cutoff": model.get("reference_cutoff"), "model_file": None,
    }


def _title(name: str, evaluation: Evaluation) -> str:
    run = evaluation.run
    return (f"{name}: {str(run['outcome']).replace('_', ' ')} within {run['horizon_days']} "
            "days")


def _window(window, open_end: str | None = None) -> str:
    start, end = [*window, None, None][:2] if window else (None, None)
    return f"{start or 'open'} to {end or open_end or 'open'}"


def _study_cautions(study: Study) -> list[str]:
    """Each analysis' report cautions, once; one that only some analyses carry names them."""
    carriers: dict[str, list[str]] = {}
    for name, evaluation in study.evaluations.items():
        for text in report_cautions(evaluation, _OPTIONS):
            carriers.setdefault(text, []).append(name)
    return [text if len(names) == len(study) else f"{', '.join(names)}: {text}"
            for text, names in carriers.items()]


def _page(title: str, sections: list[Section], study: Study, summary: str) -> str:
    version = study.run.get("casemix_version", "(version not recorded)")
    return render_page(title, sections, cautions=_study_cautions(study), cautions_at=1,
                       summary=summary, footer=f"Made with casemix {version}.")


def _summary(study: Study) -> str:
    count = f"{len(study)} analys{'i' if len(study) == 1 else 'e'}s"
    return (f"{count} of "
            f"{plural(len(_program_codes(study)), 'program')}; data to "
            f"{study.run.get('cutoff', MISSING)}.")


def _join(parts: Iterable[object]) -> str:
    return str(Markup("").join(parts))


def _figure(svg: str, caption: str) -> Markup:
    return Markup("<figure>{}<figcaption>{}</figcaption></figure>").format(Markup(svg), caption)


# -- What was evaluated (network page and program pages) -----------------------------------


def _analyses_table(study: Study) -> Markup:
    rows = []
    for name, evaluation in study.evaluations.items():
        entry, run = _entry(name, evaluation), evaluation.run
        model, network = run.get("model", {}), run.get("network") or {}
        rows.append({
            "analysis": name,
            "outcome": str(run["outcome"]).replace("_", " "),
            "horizon": f"{run['horizon_days']} days",
            "cohort": _window(entry.get("cohort_window")),
            "reference": _window(entry.get("reference_window"), entry.get("reference_cutoff"))
            + (" (overlaps the cohort)" if entry.get("reference_overlaps_cohort") else ""),
            "model": f"{entry.get('model_file') or 'model'}: "
                     f"{counts_text([model.get('n', np.nan)], _OPTIONS)[0]} recipients, "
                     f"{counts_text([model.get('events', np.nan)], _OPTIONS)[0]} events, "
                     f"concordance {model.get('concordance', np.nan):.3f}",
            "recipients": counts_text([run["counts"]["kept"]], _OPTIONS)[0],
            "network": "O/E " + interval_text(network.get("oe", np.nan),
                                               network.get("oe_lower", np.nan),
                                               network.get("oe_upper", np.nan))
            + (f"; p = {network['p_value']:.2g}" if "p_value" in network else ""),
        })
    headers = {"analysis": "Analysis", "outcome": "Outcome", "horizon": "Horizon",
               "cohort": "Cohort: transplanted", "reference": "Reference: transplanted",
               "model": "Reference model", "recipients": "Cohort recipients",
               "network": "Whole network (exact 95%)"}
    return Markup(table_html(pd.DataFrame(rows), headers=headers, numeric=["recipients"],
                             wide=True))


def _evaluated_section(study: Study) -> Section:
    first = next(iter(study.evaluations.values())).run
    rules = {rules_text(e.run["rules"]) for e in study.evaluations.values()}
    priors = [f"{name}: {prior_text(e.run['prior'])}" for name, e in study.evaluations.items()]
    facts = facts_html([
        ("Data cut-off", study.run.get("cutoff", first.get("cutoff"))),
        ("Credible intervals", f"{first.get('credible_level', 0.95):.0%}"),
        ("Verdict rules", "; ".join(sorted(rules))),
        ("Prior of each analysis", Markup("<br>").join(priors)),
    ])
    intro = Markup("<p>Each analysis compares every program's observed events with the events "
                   "its own reference model expects for the same recipients, over the cohort "
                   "window of that analysis. Cohort windows differ: a longer horizon needs "
                   "recipients transplanted longer ago.</p>")
    return Section("What was evaluated", _join([intro, _analyses_table(study), Markup(facts)]),
                   anchor="evaluated")


# -- Network page --------------------------------------------------------------------------


def _cell(row: pd.Series | None, palette: dict[str, str]) -> Markup:
    if row is None:
        return Markup('<span class="note">not in this cohort</span>')
    return Markup('{}<br><span class="hr">HR {}</span>').format(
        verdict_html(row["verdict"], palette),
        interval_text(row["hr_mean"], row["hr_lower"], row["hr_upper"]))


def _matrix_section(study: Study, names: Mapping[str, str],
                    split: Mapping[str, _ByProgram]) -> Section:
    palette = verdict_colours()
    codes = list(names)
    rows = {name: part.rows for name, part in split.items()}
    frame = pd.DataFrame({"program": codes, **{
        name: [row[c]["verdict"] if c in row else "" for c in codes]
        for name, row in rows.items()}})
    html = {"program": [Markup('<a href="{}/{}">{}</a>').format(PROGRAMS_FOLDER, names[c], c)
                        for c in codes],
            **{name: [_cell(row.get(c), palette) for c in codes] for name, row in rows.items()}}
    level = next(iter(study.evaluations.values())).run.get("credible_level", 0.95)
    headers = {"program": "Program",
               **{name: _title(name, ev) for name, ev in study.evaluations.items()}}
    counts = Markup("").join(
        Markup("<li>{}: {}</li>").format(name, ", ".join(
            f"{n} {VERDICT_WORDS[v]}" for v, n in ev.programs["verdict"].value_counts()
            .reindex(list(VERDICT_WORDS)).dropna().astype(int).items()))
        for name, ev in study.evaluations.items())
    intro = Markup(
        "<p>One row per program, one column per analysis: the verdict in words (its colour "
        "beside it) and the hazard ratio after shrinkage with its {:.0%} credible interval. "
        "Program codes link to each program's own page.</p><ul>{}</ul>").format(level, counts)
    table = table_html(frame, headers=headers, html=html, wide=True)
    return Section("Every program in every analysis", _join([intro, Markup(table)]),
                   anchor="matrix")


def _scale_section(study: Study, log_expected: bool) -> Section:
    levels = " and ".join(f"{lv * 100:g}%" for lv in FUNNEL_LEVELS)
    blocks = []
    for name, evaluation in study.evaluations.items():
        programs = evaluation.programs
        shown = programs[programs["expected"] > 0]
        level = evaluation.run.get("credible_level", 0.95)
        no_e = programs.loc[programs["expected"] <= 0, "program"].astype(str).tolist()
        funnel_caption = (f"{name}: each point is a program's O/E against its expected events; "
                          f"the lines are exact Poisson limits ({levels}) for a program whose "
                          "hazard is the reference's. They step because events are whole "
                          "numbers." + (" Only points outside the widest limits are labelled."
                                        if len(shown) > 40 else "")
                          + (f" Not drawn (no expected events): {', '.join(no_e)}."
                             if no_e else ""))
        blocks.append(Markup('<h3 id="{}">{}</h3>').format(anchor_for(name, "scale"),
                                                            _title(name, evaluation)))
        blocks.append(_figure(funnel_svg(shown, log_expected=log_expected,
                                         alt=f"Funnel plot of {name}"), funnel_caption))
        if len(shown):
            blocks.append(_figure(
                caterpillar_svg(shown, credible_level=level, alt=f"Hazard ratios of {name}"),
                f"{name}: hazard ratio after shrinkage with its {level:.0%} credible interval "
                "(left) and raw O/E with its exact 95% interval (right), sorted by the hazard "
                "ratio; an arrow head marks an interval past the edge."))
    return Section("All programs on one scale, analysis by analysis", _join(blocks),
                   anchor="scale")


def _other_exclusions(evaluation: Evaluation) -> pd.DataFrame:
    return evaluation.exclusions[evaluation.exclusions["kind"] != WINDOW_KIND]


def _network_quality_section(study: Study) -> Section:
    rows, reasons = [], {}
    for name, evaluation in study.evaluations.items():
        counts = evaluation.run["counts"]
        window = int((evaluation.exclusions["kind"] == WINDOW_KIND).sum())
        followup = evaluation.followup
        low = followup.sort_values(["completeness", "program"], kind="stable").head(1)
        rows.append({
            "analysis": name, "read": counts["read"], "kept": counts["kept"],
            "window": window, "other": counts["excluded"] - window,
            "corrected": counts.get("corrected", np.nan),
            "lost": int(followup["lost_to_followup"].sum()),
            "lowest": (f"{low['completeness'].iloc[0]:.1%} ({low['program'].iloc[0]})"
                       if len(low) else MISSING),
        })
        for reason, n in exclusions_by_reason(_other_exclusions(evaluation)).itertuples(
                index=False):
            reasons.setdefault(str(reason), {})[name] = int(n)
    table = pd.DataFrame(rows)
    numeric = ["read", "kept", "window", "other", "corrected", "lost"]
    for column in numeric:
        table[column] = counts_text(table[column], _OPTIONS)
    headers = {"analysis": "Analysis", "read": "Records read", "kept": "In the cohort",
               "window": "Outside the cohort window", "other": "Excluded for other reasons",
               "corrected": "Kept with a correction", "lost": "Lost to follow-up",
               "lowest": "Lowest follow-up completeness (program)"}
    body = [Markup("<p>One records file serves every analysis, so each analysis leaves out "
                   "the transplants outside its own cohort window; the other exclusions are "
                   "the record checks'. Per program counts are on each program's page.</p>"),
            Markup(table_html(table, headers=headers, numeric=numeric, wide=True))]
    if reasons:
        body += [Markup("<h3>Records excluded for other reasons, by reason</h3>"),
                 Markup(_reasons_table(reasons, list(study)))]
    else:
        body.append(Markup("<p>No record was excluded for a reason other than the cohort "
                           "window.</p>"))
    return Section("Data quality", _join(body), anchor="data-quality")


def _links_section(names: Mapping[str, str], prefix: str) -> Section:
    links = Markup('<ul class="program-index">{}</ul>').format(Markup("").join(
        Markup('<li><a href="{}{}">{}</a></li>').format(prefix, page, code)
        for code, page in names.items()))
    return Section("Program pages", str(links), anchor="program-pages")


def _network_page(study: Study, names: Mapping[str, str], split: Mapping[str, _ByProgram],
                  log_expected: bool) -> str:
    sections = [_evaluated_section(study), _matrix_section(study, names, split),
                _scale_section(study, log_expected), _network_quality_section(study),
                _links_section(names, f"{PROGRAMS_FOLDER}/")]
    return _page("Every program in every analysis: the network", sections, study,
                 _summary(study) + " Each program's own page is linked from its code.")


# -- Program pages -------------------------------------------------------------------------


def _glance_row(name: str, evaluation: Evaluation, row: pd.Series | None,
                palette: dict[str, str]) -> tuple[dict, Markup]:
    if row is None:
        return ({"analysis": name, "verdict": "", "recipients": MISSING, "observed": MISSING,
                 "expected": MISSING, "oe": MISSING, "hr": MISSING, "p_above": MISSING,
                 "survival": MISSING},
                Markup('<span class="note">not in this cohort</span>'))
    survival = interval_text(row["observed_survival"], row["observed_survival_lower"],
                             row["observed_survival_upper"], 3)
    return ({"analysis": _title(name, evaluation), "verdict": row["verdict"],
             "recipients": counts_text([row["recipients"]], _OPTIONS)[0],
             "observed": counts_text([row["observed"]], _OPTIONS)[0],
             "expected": f"{row['expected']:.1f}",
             "oe": interval_text(row["oe_ratio"], row["oe_lower"], row["oe_upper"]),
             "hr": interval_text(row["hr_mean"], row["hr_lower"], row["hr_upper"]),
             "p_above": f"{row['p_above']:.3f}",
             "survival": f"{survival} vs {row['expected_survival']:.3f}"},
            verdict_html(row["verdict"], palette))


def _program_glance(code: str, study: Study, split: Mapping[str, _ByProgram]) -> Section:
    palette = verdict_colours()
    pairs = [_glance_row(name, ev, split[name].rows.get(code), palette)
             for name, ev in study.evaluations.items()]
    frame = pd.DataFrame([p[0] for p in pairs])
    first = next(iter(study.evaluations.values())).run
    level = first.get("credible_level", 0.95)
    headers = {"analysis": "Analysis", "verdict": "Verdict", "recipients": "Recipients",
               "observed": "Observed (O)", "expected": "Expected (E)",
               "oe": "O/E (exact 95%)", "hr": f"Hazard ratio ({level:.0%} credible)",
               "p_above": "P(HR\u00a0>\u00a01)",
               "survival": "Observed survival at the horizon (95%) vs expected"}
    table = table_html(frame, headers=headers, html={"verdict": [p[1] for p in pairs]},
                       numeric=["recipients", "observed", "expected", "oe", "hr", "p_above"],
                       wide=True)
    intro = Markup("<p>Program {} in each analysis: the hazard ratio is the observed-to-"
                   "expected ratio after shrinkage towards the network, so a small program "
                   "is pulled further towards it.</p>").format(code)
    return Section("This program in every analysis", _join([intro, Markup(table)]),
                   anchor="glance")


def _casemix_sentence(groups: pd.DataFrame) -> str:
    total = groups.loc[groups["group"] == "total", "factor"]
    parts = groups[groups["group"] != "total"]
    if total.empty or pd.isna(total.iloc[0]):
        return "No case-mix factor could be computed for this program."
    factor = float(total.iloc[0])
    kind = ("higher" if factor > 1 else "lower") + "-risk than the reference population's "
    text = (f"Case mix: the reference model expects ×{factor:.2f} the events these recipients "
            "would have at the reference population's average risk over the same follow-up "
            f"(recipients {kind}average)" if round(factor, 2) != 1.0 else
            "Case mix: these recipients are of about the reference population's average risk "
            "(×1.00 on expected events)")
    if len(parts):
        largest = parts.iloc[int(np.argmax(parts["contribution"].abs().to_numpy()))]
        text += (f"; the largest part is {str(largest['group']).replace('_', ' ')} "
                 f"(×{float(largest['factor']):.2f})")
    return text + ". It describes the recipients, not the results."


def _analysis_section(code: str, name: str, evaluation: Evaluation, part: _ByProgram,
                      palette: dict[str, str]) -> Section:
    title = _title(name, evaluation)
    row = part.rows.get(code)
    anchor = anchor_for(name, "analysis")
    if row is None:
        return Section(title, str(Markup(
            "<p>Program {} has no recipient in this analysis' cohort.</p>").format(code)),
            anchor=anchor)
    rules = evaluation.run["rules"]
    facts = Markup("<p>{} · {} · observed {} · expected {:.1f} · O/E {} · hazard ratio {}"
                   "</p>").format(
        verdict_html(row["verdict"], palette),
        plural(int(row["recipients"]), "recipient"),
        counts_text([row["observed"]], _OPTIONS)[0], row["expected"],
        interval_text(row["oe_ratio"], row["oe_lower"], row["oe_upper"]),
        interval_text(row["hr_mean"], row["hr_lower"], row["hr_upper"]))
    sentences = Markup("<p>{}</p><p>What this program can show: {} (true hazard ratios at "
                       "which the verdict would be reached with a {:.0%} chance).</p>").format(
        what_if_text(row, rules.get("min_expected", 1.0)), reach_text(row),
        rules.get("power", 0.8))
    horizon = evaluation.run["horizon_days"]
    curve = part.curves.get(code, evaluation.curves.iloc[:0])
    groups = part.casemix.get(code, evaluation.casemix.iloc[:0])
    at_risk = counts_text(numbers_at_risk(part.times.get(code, np.empty(0)),
                                          at_risk_times(horizon)), _OPTIONS)
    figures = []
    if len(curve):
        figures.append(_figure(
            survival_svg(curve, horizon_days=horizon, at_risk=at_risk,
                         alt=f"Survival curves of program {code}, {name}"),
            "Observed Kaplan-Meier survival (shaded: 95% interval) against the survival the "
            "reference model expects for these same recipients; numbers still followed "
            "below."))
    else:
        figures.append(Markup('<p class="note">No survival curve for this program.</p>'))
    casemix = Markup("<p>{}</p>").format(_casemix_sentence(groups))
    if len(groups):
        figures.append(_figure(casemix_svg(groups, alt=f"Case mix of program {code}, {name}"),
                               "How each covariate group raises (right of 1) or lowers (left "
                               "of 1) this program's expected events."))
    body = _join([facts, sentences, casemix, Markup('<div class="pair">{}</div>').format(
        Markup("").join(figures))])
    return Section(title, body, anchor=anchor)


def _program_quality_section(code: str, study: Study,
                             split: Mapping[str, _ByProgram]) -> Section:
    rows, reasons = [], {}
    for name, part in split.items():
        followup = part.followup.get(code)
        excluded = part.excluded.get(code, {})
        rows.append({
            "analysis": name,
            "recipients": np.nan if followup is None else followup["recipients"],
            "completeness": MISSING if followup is None else f"{followup['completeness']:.1%}",
            "lost": np.nan if followup is None else followup["lost_to_followup"],
            "excluded": sum(excluded.values()),
            "corrected": np.nan if part.corrected is None else part.corrected.get(code, 0),
        })
        for reason, n in excluded.items():
            reasons.setdefault(reason, {})[name] = n
    table = pd.DataFrame(rows)
    numeric = ["recipients", "lost", "excluded", "corrected"]
    for column in numeric:
        table[column] = counts_text(table[column], _OPTIONS)
    headers = {"analysis": "Analysis", "recipients": "Recipients in the cohort",
               "completeness": "Follow-up completeness", "lost": "Lost to follow-up",
               "excluded": "Records excluded (other than the window)",
               "corrected": "Kept with a correction"}
    body = [Markup("<p>Follow-up completeness is the share of the follow-up possible up to "
                   "the horizon or the cut-off that was actually observed.</p>"),
            Markup(table_html(table, headers=headers, numeric=numeric, wide=True))]
    if reasons:
        body += [Markup("<h3>This program's excluded records, by reason</h3>"),
                 Markup(_reasons_table(reasons, list(study)))]
    return Section("Data quality of this program", _join(body), anchor="data-quality")


def _reasons_table(reasons: dict[str, dict[str, int]], analyses: list[str]) -> str:
    """Reasons (most records first, ties by reason) by analyses."""
    order = sorted(reasons, key=lambda r: (-sum(reasons[r].values()), r))
    frame = pd.DataFrame([{"reason": r, **{n: counts_text([reasons[r].get(n, 0)],
                                                          _OPTIONS)[0] for n in analyses}}
                          for r in order])
    return table_html(frame, headers={"reason": "Reason"}, numeric=analyses)


def _program_page(code: str, study: Study, split: Mapping[str, _ByProgram],
                  evaluated: Section) -> str:
    palette = verdict_colours()
    sections = [_program_glance(code, study, split)]
    sections += [_analysis_section(code, name, ev, split[name], palette)
                 for name, ev in study.evaluations.items()]
    sections += [_program_quality_section(code, study, split), evaluated]
    back = Markup('<p class="note">Every program: the network page, <a href="../{}">{}</a>, '
                  "in the folder above this page's.</p>").format(NETWORK_PAGE, NETWORK_PAGE)
    sections[0] = Section(sections[0].title, _join([Markup(sections[0].html), back]),
                          anchor=sections[0].anchor)
    return _page(f"Program {code}: every analysis", sections, study, _summary(study))


# -- Index page ----------------------------------------------------------------------------


def _index_page(study: Study, names: Mapping[str, str]) -> str:
    flagged = {code: [] for code in names}
    for name, evaluation in study.evaluations.items():
        for code, verdict in zip(evaluation.programs["program"].astype(str),
                                 evaluation.programs["verdict"], strict=True):
            if verdict in ("excess", "favorable"):
                flagged[code].append(f"{VERDICT_WORDS[verdict]} in {name}")
    pages = Markup(
        '<p><a href="{}">The network page</a>: every analysis, the matrix of programs by '
        "analyses, funnel and caterpillar plots and data quality.</p><p>A page per program "
        "(below), self-contained so that it can be sent on its own.</p>").format(NETWORK_PAGE)
    frame = pd.DataFrame({"program": list(names),
                          "flags": ["; ".join(f) or "consistent or too little data everywhere"
                                    for f in flagged.values()]})
    links = {"program": [Markup('<a href="{}/{}">{}</a>').format(PROGRAMS_FOLDER, page, code)
                         for code, page in names.items()]}
    table = table_html(frame, headers={"program": "Program",
                                       "flags": "Verdicts other than consistent"}, html=links)
    analyses = Markup("<ul>{}</ul>").format(Markup("").join(
        Markup("<li>{}</li>").format(_title(name, ev)) for name, ev in study.evaluations.items()))
    sections = [Section("Pages", _join([pages, analyses]), anchor="pages"),
                Section("Programs", table, anchor="programs")]
    return _page("Study report", sections, study, _summary(study))


def render_study_report(study: Study, *, log_expected: bool = False) -> dict[str, str]:
    """Return the pages of a study's report.

    Parameters
    ----------
    study : Study
        From :func:`~casemix.evaluation.study.evaluate_plan`, or ``Study.load``.
    log_expected : bool, default False
        Logarithmic E axis in the funnel plots.

    Returns
    -------
    dict of str to str
        Relative path -> HTML document: :data:`INDEX_PAGE`, :data:`NETWORK_PAGE` and
        ``programs/<name>`` for every program (:func:`page_names`). The same study always
        gives the same pages.

    Raises
    ------
    InputError
        A study without analyses.
    """
    if not len(study):
        raise InputError("the study has no analysis; nothing to report.")
    names = page_names(_program_codes(study))
    split = {name: _ByProgram.of(ev) for name, ev in study.evaluations.items()}
    pages = {INDEX_PAGE: _index_page(study, names),
             NETWORK_PAGE: _network_page(study, names, split, log_expected)}
    evaluated = _evaluated_section(study)
    for code, page in names.items():
        pages[f"{PROGRAMS_FOLDER}/{page}"] = _program_page(code, study, split, evaluated)
    return pages


def write_study_report(study: Study, folder: str | Path, *,
                       log_expected: bool = False) -> Path:
    """Render a study's report and write its pages into ``folder`` as a whole.

    The folder is replaced atomically (casemix._io.replace_folder): pages of programs no
    longer in the study do not stay. An existing folder must be empty or an earlier report.

    Parameters
    ----------
    study : Study
        As for :func:`render_study_report`.
    folder : str or Path
        The report folder (``casemix`` writes it as ``report/`` inside the study folder).
    log_expected : bool, default False
        As for :func:`render_study_report`.

    Returns
    -------
    Path
        ``folder / "index.html"``.
    """
    pages = render_study_report(study, log_expected=log_expected)

    def write(tmp: Path) -> None:
        (tmp / PROGRAMS_FOLDER).mkdir()
        for path, html in pages.items():
            atomic_write_text(tmp / path, html)

    folder = replace_folder(Path(folder), write,
                            owned=(INDEX_PAGE, NETWORK_PAGE, PROGRAMS_FOLDER))
    return folder / INDEX_PAGE
