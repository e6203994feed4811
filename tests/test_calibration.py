"""The calibration figure the verify stage reports beside the metric, against sklearn.metrics."""

import numpy as np
import pytest
from sklearn.metrics import brier_score_loss, log_loss

from leanset.verify.stats import calibration


def test_calibration_matches_sklearn():
    """Brier score for binary (sklearn.metrics.brier_score_loss), log loss for multiclass (sklearn.metrics.log_loss)."""
    rng = np.random.default_rng(0)
    p = rng.dirichlet([1, 1], size=200)
    y = rng.integers(0, 2, 200)
    assert calibration(y, p) == pytest.approx(brier_score_loss(y, p[:, 1]), abs=1e-12)
    p3 = rng.dirichlet([1, 1, 1], size=200)
    y3 = rng.integers(0, 3, 200)
    assert calibration(y3, p3) == pytest.approx(log_loss(y3, p3), abs=1e-12)
