"""lifelines is a test oracle only (the `test` extra): tests that need it skip where it is missing.

The plain install (newest pandas, no lifelines) runs every other test; `.ci/run` runs both.
"""

from __future__ import annotations

import pytest

__all__ = ["LIFELINES_MISSING", "lazy", "lifelines"]

LIFELINES_MISSING = (
    "needs lifelines (a reference library and its datasets, in the `test` extra), "
    "which is not installed here"
)


def lifelines(module: str = "lifelines"):
    """Import ``module`` of lifelines, or skip the calling test saying why."""
    return pytest.importorskip(module, reason=LIFELINES_MISSING)


def lazy(module: str, name: str):
    """``module.name`` of lifelines as a callable imported when called, not when collected.

    A test that calls it skips (saying why) where lifelines is missing; the tests of the same
    module that do not need it still run.
    """

    def call(*args, **kwargs):
        return getattr(lifelines(module), name)(*args, **kwargs)

    call.__name__ = call.__qualname__ = name
    return call
