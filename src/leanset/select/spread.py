"""``selection.spread``: a stratum's rows taken evenly along the score stage's locality key."""

from __future__ import annotations

import numpy as np


def van_der_corput(p: np.ndarray) -> np.ndarray:
    """The base-2 radical inverse of non-negative integers: 0, 1/2, 1/4, 3/4, 1/8, ... for 0, 1, 2, 3, 4.

    The first m terms of the sequence split [0, 1) as evenly as m points can at every m, so positions
    0..n-1 taken in the order of their radical inverse are spread evenly along the row for any count
    taken (van der Corput, 1935).
    """
    p = np.asarray(p, np.uint64).copy()
    out, scale = np.zeros(len(p)), 0.5
    while p.any():
        out += (p & np.uint64(1)) * scale
        p >>= np.uint64(1)
        scale /= 2
    return out


def spread_keys(locus: np.ndarray, tie: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Each row's place in a spread order of one class: positions along the ``locus`` order, from a
    random start, mapped to their van der Corput value, so the rows with the smallest keys lie evenly
    along the locus order however many are taken."""
    by_locus = np.lexsort((tie, locus))
    offset = int(rng.integers(0, len(locus)))
    keys = np.empty(len(locus))
    keys[by_locus] = van_der_corput((np.arange(len(locus)) + offset) % len(locus))
    return keys
