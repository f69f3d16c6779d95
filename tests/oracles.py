"""lifelines is a test oracle only (the `test` extra): tests that need it skip where it is missing.

The plain install (newest pandas, no lifelines) runs every other test; `.ci/run` runs both.
"""

from __future__ import annotations

import pytest

__all__ = ["LIFELINES_MISSING", "lifelines"]

LIFELINES_MISSING = (
    "needs lifelines (a reference library and its datasets, in the `test` extra), "
    "which is not installed here"
)


def lifelines(module: str = "lifelines"):
    """Import ``module`` of lifelines, or skip the calling test saying why."""
    return pytest.importorskip(module, reason=LIFELINES_MISSING)
