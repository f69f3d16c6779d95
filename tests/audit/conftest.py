"""Shared data for the audit tests: the rossi recidivism data shipped in lifelines.datasets."""

from __future__ import annotations

import pytest
from lifelines.datasets import load_rossi

from casemix.survival import fit_cox

ROSSI_FULL = ("fin", "age", "race", "wexp", "mar", "paro", "prio")
ROSSI_SMALL = ("fin", "age", "prio")


@pytest.fixture(scope="session")
def rossi():
    return load_rossi()


@pytest.fixture(scope="session")
def rossi_fit(rossi):
    """Efron fit of the full model (REFERENCE_CHECKS.md section 3.1)."""
    names = list(ROSSI_FULL)
    return fit_cox(rossi["week"], rossi["arrest"], rossi[names].to_numpy(float), names=names)


@pytest.fixture(scope="session")
def rossi_small_fit(rossi):
    """Efron fit of fin + age + prio (REFERENCE_CHECKS.md section 10)."""
    names = list(ROSSI_SMALL)
    return fit_cox(rossi["week"], rossi["arrest"], rossi[names].to_numpy(float), names=names)


def step_expected(cph, frame, names):
    """Per-row expected events from a lifelines fit, its baseline read as a step function.

    REFERENCE_CHECKS.md conventions 1 and 3: lifelines' baseline_cumulative_hazard_ is at the
    training means; read at the last time <= t (not lifelines' interpolating predict).
    """
    import numpy as np

    baseline = cph.baseline_cumulative_hazard_
    times, values = baseline.index.to_numpy(float), baseline.iloc[:, 0].to_numpy()
    idx = np.searchsorted(times, frame["week"].to_numpy(float), side="right") - 1
    h0 = np.where(idx >= 0, values[np.clip(idx, 0, None)], 0.0)
    means = cph._norm_mean[names].to_numpy()  # the training means the baseline is at
    lp = (frame[names].to_numpy(float) - means) @ cph.params_[names].to_numpy()
    return h0 * np.exp(lp)
