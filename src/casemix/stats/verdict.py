"""Verdict rules (``rules.toml``), one verdict per program, and how far each is from changing.

A program's verdict comes from the gamma posterior of its hazard ratio (see
`casemix.stats.shrinkage.posterior`):

- ``too_little_data`` when E < ``min_expected``;
- ``excess`` when P(HR > ``upper_margin``) >= ``probability``;
- ``favorable`` when P(HR < ``lower_margin``) >= ``probability``;
- ``consistent`` otherwise.

Because ``probability`` > 0.5 and ``lower_margin`` <= ``upper_margin``, a program can never
be both ``excess`` and ``favorable``. At a program's E, with the prior held fixed (for a
hierarchical prior: its hyperposterior weights held fixed), P(HR > m) rises and P(HR < m) falls
with the observed count, so each program has two thresholds: the fewest events that are called
``excess`` and the most events that are still called ``favorable`` (none when even 0 events
are not: favorable is then out of reach). They are found by bisection on whole numbers of
events (scipy has no integer search of this kind, so it is written out here, vectorised over
programs), and give every what-if distance and the power statements: under O ~ Poisson(HR E),
P(O >= k) = P(Gamma(k, 1) <= HR E), so the smallest hazard ratio called excess with
probability ``power`` is gamma.ppf(power, k) / E, and likewise for favorable.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from casemix.data.spec import closest
from casemix.errors import InputError, RulesError
from casemix.stats.hierarchy import PriorSettings, prior_settings_from_dict
from casemix.stats.poisson import as_observed_expected
from casemix.stats.shrinkage import Prior, mixture_cdf, mixture_sf

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised only on Python 3.10
    import tomli as tomllib

__all__ = [
    "VERDICTS",
    "VERDICT_COLUMNS",
    "Rules",
    "assign_verdicts",
    "load_rules",
    "read_rules_document",
    "rules_from_dict",
    "verdict_colours",
    "verdict_thresholds",
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
    "power": (lambda v: 0.0 < v < 1.0, "a number strictly between 0 and 1, e.g. 0.8"),
    "bayesian_fdr": (lambda v: 0.0 <= v < 0.5, "0 (off) or a rate below 0.5, e.g. 0.05"),
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
    power : float, default 0.8
        Chance of being called ``excess`` (``favorable``) used for the smallest detectable
        hazard ratio of each program; in (0, 1).
    bayesian_fdr : float, default 0.0
        0: the probability rule above. A rate in (0, 0.5): flag instead the largest set of
        programs whose posterior expected share of wrong flags is at most this rate (each
        program's chance of being wrong is 1 - max(P(HR > upper_margin), P(HR < lower_margin))
        ; programs are added from the surest; Muller, Parmigiani, Robert & Rousseau 2004).
    prior : PriorSettings
        How the prior is chosen (the rules file's ``[prior]`` table; default hierarchical
        with the mean fixed at 1).
    """

    probability: float = 0.975
    upper_margin: float = 1.0
    lower_margin: float = 1.0
    min_expected: float = 1.0
    credible_level: float = 0.95
    power: float = 0.8
    bayesian_fdr: float = 0.0
    prior: PriorSettings = field(default_factory=PriorSettings, compare=True)

    def __post_init__(self) -> None:
        _check_values({name: getattr(self, name) for name in _VERDICT_KEYS}, "Rules")

    def to_dict(self) -> dict[str, float]:
        """The rules as the flat JSON object written to ``run.json`` (keys of ``[verdict]``)."""
        return {name: float(getattr(self, name)) for name in _VERDICT_KEYS}


_VERDICT_KEYS = tuple(f.name for f in fields(Rules) if f.name != "prior")


def rules_from_dict(
    values: Mapping[str, Any], *, source: str = "rules", prior: PriorSettings | None = None
) -> Rules:
    """Build Rules from the keys of a ``[verdict]`` table; missing keys take the defaults.

    Parameters
    ----------
    values : mapping
        Any of ``probability``, ``upper_margin``, ``lower_margin``, ``min_expected``,
        ``credible_level``; numbers.
    source : str, default "rules"
        Where the values came from, for error messages (load_rules passes the file name).
    prior : PriorSettings, optional
        The ``[prior]`` settings (default: `PriorSettings()`).

    Raises
    ------
    RulesError
        Unknown keys, values that are not numbers, or values out of range; the message names
        `source` and the key.
    """
    if not isinstance(values, Mapping):
        raise RulesError(f"{source}: [verdict] must be a table of keys, got {values!r}.")
    allowed = list(_VERDICT_KEYS)
    unknown = sorted(set(values) - set(allowed))
    if unknown:
        named = ", ".join(f"{key}{closest(key, allowed)}" for key in unknown)
        raise RulesError(
            f"{source}: unknown key(s) in [verdict]: {named}. "
            f"Allowed keys: {', '.join(allowed)} (see docs/rules.md)."
        )
    merged = {**Rules().to_dict(), **values}
    _check_values(merged, source)
    prior = PriorSettings() if prior is None else prior
    return Rules(**{key: float(merged[key]) for key in allowed}, prior=prior)


def read_rules_document(path: str | Path) -> dict[str, Any]:
    """Parse a rules file: its ``[verdict]``, ``[prior]`` and ``[monitoring]`` tables only.

    Raises
    ------
    RulesError
        A file that cannot be read, is not valid TOML or has other top-level keys.
    """
    path = Path(path)
    try:
        document = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise RulesError(f"cannot read rules file {path}: {exc.strerror or exc}.") from exc
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise RulesError(f"rules file {path} is not valid TOML: {exc}.") from exc
    tables = ["verdict", "prior", "monitoring"]
    other = sorted(set(document) - set(tables))
    if other:
        named = ", ".join(f"{key}{closest(key, tables)}" for key in other)
        raise RulesError(
            f"rules file {path}: unknown top-level key(s) {named}; "
            "only [verdict], [prior] and [monitoring] tables are allowed (see docs/rules.md)."
        )
    return document


def load_rules(path: str | Path) -> Rules:
    """Read verdict rules from a TOML file with one ``[verdict]`` table.

    Parameters
    ----------
    path : str or Path
        The rules file, e.g.::

            [verdict]
            probability = 0.975
            upper_margin = 1.25

            [prior]                     # optional
            method = "hierarchical"     # or "empirical_bayes", "fixed"
            free_mean = false
            [prior.hyperprior]
            spread = {distribution = "halfcauchy", scale = 0.25}

    Returns
    -------
    Rules
        Keys left out take their defaults.

    Raises
    ------
    RulesError
        A file that cannot be read, is not valid TOML, has no ``[verdict]`` table, has other
        top-level keys (a ``[monitoring]`` table is allowed and read by
        :func:`casemix.monitoring.load_monitoring_rules`), or whose values are invalid; the
        message names the file and the key.
    """
    path = Path(path)
    document = read_rules_document(path)
    if "verdict" not in document:
        raise RulesError(
            f"rules file {path} has no [verdict] table; add a line [verdict] above the keys "
            "(an empty [verdict] table gives the defaults)."
        )
    source = f"rules file {path}"
    try:
        prior = prior_settings_from_dict(document.get("prior", {}), source=source)
    except InputError as exc:
        raise RulesError(str(exc)) from None
    return rules_from_dict(document["verdict"], source=source, prior=prior)


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


def _grow(accept: Callable[[np.ndarray], np.ndarray], size: int) -> np.ndarray:
    """Per element, a whole number >= 1 where `accept` (monotone in k) holds, by doubling."""
    high = np.ones(size, dtype=np.int64)
    while not np.all(ok := accept(high)):
        high = np.where(ok, high, 2 * high)
    return high


def verdict_thresholds(expected: Any, prior: Prior, rules: Rules) -> tuple[np.ndarray, np.ndarray]:
    """Per program, the count thresholds of the verdicts at its E, the prior held fixed.

    Returns
    -------
    excess_from : ndarray of int, shape (n,)
        Fewest observed events called ``excess``.
    favorable_up_to : ndarray of int, shape (n,)
        Most observed events still called ``favorable``; -1 when even 0 events are not
        (favorable out of reach).
    """
    e = np.atleast_1d(np.asarray(expected, dtype=float))

    def excess(k: np.ndarray) -> np.ndarray:
        return mixture_sf(rules.upper_margin, prior, k, e) >= rules.probability

    def not_favorable(k: np.ndarray) -> np.ndarray:
        return mixture_cdf(rules.lower_margin, prior, k, e) < rules.probability

    excess_from = _first_true(excess, _grow(excess, e.size))
    favorable_up_to = _first_true(not_favorable, _grow(not_favorable, e.size)) - 1
    return excess_from, favorable_up_to


def _int_column(values: np.ndarray, missing: np.ndarray) -> pd.arrays.IntegerArray:
    return pd.array(np.where(missing, None, values), dtype="Int64")


def _distances(o, verdict, excess_from, favorable_up_to, small) -> dict[str, Any]:
    """What-if distances from the thresholds (see assign_verdicts)."""
    reach_fav = favorable_up_to >= 0
    is_excess, is_fav = verdict == "excess", verdict == "favorable"
    more = np.where(is_fav, favorable_up_to + 1 - o, excess_from - o)
    fewer = np.where(is_excess, o - excess_from + 1, o - favorable_up_to)
    fewer_missing = small | is_fav | (is_excess & (excess_from < 1)) | (~is_excess & ~reach_fav)
    return {
        "events_to_excess": _int_column(np.maximum(excess_from - o, 0), small),
        "events_to_favorable": _int_column(np.maximum(o - favorable_up_to, 0),
                                           small | ~reach_fav),
        "events_more_to_change": _int_column(more, small | is_excess),
        "events_fewer_to_change": _int_column(fewer, fewer_missing),
    }


def _power(e, excess_from, favorable_up_to, small, rules: Rules) -> dict[str, Any]:
    """Reachability, smallest detectable hazard ratios and the chance of a flag under HR = 1."""
    reach_fav = (favorable_up_to >= 0) & ~small
    with np.errstate(divide="ignore", invalid="ignore"):
        safe = np.where(e > 0, e, np.nan)
        hr_excess = stats.gamma.ppf(rules.power, np.maximum(excess_from, 1)) / safe
        hr_excess = np.where(excess_from == 0, 0.0, hr_excess)
        hr_favorable = stats.gamma.isf(rules.power, np.maximum(favorable_up_to, 0) + 1) / safe
    null = stats.poisson.sf(excess_from - 1, e) + np.where(
        favorable_up_to >= 0, stats.poisson.cdf(favorable_up_to, e), 0.0)
    return {
        "excess_reachable": ~small,
        "favorable_reachable": reach_fav,
        "detectable_hr_excess": np.where(small, np.nan, hr_excess),
        "detectable_hr_favorable": np.where(reach_fav, hr_favorable, np.nan),
        "null_flag_probability": np.where(small, np.nan, null),
    }


def _fdr_verdicts(verdict, small, prior, o, e, rules: Rules):
    """Verdicts by the Bayesian false discovery rule, and the rules with the probability it
    amounts to for this network (the surest flag left out: 1 - bayesian_fdr when none).

    Each judged program's chance of a wrong flag is v = 1 - max(p_above, p_below); programs
    with max <= 0.5 are never flagged. Sorted by v, the first k are flagged for the largest k
    with mean(v_1..k) <= bayesian_fdr; each in its likelier direction.
    """
    p_above = mixture_sf(rules.upper_margin, prior, o, e)
    p_below = mixture_cdf(rules.lower_margin, prior, o, e)
    surest = np.maximum(p_above, p_below)
    eligible = ~small & (surest > 0.5)
    wrong = np.where(eligible, 1.0 - surest, np.inf)
    order = np.argsort(wrong, kind="stable")
    running = np.cumsum(wrong[order]) / np.arange(1, o.size + 1)
    k = int(np.sum(running <= rules.bayesian_fdr))  # running mean rises: the first k pass
    flagged = np.zeros(o.size, dtype=bool)
    flagged[order[:k]] = True
    verdict = np.where(small, "too_little_data", np.where(
        flagged, np.where(p_above >= p_below, "excess", "favorable"), "consistent"))
    cut = float(surest[order[k - 1]]) if k else 1.0 - rules.bayesian_fdr
    return verdict, replace(rules, probability=min(max(cut, 0.5 + 1e-12), 1.0 - 1e-12))


VERDICT_COLUMNS = (
    "verdict", "events_to_excess", "events_to_favorable", "events_more_to_change",
    "events_fewer_to_change", "excess_reachable", "favorable_reachable",
    "detectable_hr_excess", "detectable_hr_favorable", "null_flag_probability",
)


def assign_verdicts(
    observed: Any, expected: Any, prior: Prior, rules: Rules | None = None
) -> pd.DataFrame:
    """One verdict per program, how far it is from changing, and what it could detect.

    Every distance and power figure holds the prior fixed (for a hierarchical prior, its
    hyperposterior weights): re-estimating the prior with another count would move it a
    little. Under the Bayesian false discovery rule (``rules.bayesian_fdr`` > 0) they also
    hold the other programs fixed: they use the probability that rule amounts to for this
    network (the lowest posterior probability among the flagged programs).

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed events per program. A pandas Series lends its index to the result.
    expected : array_like of float, shape (n,)
        Expected events per program, >= 0.
    prior : Prior
        Prior of the hazard ratios (a gamma or a mixture of gammas).
    rules : Rules or None, default None
        Thresholds; None means the defaults of `Rules`.

    Returns
    -------
    pandas.DataFrame, shape (n, 10)
        In input order, columns `VERDICT_COLUMNS`; counts are Int64 and NA for
        ``too_little_data``:

        - ``verdict``: one of `VERDICTS`;
        - ``events_to_excess``: additional events at the same E that would reach ``excess``
          (0 if it is excess);
        - ``events_to_favorable``: fewer events that would reach ``favorable`` (0 if it is;
          NA when even 0 events would not);
        - ``events_more_to_change``: additional events that would leave the current verdict
          (favorable -> consistent or excess; consistent -> excess); NA for excess;
        - ``events_fewer_to_change``: fewer events that would leave it (excess -> consistent
          or favorable; consistent -> favorable); NA for favorable and where no count would;
        - ``excess_reachable``, ``favorable_reachable`` (bool): whether any count at this E
          gives that verdict;
        - ``detectable_hr_excess``: smallest true hazard ratio at which the program is called
          excess with probability ``rules.power`` (O ~ Poisson(HR E));
        - ``detectable_hr_favorable``: largest true hazard ratio at which it is called
          favorable with that probability; NaN when favorable is out of reach;
        - ``null_flag_probability``: chance of a verdict other than consistent when the
          true hazard ratio is 1 (their sum is the expected number of false flags).
    """
    rules = Rules() if rules is None else rules
    o, e = as_observed_expected(observed, expected)
    o, e = np.atleast_1d(o), np.atleast_1d(e)
    if o.ndim != 1:
        raise InputError(f"observed and expected must be one value per program, got {o.shape}.")
    small = e < rules.min_expected
    verdict = np.select(
        [
            small,
            mixture_sf(rules.upper_margin, prior, o, e) >= rules.probability,
            mixture_cdf(rules.lower_margin, prior, o, e) >= rules.probability,
        ],
        ["too_little_data", "excess", "favorable"],
        default="consistent",
    )
    if rules.bayesian_fdr > 0:
        verdict, rules = _fdr_verdicts(verdict, small, prior, o, e, rules)
    excess_from, favorable_up_to = verdict_thresholds(e, prior, rules)
    oi = o.astype(np.int64)
    columns = {"verdict": verdict.tolist(),
               **_distances(oi, verdict, excess_from, favorable_up_to, small),
               **_power(e, excess_from, favorable_up_to, small, rules)}
    index = observed.index if isinstance(observed, pd.Series) and len(observed) == o.size else None
    return pd.DataFrame(columns, index=index)


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
