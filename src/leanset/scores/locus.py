"""The score stage's locality key: a Morton code of random projections of the features (docs/scoring.md)."""

from __future__ import annotations

import numpy as np

from ..config import Config


class Locus:
    """A locality key per row: the Morton (Z-order) code of ``dims`` seeded random projections of the
    features, each feature first scaled to [-0.5, 0.5] by its range.

    Near-copies get equal or neighbouring keys, and rows next to each other in the key's order are
    close in the projected space (Morton, 1966), so taking rows evenly along that order covers the
    feature space. The ranges are a gbdt fold model's (LightGBM's ``feature_infos``), so the key is the
    same however the rows are read.
    """

    BITS = 15  # levels per projection: 2**15, four projections in 60 bits

    def __init__(self, low: np.ndarray, high: np.ndarray, seed: int, dims: int = 4):
        self.low = np.nan_to_num(np.asarray(low, np.float64))
        span = np.nan_to_num(np.asarray(high, np.float64)) - self.low
        self.span = np.where(span > 0, span, 1.0)
        self.dims = dims
        self.W = np.random.default_rng([seed, 0x10C5]).standard_normal((len(self.low), dims)) / np.sqrt(max(len(self.low), 1))

    @classmethod
    def from_booster(cls, booster, seed: int) -> Locus:
        """Ranges from the model's ``feature_infos`` (a feature LightGBM found constant gets range 0)."""
        infos = booster.dump_model(num_iteration=1)["feature_infos"]
        ranges = [infos.get(name) if isinstance(infos.get(name), dict) else {} for name in booster.feature_name()]
        return cls(np.array([r.get("min_value", 0.0) for r in ranges], np.float64),
                   np.array([r.get("max_value", 0.0) for r in ranges], np.float64), seed)

    def __call__(self, X: np.ndarray) -> np.ndarray:
        z = np.nan_to_num((np.asarray(X, np.float64) - self.low) / self.span - 0.5) @ self.W
        q = np.clip(np.floor((z + 2.0) / 4.0 * 2**self.BITS), 0, 2**self.BITS - 1).astype(np.int64)
        return morton(q, self.BITS)


def morton(q: np.ndarray, bits: int) -> np.ndarray:
    """Interleave the low ``bits`` bits of each column of the non-negative integers ``q`` (n, d): bit b
    of column j goes to bit b·d + j of the code (Morton, 1966)."""
    d = q.shape[1]
    code = np.zeros(len(q), np.int64)
    for b in range(bits):
        for j in range(d):
            code |= ((q[:, j] >> b) & 1) << (b * d + j)
    return code


def locus_seed(config: Config) -> int | None:
    """The seed of the locality key's projections, or None when ``selection.spread`` is off (no key is made)."""
    return config.seed if config.selection.spread else None
