"""Monitoring between evaluations: risk-adjusted CUSUM charts in calendar time on the reference
model, with control limits simulated per program, and cumulative observed minus expected.

Numbers only; the page is drawn by :mod:`casemix.report.monitoring`.
"""

from casemix.monitoring.cusum import (
    cusum_maxima,
    cusum_path,
    expected_by_day,
    log_likelihood_ratio,
    observed_by_day,
)
from casemix.monitoring.limits import ControlLimit, control_limit, program_seed, simulate_maxima
from casemix.monitoring.monitor import CAUTIONS, Monitoring, monitor
from casemix.monitoring.rules import (
    MonitoringRules,
    load_monitoring_rules,
    monitoring_rules_from_dict,
)

__all__ = [
    "CAUTIONS",
    "ControlLimit",
    "Monitoring",
    "MonitoringRules",
    "control_limit",
    "cusum_maxima",
    "cusum_path",
    "expected_by_day",
    "load_monitoring_rules",
    "log_likelihood_ratio",
    "monitor",
    "monitoring_rules_from_dict",
    "observed_by_day",
    "program_seed",
    "simulate_maxima",
]
