"""Verify stage: the target on kept rows against all rows and random rows on the holdout; the frontier."""

from .frontier import FractionEvaluator, search_fraction, sweep
from .stats import Verdict, verify

__all__ = ["FractionEvaluator", "Verdict", "search_fraction", "sweep", "verify"]
