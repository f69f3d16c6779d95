"""The audit as one self-contained HTML page: plain headings, labelled columns, figures.

The page is built from the report's shared blocks (``casemix.report.page``) and the figures
of ``casemix.report.audit_plots``. Every table keeps the audit's CSV columns but shows them
under plain labels; wide tables scroll sideways inside their box.
"""

from __future__ import annotations

from markupsafe import Markup

from casemix.report.audit_plots import (
    bootstrap_figure,
    calibration_figure,
    prior_figure,
    schoenfeld_figure,
)
from casemix.report.page import Section, figure_svg, render_page, table_html

__all__ = ["LABELS", "TABLES", "audit_html"]

CAUTIONS = (
    "These checks describe the reference model and the spread of programs; they are "
    "statistical diagnostics, not findings about any program's care.",
    "With registry-sized data, small departures from the model's assumptions become "
    "statistically significant; judge their size as well as their p-value.",
)

# table -> (heading, one sentence on how to read it)
TABLES = {
    "ph": ("Tests per model term (Grambsch-Therneau)",
           "Each term's scaled Schoenfeld residuals tested for a trend against several "
           "scales of time (identity, log, rank, 1 - KM after and before each drop); a "
           "small p-value says its hazard ratio changes with time."),
    "joint_tests": ("Joint tests per covariate",
                    "A spline or categorical covariate tested as a whole: the Wald test of "
                    "all its coefficients being zero, and the proportional-hazards test of "
                    "all its columns (rank time scale)."),
    "concordance": ("Concordance (Harrell's C)",
                    "The share of comparable pairs whose earlier failure had the higher "
                    "predicted risk; 0.5 is chance."),
    "calibration_risk": ("Observed and expected events by risk group",
                         "Tenths of predicted risk; risk is the log relative risk against "
                         "the reference population's average recipient, for both "
                         "populations."),
    "calibration_regression": ("Calibration in the large and calibration slope",
                               "Poisson regressions of the events on log E: an overall O/E of "
                               "1 and a slope of 1 mean a well calibrated model."),
    "calibration_horizon": ("Calibration at each follow-up time",
                            "O/E and the calibration slope with follow-up cut at each time."),
    "calibration_size": ("Observed and expected events by program size",
                         "Programs in thirds of their number of recipients."),
    "overdispersion": ("Do programs vary more than chance?",
                       "Winsorised z-scores; the p-value comes from data simulated without "
                       "extra spread (see docs/dispersion.md for the test's size and power)."),
    "dispersion_programs": ("Programs' z-scores and widened funnel limits", ""),
    "prior_verdicts": ("Verdicts under other priors",
                       "The evaluation's verdict rules with each prior in turn."),
    "bootstrap": ("Uncertainty of each program's E",
                  "Bootstrap of the reference fit (percentile interval of E) and the delta "
                  "method, and the hazard-ratio interval with that uncertainty included."),
    "bootstrap_coefficients": ("Bootstrap standard errors of the coefficients", ""),
    "influence": ("Each program's own recipients in the reference",
                  "E recomputed with the program's own recipients left out of the reference "
                  "fit."),
    "crosscheck": ("Agreement with independent libraries",
                   "The reference fit recomputed by statsmodels and lifelines."),
    "fdr": ("Multiplicity: false-discovery-rate control",
            "Exact Poisson p-values of each program with Benjamini-Hochberg q-values, beside "
            "the verdicts."),
}

_SECTIONS = (
    ("Proportional hazards", ("ph", "joint_tests")),
    ("Discrimination", ("concordance",)),
    ("Calibration", ("calibration_risk", "calibration_regression", "calibration_horizon",
                     "calibration_size")),
    ("Spread of programs", ("overdispersion", "dispersion_programs")),
    ("Sensitivity to the prior", ("prior_verdicts",)),
    ("Uncertainty of the reference model", ("bootstrap", "bootstrap_coefficients")),
    ("Own-data influence", ("influence",)),
    ("Independent cross-check", ("crosscheck",)),
    ("Multiplicity", ("fdr",)),
)

LABELS = {
    "transform": "Time scale", "term": "Term", "statistic": "Statistic",
    "df": "Degrees of freedom", "p_value": "p-value", "covariate": "Covariate",
    "columns": "Columns", "wald": "Wald statistic", "wald_p_value": "Wald p-value",
    "ph_statistic": "PH statistic", "ph_p_value": "PH p-value", "population": "Population",
    "c": "C", "group": "Group", "risk_low": "Risk from", "risk_high": "Risk to",
    "units": "Recipients", "observed": "Observed (O)", "expected": "Expected (E)",
    "oe_ratio": "O/E", "oe_lower": "O/E lower 95%", "oe_upper": "O/E upper 95%",
    "estimate": "Estimate", "lower": "Lower 95%", "upper": "Upper 95%", "null": "Null value",
    "recipients": "Recipients", "events_without_risk": "Events with E = 0",
    "horizon": "Follow-up (days)", "slope": "Slope", "slope_lower": "Slope lower 95%",
    "slope_upper": "Slope upper 95%", "size": "Size", "recipients_low": "Recipients from",
    "recipients_high": "Recipients to", "programs": "Programs", "phi": "phi",
    "simulations": "Simulations", "p_value_raw": "p-value, every program kept",
    "tau2": "tau squared", "z_low": "z winsorised from",
    "z_high": "z winsorised to", "program": "Program", "z": "z", "z_winsorised": "z winsorised",
    "hr_mean": "HR mean", "hr_lower": "HR lower", "hr_upper": "HR upper",
    "changes": "Verdict changes", "verdict": "Verdict", "coef": "Coefficient",
    "se": "Standard error", "se_bootstrap": "Bootstrap standard error",
    "expected_lower": "E lower (bootstrap)", "expected_upper": "E upper (bootstrap)",
    "hr_lower_boot": "HR lower, E uncertain", "hr_upper_boot": "HR upper, E uncertain",
    "width_ratio": "Interval width ratio", "expected_se": "E standard error (delta)",
    "delta_lower": "E lower (delta)", "delta_upper": "E upper (delta)", "library": "Library",
    "quantity": "Quantity",
    "max_abs_difference": "Largest absolute difference",
    "max_rel_difference": "Largest relative difference", "q_more": "q (more events)",
    "q_fewer": "q (fewer events)", "p_more": "p (more events)", "p_fewer": "p (fewer events)",
}


def _label(column: str) -> str:
    if column in LABELS:
        return LABELS[column]
    for value, words in (("statistic_", "Statistic, "), ("p_value_", "p-value, ")):
        if column.startswith(value):
            return words + column[len(value):].replace("_", " ") + " time"
    for prefix, words in (("multiplicative_", "phi-widened "), ("additive_", "tau-widened ")):
        if column.startswith(prefix):
            rest = column[len(prefix):].replace("_998", " 99.8%").replace("_95", " 95%")
            return words + rest
    return column.replace("_", " ")


def _ph_wide(table):
    """One row per term, a statistic and a p-value column per time scale."""
    wide = table.pivot(index="term", columns="transform", values=["statistic", "p_value"])
    order = list(dict.fromkeys(table["transform"]))
    columns = [(v, t) for t in order for v in ("statistic", "p_value")]
    wide = wide[columns].reindex(list(dict.fromkeys(table["term"])))
    wide.columns = [f"{v}_{t}" for v, t in columns]
    wide.insert(0, "df", table.drop_duplicates("term").set_index("term")["df"])
    return wide.reset_index()


def _table(name: str, table) -> Markup:
    heading, text = TABLES.get(name, (name.replace("_", " ").capitalize(), ""))
    if name == "ph":
        table = _ph_wide(table)
    intro = Markup("<p>{}</p>").format(text) if text else Markup("")
    headers = {c: _label(str(c)) for c in table.columns}
    return Markup("<h3>{}</h3>{}{}").format(heading, intro, Markup(table_html(table,
                                                                              headers=headers)))


def _figure(fig, alt: str, caption: str) -> Markup:
    return Markup("<figure>{}<figcaption>{}</figcaption></figure>").format(
        Markup(figure_svg(fig, alt=alt)), caption
    )


def _figures(title: str, audit) -> list[Markup]:
    t = audit.tables
    if title == "Proportional hazards" and audit.schoenfeld is not None:
        coefficients = t["coefficients"]
        fig = schoenfeld_figure(
            audit.schoenfeld, coefficients["coef"].to_numpy(), list(coefficients["term"])
        )
        return [_figure(fig, "beta(t) against time, one panel per model term",
                        "Scaled Schoenfeld residuals plus the coefficient (grey), their "
                        "least-squares spline smooth with a pointwise 95% band (blue) and the "
                        "model's constant coefficient (dashed). A smooth whose band holds the "
                        "dashed line is consistent with proportional hazards.")]
    if title == "Calibration":
        return [_figure(calibration_figure(t["calibration_risk"]),
                        "Observed against expected events by risk group",
                        "Observed against expected events in each tenth of predicted risk, "
                        "with exact 95% intervals of O; points on the dashed line are well "
                        "calibrated.")]
    if title == "Uncertainty of the reference model" and "bootstrap_draws" in t:
        expected = t["bootstrap"].set_index("program")["expected"]
        return [_figure(bootstrap_figure(t["bootstrap_draws"], expected),
                        "Bootstrap distribution of each program's expected events",
                        "Each program's E over the bootstrap refits of the reference model, "
                        "relative to its E (box: middle half; whiskers: 1.5 box lengths).")]
    if title == "Sensitivity to the prior" and "prior_sensitivity" in t:
        return [_figure(prior_figure(t["prior_sensitivity"]),
                        "Each program's hazard-ratio interval under each prior",
                        "Each program's posterior mean and credible interval of the hazard "
                        "ratio under the evaluation's prior and the alternatives; gamma s "
                        "is Gamma(s, s) with mean 1.")]
    return []


def audit_html(audit) -> str:
    """Render an :class:`~casemix.audit.Audit` as one HTML document."""
    findings = Markup("<ul>{}</ul>").format(
        Markup("").join(Markup("<li>{}</li>").format(f) for f in audit.findings)
    )
    sections = [Section("Findings", findings)]
    for title, names in _SECTIONS:
        parts = [_table(name, audit.tables[name]) for name in names if name in audit.tables]
        if parts:
            parts[1:1] = _figures(title, audit)
            sections.append(Section(title, Markup("").join(parts)))
    return render_page("Statistical audit", sections, cautions=list(CAUTIONS), cautions_at=1)
