"""Program-level statistics: exact Poisson, shrinkage, verdict rules, dispersion, multiplicity."""

from casemix.stats.shrinkage import Prior, empirical_bayes_prior, fixed_prior, posterior
from casemix.stats.verdict import Rules, assign_verdicts, load_rules

__all__ = [
    "Prior",
    "Rules",
    "assign_verdicts",
    "empirical_bayes_prior",
    "fixed_prior",
    "load_rules",
    "posterior",
]
