"""Independent cross-checks of the reference fit, so that nobody has to take our engine on trust.

* statsmodels ``PHReg`` refits the same design matrix with the same ties (and strata) from
  zero; the largest differences in coefficients, standard errors and log partial likelihood
  are reported.
* lifelines ``CoxPHFitter`` (Efron ties only) refits it too, and each program's expected
  count is recomputed from lifelines' ``baseline_cumulative_hazard_`` read as a
  right-continuous step function at each recipient's own time. Neither statsmodels' baseline
  (one failure time late) nor lifelines' ``predict_cumulative_hazard(times=...)`` (linear
  interpolation between training times) is used for this, as both give other numbers.

Both libraries are optional and imported only here (through ``casemix._optional``).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from casemix._optional import require
from casemix.audit.bootstrap import ProgramArrays

__all__ = ["CROSSCHECK_COLUMNS", "crosscheck_lifelines", "crosscheck_statsmodels"]

CROSSCHECK_COLUMNS = ["library", "quantity", "max_abs_difference", "max_rel_difference", "where"]


def _row(library: str, quantity: str, ours, theirs, labels) -> dict:
    ours, theirs = np.atleast_1d(np.asarray(ours, float)), np.atleast_1d(np.asarray(theirs, float))
    diff = np.abs(ours - theirs)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(theirs != 0, diff / np.abs(theirs), np.where(diff == 0, 0.0, np.inf))
    worst = int(np.argmax(diff))
    return {
        "library": library,
        "quantity": quantity,
        "max_abs_difference": float(diff.max()),
        "max_rel_difference": float(rel.max()),
        "where": str(labels[worst]),
    }


def crosscheck_statsmodels(fit, time, event, X, strata=None) -> pd.DataFrame:
    """Refit with statsmodels PHReg and compare coefficients, standard errors and loglik.

    Parameters
    ----------
    fit : CoxFit
        Our fit of these data.
    time, event : array_like, shape (n,)
    X : array_like, shape (n, p)
    strata : array_like, shape (n,), optional

    Returns
    -------
    DataFrame, shape (3, 5)
        Columns :data:`CROSSCHECK_COLUMNS`; ``where`` names the covariate with the largest
        difference.
    """
    hazard = require("statsmodels.duration.hazard_regression", "the statsmodels cross-check")
    codes = None if strata is None else pd.factorize(np.asarray(strata, dtype=object))[0]
    model = hazard.PHReg(
        np.asarray(time, float), np.asarray(X, float), status=np.asarray(event, float),
        ties=fit.ties, strata=codes,
    )  # fmt: skip
    result = model.fit(method="newton", maxiter=100, tol=1e-10)
    names = list(fit.names)
    return pd.DataFrame(
        [
            _row("statsmodels", "coef", fit.coef, result.params, names),
            _row("statsmodels", "se", fit.se, result.bse, names),
            _row("statsmodels", "loglik", fit.loglik, result.llf, ["model"]),
        ],
        columns=CROSSCHECK_COLUMNS,
    )


def _step_read(times: np.ndarray, values: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Right-continuous step function: the value at the last time <= t (0 before the first)."""
    idx = np.searchsorted(times, t, side="right") - 1
    return np.where(idx >= 0, values[np.clip(idx, 0, None)], 0.0)


def _lifelines_expected(cph, cohort: ProgramArrays, columns, means) -> np.ndarray:
    """Per-recipient E from lifelines' coefficients and step-read baseline."""
    # lifelines' baseline is at the training data's covariate means (all strata pooled)
    lp = (cohort.X - means) @ cph.params_[columns].to_numpy()
    baseline = cph.baseline_cumulative_hazard_
    out = np.empty(cohort.time.size)
    if cohort.strata is None:
        times, values = baseline.index.to_numpy(float), baseline.iloc[:, 0].to_numpy()
        return _step_read(times, values, cohort.time) * np.exp(lp)
    for label in np.unique(cohort.strata):
        rows = cohort.strata == label
        column = baseline[label].dropna()
        out[rows] = _step_read(column.index.to_numpy(float), column.to_numpy(), cohort.time[rows])
    return out * np.exp(lp)


def crosscheck_lifelines(fit, time, event, X, cohort: ProgramArrays, strata=None) -> pd.DataFrame:
    """Refit with lifelines (Efron ties) and compare coefficients and per-program E.

    Parameters
    ----------
    fit : CoxFit
        Our Efron fit of these data.
    time, event : array_like, shape (n,)
    X : array_like, shape (n, p)
    cohort : ProgramArrays
        The evaluation cohort whose expected counts are compared.
    strata : array_like, shape (n,), optional

    Returns
    -------
    DataFrame, shape (2, 5)
        Columns :data:`CROSSCHECK_COLUMNS` for ``coef`` and ``expected`` (per program).
    """
    fitters = require("lifelines", "the lifelines cross-check")
    columns = [f"c{j}" for j in range(fit.coef.size)]
    frame = pd.DataFrame(np.asarray(X, float), columns=columns)
    frame["_time"] = np.asarray(time, float)
    frame["_event"] = np.asarray(event, int)
    options = {}
    ours = cohort.expected(fit)
    if strata is not None:
        # lifelines labels its baseline columns by stratum; strings make the lookup exact
        frame["_stratum"] = np.asarray(strata).astype(str)
        options["strata"] = ["_stratum"]
        cohort = ProgramArrays(
            cohort.time, cohort.X, cohort.strata.astype(str), cohort.code, cohort.programs
        )
    with warnings.catch_warnings():
        # lifelines' own deprecation and convergence chatter is not ours to show
        warnings.simplefilter("ignore")
        cph = fitters.CoxPHFitter().fit(frame, "_time", "_event", **options)
    means = frame[columns].mean().to_numpy()
    theirs = cohort.sums(_lifelines_expected(cph, cohort, columns, means))
    return pd.DataFrame(
        [
            _row("lifelines", "coef", fit.coef, cph.params_[columns], list(fit.names)),
            _row("lifelines", "expected", ours, theirs, list(cohort.programs)),
        ],
        columns=CROSSCHECK_COLUMNS,
    )
