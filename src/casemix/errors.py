"""Every exception and warning class casemix raises.

Each message says what is wrong, where (file, column, row numbers, covariate) and how to fix
it. User input is never checked with ``assert``.
"""

from __future__ import annotations

__all__ = [
    "CasemixError",
    "CasemixWarning",
    "ConvergenceError",
    "ConvergenceWarning",
    "DataWarning",
    "InputError",
    "ModelFileError",
    "ModelVersionWarning",
    "PriorWarning",
    "RulesError",
    "SpecError",
    "plural",
]


class CasemixError(Exception):
    """Base class of every casemix error."""


class InputError(CasemixError, ValueError):
    """Input data (arrays, records, files) that cannot be used as given."""


class SpecError(CasemixError, ValueError):
    """A study spec (TOML) that is malformed or refers to something that does not exist."""


class RulesError(CasemixError, ValueError):
    """A verdict rules file (TOML) that is malformed."""


class ModelFileError(CasemixError, ValueError):
    """A saved reference model that cannot be read, is tampered with or has an unknown format."""


class ConvergenceError(CasemixError, RuntimeError):
    """A model fit that did not converge (for example a coefficient running to infinity)."""


class CasemixWarning(UserWarning):
    """Base class of every casemix warning."""


class DataWarning(CasemixWarning):
    """Records kept with a correction (follow-up extended or truncated, value out of range)."""


class ConvergenceWarning(CasemixWarning):
    """A fit that stopped at its iteration limit before converging."""


class ModelVersionWarning(CasemixWarning):
    """A model file written by another casemix version."""


class PriorWarning(CasemixWarning):
    """An empirical-Bayes prior that fell back to a default (no extra-Poisson variation)."""


def plural(count: int, word: str, verb: tuple[str, str] | None = None) -> str:
    """Return ``"1 row"`` / ``"3 rows"`` for messages.

    With ``verb=("is", "are")`` the verb that agrees follows: ``"1 row is"`` / ``"3 rows are"``.
    """
    counted = f"{count} {word}" if count == 1 else f"{count} {word}s"
    return counted if verb is None else f"{counted} {verb[0] if count == 1 else verb[1]}"
