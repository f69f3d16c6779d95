"""Joint Wald tests against statsmodels on the rossi data shipped with lifelines."""

from __future__ import annotations

import numpy as np
import pytest
from audit_helpers import ROSSI_FULL
from statsmodels.duration.hazard_regression import PHReg

from casemix.audit.wald import wald_groups
from casemix.errors import InputError


def test_groups_match_statsmodels_wald_test(rossi):
    # REFERENCE LIBRARY statsmodels PHReg (Breslow ties) wald_test with its own estimates and
    # covariance; the single-column groups are the squared z-statistics
    X = rossi[list(ROSSI_FULL)].to_numpy(float)
    result = PHReg(rossi["week"], X, status=rossi["arrest"], ties="breslow").fit()
    groups = ["fin", "age", "background", "background", "mar", "paro", "prio"]
    ours = wald_groups(result.params, result.cov_params(), groups)
    R = np.zeros((2, 7))
    R[0, 2] = R[1, 3] = 1.0  # race and wexp jointly
    ref = result.wald_test(R, scalar=True)
    assert ours.loc["background", "statistic"] == pytest.approx(float(ref.statistic), rel=1e-9)
    assert ours.loc["background", "p_value"] == pytest.approx(float(ref.pvalue), rel=1e-9)
    assert ours.loc["age", "statistic"] == pytest.approx(result.tvalues[1] ** 2, rel=1e-9)
    assert list(ours["df"]) == [1, 1, 2, 1, 1, 1]


def test_shapes_are_checked():
    with pytest.raises(InputError, match="one group per coefficient"):
        wald_groups([1.0, 2.0], np.eye(2), ["a"])
