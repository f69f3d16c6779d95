"""casemix: risk-adjusted observed-versus-expected evaluation of clinical programs.

The stages, in the order data flow through them::

    spec = casemix.load_spec("spec.toml")
    reference = casemix.read_records("reference.csv", spec, cutoff="2022-12-31")
    model = casemix.fit_reference(reference, spec, "graft_failure", 365, "2022-12-31")
    model.save("model.json")
    cohort = casemix.read_records("cohort.csv", spec, cutoff="2025-06-30")
    result = casemix.evaluation.evaluate(cohort, model, rules="rules.toml")
    result.save("results")
"""

import importlib
from typing import TYPE_CHECKING

# The public names and the module each lives in. They are imported on first use (PEP 562), so
# that `casemix --help` and `casemix --version` start without loading pandas, scipy,
# statsmodels or matplotlib; `from casemix import X` works as with eager imports.
_PUBLIC = {
    "Cohort": "casemix.data.cohort",
    "build_cohort": "casemix.data.cohort",
    "Design": "casemix.data.design",
    "Records": "casemix.data.records",
    "read_records": "casemix.data.records",
    "Spec": "casemix.data.spec",
    "load_spec": "casemix.data.spec",
    "Evaluation": "casemix.evaluation.evaluate",
    "evaluate": "casemix.evaluation.evaluate",
    "Study": "casemix.evaluation.study",
    "evaluate_plan": "casemix.evaluation.study",
    "ReferenceModel": "casemix.model.reference",
    "fit_reference": "casemix.model.reference",
    "PlanModels": "casemix.model.plan",
    "fit_plan": "casemix.model.plan",
    "Monitoring": "casemix.monitoring.monitor",
    "MonitoringRules": "casemix.monitoring.rules",
    "monitor": "casemix.monitoring.monitor",
    "Prior": "casemix.stats.shrinkage",
    "empirical_bayes_prior": "casemix.stats.shrinkage",
    "fixed_prior": "casemix.stats.shrinkage",
    "Rules": "casemix.stats.verdict",
    "load_rules": "casemix.stats.verdict",
}
_SUBPACKAGES = ("audit", "data", "demo", "errors", "evaluation", "model", "monitoring",
                "report", "stats", "survival")

if TYPE_CHECKING:
    from casemix.data.cohort import Cohort, build_cohort
    from casemix.data.design import Design
    from casemix.data.records import Records, read_records
    from casemix.data.spec import Spec, load_spec
    from casemix.evaluation.evaluate import Evaluation, evaluate
    from casemix.evaluation.study import Study, evaluate_plan
    from casemix.model.plan import PlanModels, fit_plan
    from casemix.model.reference import ReferenceModel, fit_reference
    from casemix.monitoring.monitor import Monitoring, monitor
    from casemix.monitoring.rules import MonitoringRules
    from casemix.stats.shrinkage import Prior, empirical_bayes_prior, fixed_prior
    from casemix.stats.verdict import Rules, load_rules


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version  # slow: only when asked

    try:
        return version("casemix")
    except PackageNotFoundError:  # running from a source tree that was not installed
        return "0.0.0+unknown"


def __getattr__(name: str):
    if name == "__version__":
        value = _version()
    elif name in _PUBLIC:
        value = getattr(importlib.import_module(_PUBLIC[name]), name)
    elif name in _SUBPACKAGES:
        value = importlib.import_module(f"casemix.{name}")
    else:
        raise AttributeError(f"module 'casemix' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__, *_SUBPACKAGES})


__all__ = [
    "Cohort",
    "Design",
    "Evaluation",
    "Monitoring",
    "MonitoringRules",
    "PlanModels",
    "Prior",
    "Records",
    "ReferenceModel",
    "Rules",
    "Spec",
    "Study",
    "__version__",
    "build_cohort",
    "empirical_bayes_prior",
    "evaluate",
    "evaluate_plan",
    "fit_plan",
    "fit_reference",
    "fixed_prior",
    "load_rules",
    "load_spec",
    "monitor",
    "read_records",
]
