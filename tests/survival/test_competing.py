"""Aalen-Johansen cumulative incidence against lifelines on a dataset shipped with it.

lifelines.datasets.load_lymph_node (the German Breast Cancer Study Group 2 trial with its
dates): its recurrence-free time ``rectime`` ends at recurrence or death (``censrec`` = 1);
an end with ``censdead`` = 1 on the day of death (``rectime == survtime``) is a death without
recurrence (21 rows), the competing event; the other ends are recurrences (278 rows).
lifelines' AalenJohansenFitter jitters tied times at random, so the times are first made
distinct with a deterministic offset of 1e-6 day per row: both estimators then see the same
tie-free data and no jitter happens.
"""

from __future__ import annotations

import numpy as np
import pytest

from casemix.errors import InputError
from casemix.survival import cumulative_incidence

lifelines = pytest.importorskip("lifelines")


@pytest.fixture(scope="module")
def lymph():
    frame = lifelines.datasets.load_lymph_node()
    died_first = (frame["censdead"] == 1) & (frame["rectime"] == frame["survtime"])
    code = np.where(frame["censrec"] == 1, np.where(died_first, 2, 1), 0)
    time = frame["rectime"].to_numpy(dtype=float)
    time = time + 1e-6 * np.arange(time.size)  # distinct times (module docstring)
    return time, code


def test_matches_lifelines_aalen_johansen(lymph):
    time, code = lymph
    ours = cumulative_incidence(time, code)
    ajf = lifelines.AalenJohansenFitter(calculate_variance=False)
    ajf.fit(time, code, event_of_interest=1)
    ref = ajf.cumulative_density_.iloc[:, 0]
    # REFERENCE LIBRARY lifelines 0.30 AalenJohansenFitter, relative 1e-9 (closed form)
    np.testing.assert_allclose(ours.at(ref.index.to_numpy()[1:]), ref.to_numpy()[1:],
                               rtol=1e-9, atol=1e-12)
    assert (ours.events.sum(), ours.competing.sum()) == (278, 21)


def test_one_minus_km_matches_lifelines_and_exceeds_the_incidence(lymph):
    time, code = lymph
    ours = cumulative_incidence(time, code)
    kmf = lifelines.KaplanMeierFitter().fit(time, code == 1)
    grid = np.array([365.0, 1095.0, 1825.0])
    # REFERENCE LIBRARY lifelines KaplanMeierFitter with deaths treated as censored
    np.testing.assert_allclose(ours.one_minus_km_at(grid),
                               1 - kmf.survival_function_at_times(grid).to_numpy(), rtol=1e-9)
    # competing deaths make 1 - KM overstate the share who actually recur
    assert (ours.one_minus_km_at(grid) > ours.at(grid)).all()


def test_without_competing_events_it_is_one_minus_km(lymph):
    time, code = lymph
    ours = cumulative_incidence(time, np.where(code == 2, 0, code))
    np.testing.assert_allclose(ours.incidence, ours.one_minus_km, rtol=1e-12)


def test_bad_codes():
    with pytest.raises(InputError, match="code must be 0"):
        cumulative_incidence([1.0, 2.0], [1, 3])
