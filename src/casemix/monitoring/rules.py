"""Monitoring rules: the ``[monitoring]`` table of the rules file.

Example (every key optional; these are the defaults)::

    [monitoring]
    rho_up = 2.0        # hazard ratio the upper chart is tuned to detect (> 1)
    rho_down = 0.5      # hazard ratio the lower chart is tuned to detect (< 1)
    level = 0.05        # chance of any false signal per chart over the period, HR = 1
    restart = true      # after a signal the chart starts again from zero
    replicates = 1000   # simulated histories per program for the control limits
    seed = 2026         # seed of the simulation
    # h = 4.5           # a fixed control limit for every program and chart instead
    # horizon_days = 365  # follow-up that counts (default and maximum: the model's)
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from casemix.errors import RulesError
from casemix.stats.verdict import read_rules_document

__all__ = ["MonitoringRules", "load_monitoring_rules", "monitoring_rules_from_dict"]

MIN_REPLICATES = 100


@dataclass(frozen=True)
class MonitoringRules:
    """Settings of the CUSUM charts and their control limits.

    Attributes
    ----------
    rho_up : float, default 2.0
        Hazard ratio the upper chart is tuned to (> 1).
    rho_down : float, default 0.5
        Hazard ratio the lower chart is tuned to (in (0, 1)).
    level : float, default 0.05
        Chance, per chart, that a program whose hazard ratio is 1 signals at least once over
        the monitoring period; in (0, 1). Used for the simulated limits.
    restart : bool, default True
        After a signal the chart starts again from zero; every signal is kept.
    replicates : int, default 1000
        Simulated histories per program (at least 100; 0 only with a fixed ``h``).
    seed : int, default 2026
        Seed of the simulation; the same seed gives the same limits, whatever the order of
        the programs.
    h : float or None, default None
        A fixed control limit for every program and chart (> 0) instead of simulated ones.
    horizon_days : float or None, default None
        Follow-up that counts after each transplant; default the reference model's horizon,
        which it may not exceed.
    """

    rho_up: float = 2.0
    rho_down: float = 0.5
    level: float = 0.05
    restart: bool = True
    replicates: int = 1000
    seed: int = 2026
    h: float | None = None
    horizon_days: float | None = None

    def __post_init__(self) -> None:
        _check(self, "MonitoringRules")

    def to_dict(self) -> dict[str, Any]:
        """The rules as a JSON object (keys of ``[monitoring]``; ``None`` when not set)."""
        return asdict(self)


def _number(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _check(rules: MonitoringRules, where: str) -> None:
    def fail(key: str, wanted: str) -> None:
        raise RulesError(
            f"{where}: [monitoring] {key} must be {wanted}; got {getattr(rules, key)!r}."
        )

    if not _number(rules.rho_up) or rules.rho_up <= 1.0:
        fail("rho_up", "a hazard ratio above 1 (a rho of 1 detects nothing), e.g. 2.0")
    if not _number(rules.rho_down) or not 0.0 < rules.rho_down < 1.0:
        fail("rho_down", "a hazard ratio strictly between 0 and 1 (not 1), e.g. 0.5")
    if not _number(rules.level) or not 0.0 < rules.level < 1.0:
        fail("level", "a probability strictly between 0 and 1, e.g. 0.05")
    if not isinstance(rules.restart, bool):
        fail("restart", "true or false")
    for key in ("replicates", "seed"):
        value = getattr(rules, key)
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            fail(key, "a whole number >= 0")
    if rules.h is not None and (not _number(rules.h) or rules.h <= 0):
        fail("h", "a positive number (a fixed control limit), e.g. 4.5")
    if rules.h is None and rules.replicates < MIN_REPLICATES:
        fail("replicates", f"at least {MIN_REPLICATES} when the limits are simulated (no h)")
    if rules.horizon_days is not None and (
        not _number(rules.horizon_days) or rules.horizon_days <= 0
    ):
        fail("horizon_days", "a positive number of days, e.g. 365")


def monitoring_rules_from_dict(
    values: Mapping[str, Any], *, source: str = "rules"
) -> MonitoringRules:
    """Build MonitoringRules from the keys of a ``[monitoring]`` table (missing: defaults).

    Raises
    ------
    RulesError
        Unknown keys or invalid values; the message names ``source`` and the key.
    """
    if not isinstance(values, Mapping):
        raise RulesError(f"{source}: [monitoring] must be a table of keys, got {values!r}.")
    allowed = list(MonitoringRules.__dataclass_fields__)
    unknown = sorted(set(values) - set(allowed))
    if unknown:
        raise RulesError(
            f"{source}: unknown key(s) in [monitoring]: {', '.join(unknown)}. "
            f"Allowed keys: {', '.join(allowed)}."
        )
    try:
        rules = MonitoringRules(**values)
    except RulesError as exc:
        raise RulesError(str(exc).replace("MonitoringRules", source, 1)) from None
    return rules


def load_monitoring_rules(path: str | Path | None) -> MonitoringRules:
    """Read the ``[monitoring]`` table of a rules file; defaults when absent or ``path=None``.

    Raises
    ------
    RulesError
        A file that cannot be read, is not valid TOML or has top-level keys other than
        ``[verdict]`` and ``[monitoring]``, or invalid values.
    """
    if path is None:
        return MonitoringRules()
    path = Path(path)
    return monitoring_rules_from_dict(
        read_rules_document(path).get("monitoring", {}), source=f"rules file {path}"
    )
