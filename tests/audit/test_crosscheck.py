"""Cross-checks against statsmodels and lifelines: agreement, and a detected disagreement."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from audit_helpers import ROSSI_FULL

from casemix.audit import ProgramArrays, crosscheck_lifelines, crosscheck_statsmodels
from casemix.survival import fit_cox


def _arrays(rossi):
    return rossi["week"], rossi["arrest"], rossi[list(ROSSI_FULL)].to_numpy(float)


def test_statsmodels_agrees_and_a_wrong_fit_is_caught(rossi, rossi_fit):
    table = crosscheck_statsmodels(rossi_fit, *_arrays(rossi)).set_index("quantity")
    # docs/validation.md tolerances for Cox fits: coef, SE abs 1e-4; loglik abs 1e-6
    # (REFERENCE LIBRARY statsmodels PHReg, Efron ties).
    assert table.loc["coef", "max_abs_difference"] < 1e-6
    assert table.loc["se", "max_abs_difference"] < 1e-6
    assert table.loc["loglik", "max_abs_difference"] < 1e-6
    off = replace(rossi_fit, coef=rossi_fit.coef + np.r_[0.0, 0.01, 0, 0, 0, 0, 0])
    wrong = crosscheck_statsmodels(off, *_arrays(rossi)).set_index("quantity")
    assert wrong.loc["coef", "max_abs_difference"] == pytest.approx(0.01, abs=1e-6)
    assert wrong.loc["coef", "where"] == "age"


def test_breslow_ties_and_strata(rossi):
    time, event, X = _arrays(rossi)
    names = [n for n in ROSSI_FULL if n != "race"]
    X = rossi[names].to_numpy(float)
    fit = fit_cox(time, event, X, ties="breslow", strata=rossi["race"].to_numpy(), names=names)
    table = crosscheck_statsmodels(fit, time, event, X, rossi["race"]).set_index("quantity")
    assert table["max_abs_difference"].max() < 1e-6


def test_lifelines_expected_counts(rossi):
    # docs/validation.md section 5, model B: reference fin = 0, cohort fin = 1; cohort
    # E = 74.7406 by step evaluation (lifelines baseline read as a step function).
    names = ["age", "race", "wexp", "mar", "paro", "prio"]
    ref, coh = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    fit = fit_cox(ref["week"], ref["arrest"], ref[names].to_numpy(float), names=names)
    cohort = ProgramArrays.build(
        coh["week"], coh[names].to_numpy(float), None, np.where(coh["wexp"] == 1, "W", "N")
    )
    table = crosscheck_lifelines(
        fit, ref["week"], ref["arrest"], ref[names].to_numpy(float), cohort
    ).set_index("quantity")
    assert cohort.expected(fit).sum() == pytest.approx(74.7406, rel=1e-5)
    # lifelines stops about 4e-5 from the optimum (docs/validation.md section 3.7)
    assert table.loc["coef", "max_abs_difference"] < 1e-4
    assert table.loc["expected", "max_rel_difference"] < 1e-5


def test_lifelines_expected_counts_with_strata(rossi):
    names = ["fin", "age", "wexp", "mar", "paro", "prio"]
    time, event = rossi["week"], rossi["arrest"]
    X = rossi[names].to_numpy(float)
    strata = rossi["race"].to_numpy()
    fit = fit_cox(time, event, X, strata=strata, names=names)
    cohort = ProgramArrays.build(time, X, strata, np.where(rossi["paro"] == 1, "P", "Q"))
    table = crosscheck_lifelines(fit, time, event, X, cohort, strata).set_index("quantity")
    # on the fitting data the Breslow E sum to the 114 events (docs/validation.md section 4)
    assert cohort.expected(fit).sum() == pytest.approx(114, abs=1e-8)
    assert table.loc["expected", "max_rel_difference"] < 1e-4
