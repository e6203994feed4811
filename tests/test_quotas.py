"""Segment quotas and duplicate collapsing of the select stage, and the calibration report."""

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.metrics import brier_score_loss, log_loss

from leanset.config import SelectionConfig
from leanset.select.rules import find_duplicates, select
from leanset.verify.stats import calibration


def _wine():
    # scikit-learn's bundled wine data: 178 rows, 3 classes (59 / 71 / 48).
    X, y = load_wine(return_X_y=True)
    return X, y


@pytest.mark.parametrize("strategy", ["stratified", "hardest", "easiest", "random"])
@pytest.mark.parametrize("quotas", ["balanced", "proportional"])
def test_class_and_segment_floors_met_on_wine(strategy, quotas):
    """Every class keeps min(n_c, class_floor) rows and every segment value min(n_v, segment_floor)."""
    X, y = _wine()
    rng = np.random.default_rng(0)
    # Two segment columns: one from a feature's tertiles (uneven per class), one small and rare.
    tertile = np.searchsorted(np.quantile(X[:, 0], [1 / 3, 2 / 3]), X[:, 0])
    rare = (rng.random(len(y)) < 0.08).astype(int)
    segments = np.column_stack([tertile, rare])
    cfg = SelectionConfig(fraction=0.1, strategy=strategy, quotas=quotas, class_floor=8, segment_floor=10)
    sel = select(rng.normal(size=len(y)), y, cfg, seed=1, segments=segments)
    for c in np.unique(y):
        assert sel.keep[y == c].sum() >= min((y == c).sum(), 8)
    for j in range(segments.shape[1]):
        for v in np.unique(segments[:, j]):
            members = segments[:, j] == v
            assert sel.keep[members].sum() >= min(members.sum(), 10)
    assert sel.info["kept"] == sel.keep.sum()
    assert sel.info["kept"] == sel.info["budget"] + sel.info["floor_adjustment"]


def test_segments_keep_their_share_within_a_class():
    """Without floors, each segment keeps its share of its class's quota (largest remainder: at most 1 off)."""
    n = 3000
    rng = np.random.default_rng(2)
    y = rng.integers(0, 2, n)
    seg = rng.choice(3, size=n, p=[0.6, 0.3, 0.1])[:, None]
    sel = select(rng.normal(size=n), y, SelectionConfig(fraction=0.2, quotas="proportional", class_floor=0,
                                                       segment_floor=0, hard_cut=0.0), seed=0, segments=seg)
    for c in (0, 1):
        in_class = y == c
        quota = sel.keep[in_class].sum()
        for v in range(3):
            cell = in_class & (seg[:, 0] == v)
            assert abs(sel.keep[cell].sum() - quota * cell.sum() / in_class.sum()) <= 1


def test_injected_exact_duplicates_are_all_found():
    """Copies injected into breast-cancer rows are found; no original is dropped as a copy of itself."""
    # scikit-learn's bundled breast-cancer data: 569 rows with distinct feature vectors.
    X, y = load_breast_cancer(return_X_y=True)
    rng = np.random.default_rng(5)
    src = rng.choice(len(y), size=40, replace=False)
    X2 = np.vstack([X, X[src], X[src[:5]]])  # 5 rows copied twice
    y2 = np.concatenate([y, y[src], y[src[:5]]])
    is_copy, dup_count, conflict = find_duplicates(X2, y2)
    assert set(np.flatnonzero(is_copy)) == set(range(len(y), len(y2)))
    assert not is_copy[: len(y)].any()
    assert (dup_count[src[:5]] == 3).all() and (dup_count[src[5:]] == 2).all()
    assert not conflict.any()

    cfg = SelectionConfig(fraction=0.5, class_floor=0)
    sel = select(rng.normal(size=len(y2)), y2, cfg, seed=0, X=X2)
    assert (sel.reason[is_copy] == "drop:duplicate").all() and not sel.keep[is_copy].any()
    assert sel.info["duplicates_dropped"] == 45
    assert sel.keep.sum() == round(0.5 * len(y2))


def test_conflicting_duplicates_are_flagged_not_collapsed():
    X = np.array([[1.0, np.nan], [1.0, np.nan], [2.0, 0.0], [3.0, 0.0]])
    y = np.array([0, 1, 1, 1])
    is_copy, dup_count, conflict = find_duplicates(X, y)
    assert not is_copy.any()
    assert conflict.tolist() == [True, True, False, False]


def test_dedupe_off_keeps_copies_in_the_pool():
    X = np.repeat(np.arange(10.0)[:, None], 2, axis=0)
    y = np.repeat(np.arange(10) % 2, 2)
    sel = select(np.zeros(20), y, SelectionConfig(fraction=1.0, dedupe=False, class_floor=0), seed=0, X=X)
    assert sel.keep.all()
    sel = select(np.zeros(20), y, SelectionConfig(fraction=1.0, class_floor=0), seed=0, X=X)
    assert sel.keep.sum() == 10


def test_calibration_matches_sklearn():
    """Brier score for binary (sklearn.metrics.brier_score_loss), log loss for multiclass (sklearn.metrics.log_loss)."""
    rng = np.random.default_rng(0)
    p = rng.dirichlet([1, 1], size=200)
    y = rng.integers(0, 2, 200)
    assert calibration(y, p) == pytest.approx(brier_score_loss(y, p[:, 1]), abs=1e-12)
    p3 = rng.dirichlet([1, 1, 1], size=200)
    y3 = rng.integers(0, 3, 200)
    assert calibration(y3, p3) == pytest.approx(log_loss(y3, p3), abs=1e-12)
