"""Survival numerics: arrays in, frozen dataclasses out (no pandas, no files, no programs)."""

from casemix.survival.cox import BaselineHazard, CoxFit, TestResult, fit_cox
from casemix.survival.km import KaplanMeier, kaplan_meier

__all__ = ["BaselineHazard", "CoxFit", "KaplanMeier", "TestResult", "fit_cox", "kaplan_meier"]
