"""Survival numerics: arrays in, frozen dataclasses out (no pandas, no files, no programs)."""

from casemix.survival.competing import CumulativeIncidence, cumulative_incidence
from casemix.survival.concordance import Concordance, concordance
from casemix.survival.cox import BaselineHazard, ChiSquareTest, CoxFit, fit_cox
from casemix.survival.km import KaplanMeier, kaplan_meier

__all__ = [
    "BaselineHazard",
    "ChiSquareTest",
    "Concordance",
    "CoxFit",
    "CumulativeIncidence",
    "KaplanMeier",
    "concordance",
    "cumulative_incidence",
    "fit_cox",
    "kaplan_meier",
]
