"""How a score becomes a difficulty, and a difficulty a percentile within its class.

Shared below the stages: the score stage orients its columns with :data:`DIFFICULTY_SIGN`, the
select stage keeps stable decisions by :func:`class_percentile`, and the store computes the
parent run's percentiles the same way.
"""

import numpy as np
import pandas as pd

#: Sign that turns each score into a difficulty (higher = harder).
DIFFICULTY_SIGN = {
    "forgetting": 1.0, "aum": -1.0, "el2n": 1.0, "confidence": -1.0, "variability": 1.0,
    "correctness": -1.0, "aleatoric": 1.0, "oof_loss": 1.0, "oof_margin": -1.0, "oof_entropy": 1.0,
}


def class_percentile(values: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Percentile rank in (0, 1] of each value within its group (ties share their mean rank)."""
    return pd.Series(np.asarray(values, np.float64)).groupby(np.asarray(groups)).rank(method="average", pct=True).to_numpy()
