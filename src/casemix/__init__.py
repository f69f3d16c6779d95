"""casemix: risk-adjusted observed-versus-expected evaluation of clinical programs.

The stages, in the order data flow through them::

    spec = casemix.load_spec("spec.toml")
    reference = casemix.read_records("reference.csv", spec, cutoff="2022-12-31")
    model = casemix.fit_reference(reference, spec, "graft_failure", 365, "2022-12-31")
    model.save("model.json")
    cohort = casemix.read_records("cohort.csv", spec, cutoff="2025-06-30")
    result = casemix.evaluation.evaluate(cohort, model, rules="rules.toml")
    result.save("results")
    watch = casemix.monitor(cohort, "model.json", "2024-01-01", "2025-06-30", "rules.toml")
    watch.save("monitoring")  # state.csv: each program's CUSUM charts now
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("casemix")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+unknown"

from casemix.data.cohort import Cohort, build_cohort
from casemix.data.design import Design
from casemix.data.records import Records, read_records
from casemix.data.spec import Spec, load_spec
from casemix.evaluation.evaluate import Evaluation, evaluate
from casemix.model.reference import ReferenceModel, fit_reference
from casemix.monitoring import Monitoring, MonitoringRules, monitor
from casemix.stats.shrinkage import Prior, empirical_bayes_prior, fixed_prior
from casemix.stats.verdict import Rules, load_rules

__all__ = [
    "Cohort",
    "Design",
    "Evaluation",
    "Monitoring",
    "MonitoringRules",
    "Prior",
    "Records",
    "ReferenceModel",
    "Rules",
    "Spec",
    "__version__",
    "build_cohort",
    "empirical_bayes_prior",
    "evaluate",
    "fit_reference",
    "fixed_prior",
    "load_rules",
    "load_spec",
    "monitor",
    "read_records",
]
