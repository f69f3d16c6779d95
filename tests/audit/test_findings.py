"""Plain-words findings from tables computed on rossi and the invented 8-unit table."""

from __future__ import annotations

import pandas as pd
from audit_helpers import ROSSI_FULL
from scipy import stats

from casemix.audit import overdispersion, ph_test
from casemix.audit.findings import crosscheck_findings, dispersion_findings, ph_findings


def test_ph_findings_name_the_covariates(rossi, rossi_fit):
    table = ph_test(rossi_fit, rossi["week"], rossi["arrest"], rossi[list(ROSSI_FULL)])
    found = ph_findings(table.reset_index().assign(transform="rank"))
    # docs/validation.md section 10, lifelines rank: age 11.45350, wexp 7.31493 on 1 df;
    # p from scipy.stats.chi2: 0.00071 and 0.0068, both below 0.01; the others above.
    assert stats.chi2.sf(7.31493, 1) < 0.01 < stats.chi2.sf(1.42648, 1)
    assert found == [
        "hazards for age are not proportional (p < 0.001): consider a stratified or "
        "time-split model",
        "hazards for wexp are not proportional (p = 0.007): consider a stratified or "
        "time-split model",
    ]


def test_dispersion_and_crosscheck_wording():
    # invented 8-unit table of test_dispersion.py: n phi = 32.08, simulated p < 0.005
    result = overdispersion([2, 9, 15, 1, 22, 4, 30, 0], [5.1, 4.2, 8.3, 3.7, 12.5, 6.0, 18.2, 2.4])
    summary = pd.DataFrame([{"phi": result.phi, "p_value": result.p_value, "tau2": result.tau2}])
    (sentence,) = dispersion_findings(summary)
    assert "programs still vary more than chance allows (phi = 4.01, p < 0.001" in sentence
    table = pd.DataFrame(
        [
            {"library": "statsmodels", "quantity": "coef", "max_abs_difference": 2e-3,
             "max_rel_difference": 0.1, "where": "age"},
            {"library": "lifelines", "quantity": "expected", "max_abs_difference": 1e-3,
             "max_rel_difference": 2e-6, "where": "A"},
        ]
    )  # fmt: skip
    found = crosscheck_findings(table)
    assert found[0].startswith("the fit DISAGREES with statsmodels on coef")
    assert found[1].startswith("the fit agrees with lifelines on expected")
