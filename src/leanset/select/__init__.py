"""Select stage: class and segment quotas, duplicates, strategies, reason codes, weights, stable decisions."""

from .rules import Selection, select, select_frame, stabilise

__all__ = ["Selection", "select", "select_frame", "stabilise"]
