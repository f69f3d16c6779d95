"""Plain-words findings from the audit tables: what a statistician would say first.

Each function reads one table and returns a list of sentences (empty when there is nothing to
say). The thresholds are conventions of the trade (common practice), collected here so that
the report can state them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["THRESHOLDS", "all_findings"]

THRESHOLDS = {
    # a proportional-hazards p-value below this is reported (strict, because registry-sized
    # data make tiny departures significant)
    "ph_p_value": 0.01,
    "overdispersion_p_value": 0.05,
    # bootstrap HR interval this much wider than the plain one is worth a sentence
    "bootstrap_width_ratio": 1.10,
    # relative change of O/E when a program's own recipients leave the reference
    "influence_relative_change": 0.05,
    "fdr_q_value": 0.05,
    # cross-library agreement (docs/validation.md tolerances for Cox fits)
    "crosscheck_coef": 1e-4,
    "crosscheck_se": 1e-4,
    "crosscheck_loglik": 1e-6,
    "crosscheck_expected_relative": 1e-4,
}


def _p(value: float) -> str:
    return "p < 0.001" if value < 0.001 else f"p = {value:.3f}"


def ph_findings(ph: pd.DataFrame, transform: str = "rank") -> list[str]:
    """Covariates whose hazards are not proportional, and the global test."""
    table = ph[ph["transform"] == transform].set_index("term")
    alpha = THRESHOLDS["ph_p_value"]
    out = [
        f"hazards for {term} are not proportional ({_p(row.p_value)}): consider a stratified "
        "or time-split model"
        for term, row in table.drop(index="global").iterrows()
        if row.p_value < alpha
    ]
    glob = table.loc["global"]
    if glob.p_value < alpha and not out:
        out.append(f"the global proportional-hazards test rejects ({_p(glob.p_value)})")
    if not out:
        out.append(
            f"no covariate departs from proportional hazards at the {alpha:g} level "
            f"(global test {_p(glob.p_value)}, {transform} time scale)"
        )
    return out


def concordance_findings(table: pd.DataFrame) -> list[str]:
    """Harrell's C of each population."""
    return [
        f"the model ranks {row.population} recipients' risk with Harrell's C = {row.c:.3f} "
        "(0.5 = chance, 1 = perfect)"
        for row in table.itertuples()
    ]


def calibration_findings(regression: pd.DataFrame, deciles: pd.DataFrame) -> list[str]:
    """Calibration slope and in-the-large that exclude 1, and deciles off the mark."""
    out = []
    for population, part in regression.groupby("population", sort=False):
        slope = part.set_index("term").loc["slope"]
        if slope.lower > 1 or slope.upper < 1:
            steep = "too flat" if slope.estimate > 1 else "too steep"
            out.append(
                f"in the {population} population the model's risk gradient is {steep} "
                f"(calibration slope {slope.estimate:.2f}, 95% CI {slope.lower:.2f} to "
                f"{slope.upper:.2f})"
            )
        large = part.set_index("term").loc["in_the_large"]
        if large.get("events_without_risk", 0) > 0:
            out.append(
                f"in the {population} population {int(large.events_without_risk)} event(s) "
                "happened before the reference population's first event (the model expects "
                "none so early: E = 0); they count in O but cannot enter the calibration "
                "regression"
            )
        if population != "reference" and (large.lower > 1 or large.upper < 1):
            out.append(
                f"overall, the {population} population has O/E = {large.estimate:.2f} (95% CI "
                f"{large.lower:.2f} to {large.upper:.2f}) against the reference"
            )
    for population, part in deciles.groupby("population", sort=False):
        off = part[(part["oe_lower"] > 1) | (part["oe_upper"] < 1)]
        if len(off):
            groups = ", ".join(str(g) for g in off["group"])
            out.append(
                f"in the {population} population, risk group(s) {groups} (1 = lowest risk) "
                "have O/E whose 95% interval excludes 1"
            )
    return out


def dispersion_findings(summary: pd.DataFrame | None) -> list[str]:
    """Whether programs vary more than Poisson chance."""
    if summary is None:
        return []
    row = summary.iloc[0]
    if row.p_value < THRESHOLDS["overdispersion_p_value"]:
        return [
            "after the most extreme programs are winsorised, programs still vary more than "
            f"chance allows (phi = {row.phi:.2f}, {_p(row.p_value)} by simulation; "
            f"between-program SD of O/E tau = {np.sqrt(row.tau2):.2f}): consider funnel limits "
            "adjusted for overdispersion"
        ]
    if row.get("p_value_raw", 1.0) < THRESHOLDS["overdispersion_p_value"]:
        return [
            f"programs vary more than chance allows ({_p(row.p_value_raw)} by simulation, "
            "every program kept), but not once the most extreme are winsorised "
            f"(phi = {row.phi:.2f}, {_p(row.p_value)}): the spread comes from a few outlying "
            "programs, which are judged by their own verdicts"
        ]
    return [
        "programs vary no more than chance allows, with every program kept "
        f"({_p(row.get('p_value_raw', row.p_value))}) or the most extreme winsorised "
        f"(phi = {row.phi:.2f}, {_p(row.p_value)}; p-values by simulation); with few "
        "programs the test has little power (docs/dispersion.md)"
    ]


def prior_findings(wide: pd.DataFrame | None, notes: list[str]) -> list[str]:
    """Programs whose verdict depends on the prior."""
    if wide is None:
        return []
    priors = [c for c in wide.columns if c not in ("program", "changes")]
    out = []
    for row in wide[wide["changes"]].itertuples(index=False):
        values = dict(zip(wide.columns, row, strict=True))
        alternatives = ", ".join(
            f"{values[p]} under {p}" for p in priors[1:] if values[p] != values[priors[0]]
        )
        out.append(
            f"the verdict for {values['program']} depends on the prior: "
            f"{values[priors[0]]} as evaluated, {alternatives}"
        )
    if not out:
        out.append("no verdict changes under any of the priors compared")
    return out + [f"prior note: {n}" for n in notes]


def bootstrap_findings(table: pd.DataFrame | None, failed: int, replicates: int) -> list[str]:
    """Programs whose interval widens once the reference model's uncertainty is counted."""
    if table is None:
        return []
    limit = THRESHOLDS["bootstrap_width_ratio"]
    wide = table[table["width_ratio"] > limit]
    out = [
        f"uncertainty in the reference model widens {row.program}'s hazard-ratio interval by "
        f"{100 * (row.width_ratio - 1):.0f}% (bootstrap of {replicates - failed} refits)"
        for row in wide.itertuples()
    ]
    if not out:
        out.append(
            f"uncertainty in the reference model widens no program's interval by more than "
            f"{100 * (limit - 1):.0f}% ({replicates - failed} bootstrap refits)"
        )
    if failed:
        out.append(f"{failed} of {replicates} bootstrap refits did not converge and were left out")
    return out


def influence_findings(table: pd.DataFrame | None) -> list[str]:
    """Programs that pull the reference towards themselves."""
    if table is None:
        return []
    limit = THRESHOLDS["influence_relative_change"]
    with np.errstate(divide="ignore", invalid="ignore"):
        relative = table["expected"] / table["expected_without"] - 1
    out = [
        f"{row.program}'s own recipients move its O/E from {row.oe_ratio:.2f} to "
        f"{row.oe_ratio_without:.2f} when left out of the reference"
        for row, rel in zip(table.itertuples(), relative, strict=True)
        if abs(rel) >= limit
    ]
    if not out:
        out.append(
            f"no program's O/E moves by {100 * limit:.0f}% or more when its own recipients "
            "leave the reference population"
        )
    return out


def crosscheck_findings(table: pd.DataFrame) -> list[str]:
    """Agreement with statsmodels and lifelines."""
    limits = {
        "coef": THRESHOLDS["crosscheck_coef"],
        "se": THRESHOLDS["crosscheck_se"],
        "loglik": THRESHOLDS["crosscheck_loglik"],
    }
    out = []
    for row in table.itertuples():
        if row.quantity == "expected":
            bad, size = (
                row.max_rel_difference > THRESHOLDS["crosscheck_expected_relative"],
                (f"relative {row.max_rel_difference:.1e}"),
            )
        else:
            bad, size = (
                row.max_abs_difference > limits[row.quantity],
                (f"{row.max_abs_difference:.1e}"),
            )
        verb = "DISAGREES with" if bad else "agrees with"
        out.append(f"the fit {verb} {row.library} on {row.quantity} (largest difference {size})")
    return out


def fdr_findings(table: pd.DataFrame | None) -> list[str]:
    """Programs flagged after false-discovery-rate control, beside their verdicts."""
    if table is None:
        return []
    out = []
    for row in table.itertuples():
        flagged = row.fdr_flag != "none"
        credible = row.verdict in ("excess", "favorable")
        if flagged:
            q = row.q_more if row.fdr_flag == "more_events" else row.q_fewer
            words = "more" if row.fdr_flag == "more_events" else "fewer"
            out.append(
                f"{row.program} has {words} events than expected after false-discovery-rate "
                f"control (q = {q:.3g}); verdict {row.verdict}"
            )
        elif credible:
            out.append(
                f"{row.program}'s verdict {row.verdict} does not survive false-discovery-rate "
                "control across programs"
            )
    return out


def agreement_findings(link: dict | None) -> list[str]:
    """How the audit's verdicts were made, and whether they were checked against an evaluation."""
    if link is None:
        return []
    rules, prior = link["rules"], link["prior"]
    how = (
        f"the audit's verdicts use probability {rules['probability']:g}, margins "
        f"{rules['lower_margin']:g} and {rules['upper_margin']:g}, and the prior "
        f"Gamma({prior['shape']:.4g}, {prior['rate']:.4g}) ({prior['method'].replace('_', ' ')})"
    )
    if link.get("folder") is None:
        return [how + "; pass the evaluation folder to check them against an evaluation"]
    return [
        f"{how}, as the evaluation in {link['folder']} did (same model fingerprint): its "
        f"verdicts agree with that evaluation for all {link['programs_agreeing']} programs"
    ]


def all_findings(audit_tables: dict, facts: dict) -> list[str]:
    """Every finding, in the order of the report."""
    t = audit_tables
    return [
        *agreement_findings(facts.get("evaluation")),
        *ph_findings(t["ph"]),
        *concordance_findings(t["concordance"]),
        *calibration_findings(t["calibration_regression"], t["calibration_risk"]),
        *dispersion_findings(t.get("overdispersion")),
        *prior_findings(t.get("prior_verdicts"), facts.get("prior_notes", [])),
        *bootstrap_findings(
            t.get("bootstrap"), facts.get("bootstrap_failed", 0), facts.get("bootstrap", 0)
        ),
        *influence_findings(t.get("influence")),
        *crosscheck_findings(t["crosscheck"]),
        *fdr_findings(t.get("fdr")),
        *(f"note: {n}" for n in facts.get("notes", [])),
    ]
