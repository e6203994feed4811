"""Verify stage: the target on kept rows against all rows and random rows on the holdout; the frontier."""

from .frontier import FractionEvaluator, search_fraction, sweep
from .verdict import Reference, Verdict, verify, verify_rows

__all__ = ["FractionEvaluator", "Reference", "Verdict", "search_fraction", "sweep", "verify", "verify_rows"]
