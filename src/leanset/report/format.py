"""How report.html and its charts write numbers: shares, seconds, counts, signed deltas, intervals."""

from __future__ import annotations

from typing import Any

import numpy as np


def share(value: float | None, digits: int = 1) -> str:
    """A share as a percentage with a thin space: 0.1305 → ``13.1 %``."""
    return "–" if value is None else f"{100 * float(value):.{digits}f} %"


def seconds(value: float | None) -> str:
    """Seconds with sensible precision: 0.0123 s, 0.41 s, 2.0 s, 75 s."""
    if value is None:
        return "–"
    v = float(value)
    if v < 0.1:
        return f"{v:.3f} s"
    if v < 1:
        return f"{v:.2f} s"
    if v < 60:
        return f"{v:.1f} s"
    return f"{v:,.0f} s"


def number(value: Any, digits: int = 4) -> str:
    """An integer with thousands separators, a float with ``digits`` decimals, anything else as text."""
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    if isinstance(value, (float, np.floating)):
        return "–" if not np.isfinite(value) else f"{float(value):.{digits}f}"
    return str(value)


def signed(value: float | None, digits: int = 4) -> str:
    """A value with its sign: ``+0.0123``."""
    return "–" if value is None else f"{float(value):+.{digits}f}"


def interval(ci, digits: int = 4, sign: bool = True) -> str:
    """An interval ``[lo, hi]``, signed unless ``sign`` is False; ``–`` when there is none."""
    if not ci or ci[0] is None:
        return "–"
    f = "+" if sign else ""
    return f"[{ci[0]:{f}.{digits}f}, {ci[1]:{f}.{digits}f}]"
