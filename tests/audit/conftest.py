"""Fixtures of the audit tests (`rossi` and `rossi_fit` come from tests/conftest.py)."""

from __future__ import annotations

import pytest
from audit_helpers import ROSSI_SMALL

from casemix.survival import fit_cox


@pytest.fixture(scope="session")
def rossi_small_fit(rossi):
    """Efron fit of fin + age + prio (docs/validation.md section 10)."""
    names = list(ROSSI_SMALL)
    return fit_cox(rossi["week"], rossi["arrest"], rossi[names].to_numpy(float), names=names)
