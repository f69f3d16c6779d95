"""The statistician's checks of a reference model and an evaluation."""

from casemix.audit.bootstrap import (
    BootstrapResult,
    ProgramArrays,
    bootstrap_expected,
    delta_expected,
    mixture_interval,
    resample_indices,
)
from casemix.audit.calibration import (
    calibration_by_group,
    calibration_by_horizon,
    calibration_by_risk,
    calibration_by_size,
    calibration_regression,
)
from casemix.audit.crosscheck import crosscheck_lifelines, crosscheck_statsmodels
from casemix.audit.influence import leave_one_program_out
from casemix.audit.ph import TRANSFORMS, ph_test, schoenfeld_residuals, time_transform
from casemix.audit.run import Audit, run_audit
from casemix.audit.sensitivity import PRIOR_SHAPES, prior_sensitivity, verdict_changes
from casemix.stats.dispersion import Overdispersion, adjusted_funnel_limits, overdispersion
from casemix.stats.multiplicity import bh_q_values, fdr_table
from casemix.survival import Concordance, concordance

__all__ = [
    "PRIOR_SHAPES",
    "TRANSFORMS",
    "Audit",
    "BootstrapResult",
    "Concordance",
    "Overdispersion",
    "ProgramArrays",
    "adjusted_funnel_limits",
    "bh_q_values",
    "bootstrap_expected",
    "calibration_by_group",
    "calibration_by_horizon",
    "calibration_by_risk",
    "calibration_by_size",
    "calibration_regression",
    "concordance",
    "crosscheck_lifelines",
    "crosscheck_statsmodels",
    "delta_expected",
    "fdr_table",
    "leave_one_program_out",
    "mixture_interval",
    "overdispersion",
    "ph_test",
    "prior_sensitivity",
    "resample_indices",
    "run_audit",
    "schoenfeld_residuals",
    "time_transform",
    "verdict_changes",
]
