"""Fixtures shared across the test folders: the rossi data shipped in lifelines.datasets, and
the evaluation folders of tests/evaluation_folders.py."""

from __future__ import annotations

import pytest
from evaluation_folders import (  # noqa: F401  (fixtures, registered by being imported here)
    corrections_folder,
    evaluation_folder,
    folder_factory,
)
from oracles import lifelines

from casemix.survival import fit_cox

ROSSI_FULL = ("fin", "age", "race", "wexp", "mar", "paro", "prio")


@pytest.fixture(scope="session")
def rossi():
    return lifelines("lifelines.datasets").load_rossi()


@pytest.fixture(scope="session")
def rossi_fit(rossi):
    """Efron fit of the full model (docs/validation.md section 3.1)."""
    names = list(ROSSI_FULL)
    return fit_cox(rossi["week"], rossi["arrest"], rossi[names].to_numpy(float), names=names)
