"""Verdict rules (``rules.toml``), one verdict per program, and how far each is from changing.

A program's verdict comes from the gamma posterior of its hazard ratio (see
`casemix.stats.shrinkage.posterior`):

- ``too_little_data`` when E < ``min_expected``;
- ``excess`` when P(HR > ``upper_margin``) >= ``probability``;
- ``favorable`` when P(HR < ``lower_margin``) >= ``probability``;
- ``consistent`` otherwise.

Because ``probability`` > 0.5 and ``lower_margin`` <= ``upper_margin``, a program can never
be both ``excess`` and ``favorable``. The what-if distances (how many more, or fewer, observed
events at the same E would change the verdict) are found by bisection on whole numbers of
events, using that P(HR > m) rises and P(HR < m) falls as the posterior shape grows; scipy
has no integer search of this kind, so it is written out here, vectorised over programs.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from casemix.data.spec import closest
from casemix.errors import RulesError
from casemix.stats.poisson import as_observed_expected
from casemix.stats.shrinkage import Prior, posterior

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised only on Python 3.10
    import tomli as tomllib

__all__ = [
    "VERDICTS",
    "Rules",
    "assign_verdicts",
    "load_rules",
    "rules_from_dict",
    "verdict_colours",
]

VERDICTS = ("favorable", "consistent", "excess", "too_little_data")

# Okabe-Ito colour-blind-safe palette; no red/green pair, and the word is always shown
# beside the colour. too_little_data takes reddish purple rather than the palette's yellow,
# which is too pale to read as a marker or swatch on a white page.
_COLOURS = {
    "favorable": "#0072B2",  # blue
    "consistent": "#999999",  # grey
    "excess": "#D55E00",  # vermillion
    "too_little_data": "#CC79A7",  # reddish purple
}

_CHECKS: dict[str, tuple[Callable[[float], bool], str]] = {
    "probability": (lambda v: 0.5 < v < 1.0, "a number strictly between 0.5 and 1, e.g. 0.975"),
    "upper_margin": (lambda v: v > 0.0, "a hazard ratio > 0, e.g. 1.0 or 1.25"),
    "lower_margin": (lambda v: v > 0.0, "a hazard ratio > 0, e.g. 1.0 or 0.8"),
    "min_expected": (lambda v: v >= 0.0, "a number of expected events >= 0, e.g. 1"),
    "credible_level": (lambda v: 0.0 < v < 1.0, "a number strictly between 0 and 1, e.g. 0.95"),
}


def _check_values(values: Mapping[str, Any], where: str) -> None:
    """Raise RulesError naming `where` and the key for the first invalid value."""
    for key, (valid, wanted) in _CHECKS.items():
        value = values[key]
        is_number = isinstance(value, (int, float)) and not isinstance(value, bool)
        if not is_number or not math.isfinite(value) or not valid(float(value)):
            raise RulesError(f"{where}: [verdict] {key} must be {wanted}; got {value!r}.")
    if values["lower_margin"] > values["upper_margin"]:
        raise RulesError(
            f"{where}: [verdict] lower_margin ({values['lower_margin']!r}) is above "
            f"upper_margin ({values['upper_margin']!r}); set lower_margin <= upper_margin."
        )


@dataclass(frozen=True)
class Rules:
    """Verdict thresholds.

    Attributes
    ----------
    probability : float, default 0.975
        Posterior probability needed for ``excess`` or ``favorable``; in (0.5, 1).
    upper_margin : float, default 1.0
        ``excess`` needs P(HR > upper_margin) >= probability (a clinical margin such as 1.25).
    lower_margin : float, default 1.0
        ``favorable`` needs P(HR < lower_margin) >= probability; <= upper_margin.
    min_expected : float, default 1.0
        Programs with fewer expected events are ``too_little_data``; >= 0.
    credible_level : float, default 0.95
        Level of the credible interval reported beside the verdict; in (0, 1).
    """

    probability: float = 0.975
    upper_margin: float = 1.0
    lower_margin: float = 1.0
    min_expected: float = 1.0
    credible_level: float = 0.95

    def __post_init__(self) -> None:
        _check_values({f.name: getattr(self, f.name) for f in fields(self)}, "Rules")

    def to_dict(self) -> dict[str, float]:
        """The rules as the flat JSON object written to ``run.json`` (keys of ``[verdict]``)."""
        return {f.name: float(getattr(self, f.name)) for f in fields(self)}


def rules_from_dict(values: Mapping[str, Any], *, source: str = "rules") -> Rules:
    """Build Rules from the keys of a ``[verdict]`` table; missing keys take the defaults.

    Parameters
    ----------
    values : mapping
        Any of ``probability``, ``upper_margin``, ``lower_margin``, ``min_expected``,
        ``credible_level``; numbers.
    source : str, default "rules"
        Where the values came from, for error messages (load_rules passes the file name).

    Raises
    ------
    RulesError
        Unknown keys, values that are not numbers, or values out of range; the message names
        `source` and the key.
    """
    if not isinstance(values, Mapping):
        raise RulesError(f"{source}: [verdict] must be a table of keys, got {values!r}.")
    allowed = [f.name for f in fields(Rules)]
    unknown = sorted(set(values) - set(allowed))
    if unknown:
        named = ", ".join(f"{key}{closest(key, allowed)}" for key in unknown)
        raise RulesError(
            f"{source}: unknown key(s) in [verdict]: {named}. "
            f"Allowed keys: {', '.join(allowed)} (see docs/rules.md)."
        )
    merged = {**Rules().to_dict(), **values}
    _check_values(merged, source)
    return Rules(**{key: float(merged[key]) for key in allowed})


def load_rules(path: str | Path) -> Rules:
    """Read verdict rules from a TOML file with one ``[verdict]`` table.

    Parameters
    ----------
    path : str or Path
        The rules file, e.g.::

            [verdict]
            probability = 0.975
            upper_margin = 1.25

    Returns
    -------
    Rules
        Keys left out take their defaults.

    Raises
    ------
    RulesError
        A file that cannot be read, is not valid TOML, has no ``[verdict]`` table, has other
        top-level keys, or whose values are invalid; the message names the file and the key.
    """
    path = Path(path)
    try:
        document = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise RulesError(f"cannot read rules file {path}: {exc.strerror or exc}.") from exc
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise RulesError(f"rules file {path} is not valid TOML: {exc}.") from exc
    other = sorted(set(document) - {"verdict"})
    if other:
        named = ", ".join(f"{key}{closest(key, ['verdict'])}" for key in other)
        raise RulesError(
            f"rules file {path}: unknown top-level key(s) {named}; "
            "only a [verdict] table is allowed (see docs/rules.md)."
        )
    if "verdict" not in document:
        raise RulesError(
            f"rules file {path} has no [verdict] table; add a line [verdict] above the keys "
            "(an empty [verdict] table gives the defaults)."
        )
    return rules_from_dict(document["verdict"], source=f"rules file {path}")


def _first_true(accept: Callable[[np.ndarray], np.ndarray], high: np.ndarray) -> np.ndarray:
    """Smallest whole k in [0, high] with accept(k), per element.

    `accept` must be monotone (False ... False True ... True) in k and true at `high`.
    """
    low = np.full_like(high, -1)  # accept(-1) is taken as False
    while np.any(high - low > 1):
        open_ = high - low > 1
        middle = np.maximum((low + high) // 2, 0)
        ok = accept(middle)
        high = np.where(open_ & ok, middle, high)
        low = np.where(open_ & ~ok, middle, low)
    return high


def _events_to_excess(shape: np.ndarray, rate: np.ndarray, rules: Rules) -> np.ndarray:
    """Fewest extra events k >= 0 with P(HR > upper_margin | shape + k, rate) >= probability."""

    def accept(k: np.ndarray) -> np.ndarray:
        return stats.gamma.sf(rules.upper_margin, shape + k, scale=1.0 / rate) >= rules.probability

    high = np.ones(shape.shape, dtype=np.int64)
    while not np.all(ok := accept(high)):  # P(HR > m) -> 1 as the shape grows: this ends
        high = np.where(ok, high, 2 * high)
    return _first_true(accept, high)


def _events_to_favorable(
    shape: np.ndarray, rate: np.ndarray, observed: np.ndarray, rules: Rules
) -> tuple[np.ndarray, np.ndarray]:
    """Fewest removed events j in [0, O] with P(HR < lower_margin) >= probability.

    Returns the distances and a mask of programs where even O = 0 is not enough.
    """

    def accept(j: np.ndarray) -> np.ndarray:
        reduced = shape - np.minimum(j, observed)
        return stats.gamma.cdf(rules.lower_margin, reduced, scale=1.0 / rate) >= rules.probability

    counts = observed.astype(np.int64)
    return _first_true(accept, counts), ~accept(counts)


def assign_verdicts(
    observed: Any, expected: Any, prior: Prior, rules: Rules | None = None
) -> pd.DataFrame:
    """One verdict per program, and the number of events that would change it.

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed events per program. A pandas Series lends its index to the result.
    expected : array_like of float, shape (n,)
        Expected events per program, >= 0.
    prior : Prior
        Gamma prior of the hazard ratios; the posterior is Gamma(a + O, b + E).
    rules : Rules or None, default None
        Thresholds; None means the defaults of `Rules`.

    Returns
    -------
    pandas.DataFrame, shape (n, 3)
        In input order:

        - ``verdict``: one of `VERDICTS`;
        - ``events_to_excess`` (Int64): additional observed events at the same E that would
          make the verdict ``excess``; 0 if it already is; NA for ``too_little_data``;
        - ``events_to_favorable`` (Int64): how many fewer observed events would make it
          ``favorable``; 0 if it already is; NA when even 0 events would not, and for
          ``too_little_data``.
    """
    rules = Rules() if rules is None else rules
    o, e = as_observed_expected(observed, expected)
    summary = posterior(
        observed,
        expected,
        prior,
        level=rules.credible_level,
        upper_margin=rules.upper_margin,
        lower_margin=rules.lower_margin,
    )
    shape, rate = summary["post_shape"].to_numpy(), summary["post_rate"].to_numpy()
    small = np.atleast_1d(e) < rules.min_expected
    verdict = np.select(
        [
            small,
            summary["p_above"].to_numpy() >= rules.probability,
            summary["p_below"].to_numpy() >= rules.probability,
        ],
        ["too_little_data", "excess", "favorable"],
        default="consistent",
    )
    to_excess = _events_to_excess(shape, rate, rules)
    to_favorable, out_of_reach = _events_to_favorable(shape, rate, np.atleast_1d(o), rules)
    return pd.DataFrame(
        {
            "verdict": verdict.tolist(),
            "events_to_excess": pd.array(np.where(small, None, to_excess), dtype="Int64"),
            "events_to_favorable": pd.array(
                np.where(small | out_of_reach, None, to_favorable), dtype="Int64"
            ),
        },
        index=summary.index,
    )


def verdict_colours() -> dict[str, str]:
    """Hex colour per verdict (Okabe-Ito palette), for plots and the report.

    Returns
    -------
    dict of str to str
        A new dict each call, keyed by the words of `VERDICTS`: favorable blue ``#0072B2``,
        consistent grey ``#999999``, excess vermillion ``#D55E00``, too_little_data reddish
        purple ``#CC79A7``.
    """
    return dict(_COLOURS)
