"""One row per program: recipients, observed and expected events, O/E, survival at the horizon.

Observed survival at the horizon is a Kaplan-Meier estimate (recent recipients have partial
follow-up, so a plain fraction would be biased); expected survival is the average of the
recipients' predicted survival at the horizon under the reference model (direct adjustment).
For an outcome with ``censor_at`` dates (death-censored graft failure) the ends at those dates
compete with the event: the table adds their count and the Aalen-Johansen cumulative
incidence of the event, which is smaller than 1 - Kaplan-Meier when deaths intervene.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from casemix.evaluation.expected import ExpectedEvents
from casemix.model.reference import ReferenceModel
from casemix.stats.poisson import exact_p_values, oe_interval
from casemix.survival import cumulative_incidence, kaplan_meier

__all__ = [
    "MAX_CURVE_POINTS",
    "program_table",
    "survival_curves",
]

MAX_CURVE_POINTS = 400


def program_table(expected: ExpectedEvents, level: float = 0.95) -> pd.DataFrame:
    """Summarise expected events by program.

    Parameters
    ----------
    expected : ExpectedEvents
    level : float, default 0.95
        Level of the exact (Garwood) O/E interval and the Kaplan-Meier limits.

    Returns
    -------
    DataFrame
        Sorted by program: ``program``, ``recipients``, ``observed``, ``expected``,
        ``oe_ratio``, ``oe_lower``, ``oe_upper``, ``observed_survival``,
        ``observed_survival_lower``, ``observed_survival_upper``, ``expected_survival``,
        ``p_more_exact`` (P(Y >= O | E)), ``p_fewer_exact`` (P(Y <= O | E)),
        ``competing_events`` (ends at a ``censor_at`` date) and ``cumulative_incidence``
        (Aalen-Johansen, equal to 1 - observed survival without competing events). Observed
        survival and incidence are NaN when no recipient was followed to the horizon.
    """
    horizon = float(expected.cohort.horizon_days)
    ended = expected.cohort.frame["ended"].to_numpy(dtype=int)
    rows = []
    for program, group in expected.frame.groupby("program", sort=True):
        km = kaplan_meier(group["time"], group["event"], level=level)
        competing = ended[group.index.to_numpy()]
        incidence = cumulative_incidence(group["time"], group["event"] + 2 * competing)
        rows.append(
            {
                "program": program,
                "recipients": len(group),
                "observed": int(group["event"].sum()),
                "expected": float(group["expected"].sum()),
                "observed_survival": float(km.at(horizon)[0]),
                "observed_survival_lower": float(km.lower_at(horizon)[0]),
                "observed_survival_upper": float(km.upper_at(horizon)[0]),
                "expected_survival": float(np.exp(-group["expected_at_horizon"]).mean()),
                "competing_events": int(competing.sum()),
                "cumulative_incidence": float(incidence.at(horizon)[0]),
            }
        )
    table = pd.DataFrame(rows)
    observed = table["observed"].to_numpy()
    exp = table["expected"].to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        table["oe_ratio"] = np.where(exp > 0, observed / exp, np.nan)
    lower, upper = oe_interval(observed, exp, level)
    table["oe_lower"], table["oe_upper"] = lower, upper
    table["p_more_exact"], table["p_fewer_exact"] = exact_p_values(observed, exp)
    return table[
        [
            "program",
            "recipients",
            "observed",
            "expected",
            "oe_ratio",
            "oe_lower",
            "oe_upper",
            "observed_survival",
            "observed_survival_lower",
            "observed_survival_upper",
            "expected_survival",
            "p_more_exact",
            "p_fewer_exact",
            "competing_events",
            "cumulative_incidence",
        ]
    ]


def survival_curves(
    expected: ExpectedEvents, model: ReferenceModel, level: float = 0.95
) -> pd.DataFrame:
    """Observed Kaplan-Meier and expected (directly adjusted) survival per program on a grid.

    The grid runs over whole days from 0 to the horizon (thinned to at most
    ``MAX_CURVE_POINTS`` points). The expected curve at t is the mean over the program's
    recipients of exp(-H0(t) exp(lp_i)); it uses the reference baseline, so it is defined to
    the horizon for every recipient, whatever his or her own follow-up.

    Returns
    -------
    DataFrame
        ``program``, ``time``, ``observed``, ``observed_lower``, ``observed_upper``,
        ``at_risk``, ``expected``.
    """
    horizon = expected.cohort.horizon_days
    step = max(1, int(np.ceil((horizon + 1) / MAX_CURVE_POINTS)))
    grid = np.unique(np.r_[np.arange(0, horizon + 1, step), horizon]).astype(float)
    parts = []
    for program, group in expected.frame.groupby("program", sort=True):
        km = kaplan_meier(group["time"], group["event"], level=level)
        parts.append(
            pd.DataFrame(
                {
                    "program": program,
                    "time": grid,
                    "observed": km.at(grid),
                    "observed_lower": km.lower_at(grid),
                    "observed_upper": km.upper_at(grid),
                    "at_risk": km.at_risk_at(grid),
                    "expected": _expected_curve(model, group, grid),
                }
            )
        )
    return pd.concat(parts, ignore_index=True)


def _expected_curve(model: ReferenceModel, group: pd.DataFrame, grid: np.ndarray) -> np.ndarray:
    """Mean predicted survival of a group of recipients at each grid time."""
    stratified = model.fit.strata_levels != (None,)
    codes = model.fit.stratum_codes(group["stratum"].to_numpy() if stratified else None, len(group))
    risk = np.exp(group["lp"].to_numpy())
    total = np.zeros(grid.size)
    for code, baseline in enumerate(model.fit.baselines):
        rows = codes == code
        if rows.any():
            total += np.exp(-np.outer(baseline.at(grid), risk[rows])).sum(axis=1)
    return total / len(group)
