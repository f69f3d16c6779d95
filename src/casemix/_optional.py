"""The one place casemix imports its optional libraries (statsmodels, lifelines, dask).

They are imported only when a check or a scheduler needs them, so that ``import casemix``
works without them; a missing library gives a message that says what to install.
"""

from __future__ import annotations

import importlib
import importlib.util
from types import ModuleType

from casemix.errors import CasemixError

__all__ = ["available", "require"]


def available(module: str) -> bool:
    """Return whether ``module`` (for example ``"lifelines"``) can be imported."""
    return importlib.util.find_spec(module.split(".")[0]) is not None


def require(module: str, purpose: str) -> ModuleType:
    """Import ``module`` or say how to get it.

    Parameters
    ----------
    module : str
        Dotted module name, for example ``"statsmodels.api"``.
    purpose : str
        What it is needed for, used in the message.

    Raises
    ------
    CasemixError
        When the library is not installed.
    """
    if not available(module):
        top = module.split(".")[0]
        raise CasemixError(
            f"{purpose} needs the '{top}' package, which is not installed; "
            f"install it with: pip install {top}"
        )
    return importlib.import_module(module)
