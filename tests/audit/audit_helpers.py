"""Constants and a lifelines step-reading helper for the audit tests (rossi data)."""

from __future__ import annotations

import numpy as np

ROSSI_FULL = ("fin", "age", "race", "wexp", "mar", "paro", "prio")
ROSSI_SMALL = ("fin", "age", "prio")


def step_expected(cph, frame, names):
    """Per-row expected events from a lifelines fit, its baseline read as a step function.

    docs/validation.md conventions 1 and 3: lifelines' baseline_cumulative_hazard_ is at the
    training means; read at the last time <= t (not lifelines' interpolating predict).
    """
    baseline = cph.baseline_cumulative_hazard_
    times, values = baseline.index.to_numpy(float), baseline.iloc[:, 0].to_numpy()
    idx = np.searchsorted(times, frame["week"].to_numpy(float), side="right") - 1
    h0 = np.where(idx >= 0, values[np.clip(idx, 0, None)], 0.0)
    means = cph._norm_mean[names].to_numpy()  # the training means the baseline is at
    lp = (frame[names].to_numpy(float) - means) @ cph.params_[names].to_numpy()
    return h0 * np.exp(lp)
