"""A small but realistic evaluation folder, written with the exact file contract.

The data are a seeded simulation with a known truth (invented programs of the fictional
Lorran Valley network): exponential event times with a known baseline hazard, so each
recipient's expected count is exactly its cumulative hazard. The derived columns are
computed with reference libraries, not with casemix: Kaplan-Meier curves and numbers at risk
with statsmodels SurvfuncRight (its Greenwood standard error on the log(-log) scale for the
limits), Garwood limits with scipy.stats.chi2, gamma posteriors with scipy.stats.gamma, the
coefficient table with statsmodels PHReg (Efron ties) and Harrell's C by brute force over pairs.
statsmodels, not lifelines, so that the report tests run in the plain install too.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.duration.hazard_regression import PHReg
from statsmodels.duration.survfunc import SurvfuncRight

HORIZON = 365
BASELINE = 2.5e-4  # events per day at lp = 0
PRIOR = (2.0, 2.0)  # gamma shape, rate
PROGRAMS = {  # code: (recipients, true hazard ratio)
    "LV01": (260, 1.0),
    "LV02": (180, 1.7),
    "LV03": (320, 0.55),
    "LV04": (90, 1.1),
    "LV05": (8, 1.0),
    "LV06": (140, 0.9),
}


def _recipients(rng: np.random.Generator, programs: dict) -> pd.DataFrame:
    frames = []
    for code, (n, hr) in programs.items():
        age = rng.normal(52, 12, n).round()
        diabetes = rng.binomial(1, 0.3, n)
        deceased = rng.binomial(1, 0.7, n)
        lp = 0.03 * (age - 52) + 0.45 * diabetes + 0.35 * deceased
        event_time = rng.exponential(1.0 / (BASELINE * np.exp(lp) * hr))
        censor = rng.uniform(120, 900, n)  # staggered entry: some have partial follow-up
        end = np.minimum(censor, HORIZON)
        event = event_time <= end
        time = np.ceil(np.where(event, event_time, end))  # whole days, as in an extract
        frames.append(pd.DataFrame({
            "program": code, "time": time, "event": event.astype(int),
            "lp": lp, "age": age, "diabetes": diabetes, "deceased": deceased,
        }))
    frame = pd.concat(frames, ignore_index=True)
    frame["expected"] = BASELINE * np.exp(frame["lp"]) * frame["time"]
    frame.insert(0, "recipient", [f"R{i:05d}" for i in range(len(frame))])
    frame["stratum"] = ""
    return frame


def _verdict_distances(o: int, e: float) -> tuple[float, float]:
    a, b = PRIOR
    excess = next(k for k in range(10_000) if stats.gamma.sf(1, a + o + k, scale=1 / (b + e))
                  >= 0.975)
    favorable = next((m for m in range(o + 1)
                      if stats.gamma.cdf(1, a + o - m, scale=1 / (b + e)) >= 0.975), np.nan)
    return float(excess), float(favorable)


def _kaplan_meier(time: np.ndarray, event: np.ndarray) -> pd.DataFrame:
    """Kaplan-Meier from time 0 with 95% log(-log) limits (every time <= HORIZON here)."""
    sf = SurvfuncRight(time, event)
    s, se = sf.surv_prob, sf.surv_prob_se
    with np.errstate(divide="ignore", invalid="ignore"):
        half = stats.norm.ppf(0.975) * se / np.abs(s * np.log(s))
        lower, upper = s ** np.exp(half), s ** np.exp(-half)
    return pd.DataFrame({
        "time": np.r_[0.0, sf.surv_times], "observed": np.r_[1.0, s],
        "observed_lower": np.r_[1.0, np.where(s > 0, lower, 0.0)],
        "observed_upper": np.r_[1.0, np.where(s > 0, upper, 0.0)],
        "at_risk": np.r_[len(time), sf.n_risk],
    })


def _program_row(code: str, group: pd.DataFrame) -> tuple[dict, pd.DataFrame]:
    a, b = PRIOR
    o, e = int(group["event"].sum()), float(group["expected"].sum())
    km = _kaplan_meier(group["time"].to_numpy(float), group["event"].to_numpy())
    curve = km.assign(program=code)[["program", "time", "observed", "observed_lower",
                                      "observed_upper", "at_risk"]]
    hazard = BASELINE * np.exp(group["lp"].to_numpy())
    curve["expected"] = [np.exp(-hazard * t).mean() for t in curve["time"]]
    post = stats.gamma(a + o, scale=1 / (b + e))
    excess, favorable = _verdict_distances(o, e)
    p_above, p_below = post.sf(1), post.cdf(1)
    verdict = ("too_little_data" if e < 1 else "excess" if p_above >= 0.975
               else "favorable" if p_below >= 0.975 else "consistent")
    row = {
        "program": code, "recipients": len(group), "observed": o, "expected": e,
        "oe_ratio": o / e, "hr_mean": post.mean(), "hr_lower": post.ppf(0.025),
        "hr_upper": post.ppf(0.975), "p_above": p_above, "p_below": p_below,
        "verdict": verdict, "observed_survival": float(km["observed"].iloc[-1]),
        "expected_survival": float(np.exp(-hazard * HORIZON).mean()),
        "oe_lower": (stats.chi2.ppf(0.025, 2 * o) / 2 if o else 0.0) / e,
        "oe_upper": stats.chi2.ppf(0.975, 2 * o + 2) / 2 / e,
        "hr_median": post.median(), "weight": e / (b + e),
        "observed_survival_lower": float(km["observed_lower"].iloc[-1]),
        "observed_survival_upper": float(km["observed_upper"].iloc[-1]),
        "events_to_excess": np.nan if verdict == "too_little_data" else excess,
        "events_to_favorable": np.nan if verdict == "too_little_data" else favorable,
        "p_more_exact": stats.poisson.sf(o - 1, e), "p_fewer_exact": stats.poisson.cdf(o, e),
    }
    return row, curve


def _casemix(recipients: pd.DataFrame) -> pd.DataFrame:
    parts = {"recipient age": 0.03 * (recipients["age"] - 52),
             "diabetes": 0.45 * recipients["diabetes"],
             "donor type": 0.35 * recipients["deceased"]}
    rows = []
    for code, index in recipients.groupby("program", sort=True).groups.items():
        total = 0.0
        for group, values in parts.items():
            contribution = float(values[index].mean() - values.mean())
            total += contribution
            rows.append({"program": code, "group": group, "contribution": contribution,
                         "factor": np.exp(contribution)})
        rows.append({"program": code, "group": "total", "contribution": total,
                     "factor": np.exp(total)})
    return pd.DataFrame(rows)


def _coefficients(recipients: pd.DataFrame) -> tuple[pd.DataFrame, float]:
    names = ["age", "diabetes", "deceased"]
    fit = PHReg(recipients["time"], recipients[names].to_numpy(float),
                status=recipients["event"], ties="efron").fit()
    limits = np.exp(fit.conf_int())
    table = pd.DataFrame({
        "term": names, "coef": fit.params, "se": fit.bse, "hr": np.exp(fit.params),
        "hr_lower": limits[:, 0], "hr_upper": limits[:, 1], "p_value": fit.pvalues,
    })
    return table, _harrell_c(recipients, table["coef"].to_numpy())


def _harrell_c(recipients: pd.DataFrame, coef: np.ndarray) -> float:
    """Harrell's C by brute force: pairs where the earlier time is an event; ties in risk 1/2."""
    time, event = recipients["time"].to_numpy(), recipients["event"].to_numpy().astype(bool)
    risk = recipients[["age", "diabetes", "deceased"]].to_numpy(float) @ coef
    usable = event[:, None] & (time[:, None] < time[None, :])
    higher = (risk[:, None] > risk[None, :]) + 0.5 * (risk[:, None] == risk[None, :])
    return float((higher * usable).sum() / usable.sum())


def write_evaluation_folder(folder: Path, programs: dict | None = None, seed: int = 11,
                            cautions: tuple[str, ...] = ()) -> Path:
    """Write the eight files of an evaluation folder and return the folder."""
    programs = PROGRAMS if programs is None else programs
    rng = np.random.default_rng(seed)
    recipients = _recipients(rng, programs)
    rows, curves = zip(*(_program_row(code, g) for code, g in
                         recipients.groupby("program", sort=False)), strict=True)
    folder.mkdir(parents=True, exist_ok=True)
    pd.DataFrame(list(rows)).to_csv(folder / "programs.csv", index=False)
    recipients[["recipient", "program", "time", "event", "expected", "lp", "stratum"]].to_csv(
        folder / "recipients.csv", index=False)
    pd.concat(curves, ignore_index=True).to_csv(folder / "curves.csv", index=False)
    _casemix(recipients).to_csv(folder / "casemix.csv", index=False)
    coefficients, concordance = _coefficients(recipients)
    coefficients.to_csv(folder / "coefficients.csv", index=False)
    pd.DataFrame({"row": [3, 17, 18, 40], "recipient": ["X1", "X2", "X3", "X4"],
                  "reason": ["graft_loss_date 2021-01-02 is before the transplant date 2021-02-03",
                             "program (column 'program') is missing",
                             "program (column 'program') is missing",
                             "transplanted 2025-08-31, after the cut-off 2025-06-30"],
                  "kind": ["event before transplant", "missing program",
                           "missing program", "transplant after cut-off"]}).to_csv(
        folder / "exclusions.csv", index=False)
    followup = recipients.groupby("program", sort=False).agg(recipients=("time", "size"))
    followup["completeness"] = np.linspace(0.91, 0.99, len(followup))
    followup["lost_to_followup"] = (followup["recipients"] // 25).astype(int)
    followup.reset_index().to_csv(folder / "followup.csv", index=False)
    run = {
        "casemix_version": "0.1.0", "outcome": "graft_failure", "horizon_days": HORIZON,
        "cutoff": "2025-06-30", "window": ["2022-01-01", "2024-12-31"],
        "inputs": {"cohort": {"path": "cohort.csv", "sha256": "0" * 64},
                   "model": {"path": "model.json", "sha256": "1" * 64}},
        "model": {"fingerprint": "ab12cd34", "n": 20412, "events": 1730, "ties": "efron",
                  "loglik": -15234.5, "concordance": concordance, "format_version": 1},
        "prior": {"shape": PRIOR[0], "rate": PRIOR[1], "mean": 1.0, "method": "fixed",
                  "free_mean": False, "log_marginal": None, "at_boundary": False,
                  "note": "A fixed gamma prior with mean 1 was used."},
        "credible_level": 0.95,
        "rules": {"probability": 0.975, "upper_margin": 1.0, "lower_margin": 1.0,
                  "min_expected": 1.0, "credible_level": 0.95},
        "counts": {"read": len(recipients) + 4, "kept": len(recipients), "excluded": 4},
        "cautions": list(cautions),
    }
    (folder / "run.json").write_text(json.dumps(run, indent=2), encoding="utf-8")
    return folder


@pytest.fixture(scope="session")
def evaluation_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The default folder: six programs, one of them small (8 recipients)."""
    return write_evaluation_folder(tmp_path_factory.mktemp("evaluation"))


@pytest.fixture
def corrections_folder(evaluation_folder, tmp_path) -> Path:
    """The default folder plus corrections.csv: 4 corrections of 3 records in 2 programs."""
    folder = tmp_path / "evaluation"
    shutil.copytree(evaluation_folder, folder)
    pd.DataFrame({"row": [5, 9, 9, 12], "recipient": ["C1", "C2", "C2", "C3"],
                  "program": ["LV01", "LV03", "LV03", "LV03"],
                  "kind": ["event_after_last_seen", "event_after_last_seen",
                           "last_seen_after_cutoff", "event_after_cutoff"]}).to_csv(
        folder / "corrections.csv", index=False)
    return folder


@pytest.fixture(scope="session")
def folder_factory():
    """The folder writer itself, for tests that need other programs or cautions."""
    return write_evaluation_folder
