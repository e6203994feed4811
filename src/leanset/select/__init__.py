"""Select stage: class and segment quotas, duplicates, strategies, reason codes, weights, stable decisions."""

from .frame import select_frame
from .rules import Selection, select
from .stable import stabilise

__all__ = ["Selection", "select", "select_frame", "stabilise"]
