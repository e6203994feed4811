"""The ``importance`` strategy: inclusion probabilities, systematic sampling, Horvitz–Thompson weights.

Sources:
- Horvitz and Thompson, JASA 1952, "A generalization of sampling without replacement from a finite
  universe": weighting each drawn unit by 1/π_i gives unbiased totals (from memory).
- systematic sampling with unequal probabilities in random order: Madow, Ann. Math. Stat. 1949;
  the capping of π_i at 1 with the rest rescaled is the textbook procedure (e.g. Tillé, "Sampling
  Algorithms", 2006, from memory).
- the tilt's direction: Sorscher et al., NeurIPS 2022, "Beyond neural scaling laws" (keep easy
  examples when little is kept, hard ones when much is).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from leanset.config import SelectionConfig
from leanset.select.rules import auto_tilt, inclusion_probabilities, select, systematic_sample


def test_inclusion_probabilities_hand_worked():
    # Four rows, tilt 0.5: percentiles 1/8, 3/8, 5/8, 7/8 give sizes 1 + 0.5 (2r − 1) =
    # 0.625, 0.875, 1.125, 1.375 (sum 4); quota 2 halves them.
    assert inclusion_probabilities(np.array([0.625, 0.875, 1.125, 1.375]), 2) == pytest.approx(
        [0.3125, 0.4375, 0.5625, 0.6875])
    # Capping: sizes 1, 1, 1, 1, 10 with quota 2: the big row is capped at 1, the other four share
    # the remaining 1 equally (Tillé's capping procedure, from memory).
    assert inclusion_probabilities(np.array([1, 1, 1, 1, 10.0]), 2) == pytest.approx([0.25] * 4 + [1.0])


def test_importance_keeps_the_quota_with_the_hand_worked_probabilities():
    # One class of four rows, fraction 0.5, tilt 0.5: each row is kept with the probability above
    # (Madow's systematic sampling); 2000 seeded draws, each frequency within 4.5 binomial SDs.
    d = np.array([0.1, 0.2, 0.3, 0.4])
    y = np.zeros(4, np.int32)
    cfg = SelectionConfig(fraction=0.5, strategy="importance", tilt=0.5, class_floor=0, quotas="proportional")
    hits = np.zeros(4)
    for seed in range(2000):
        sel = select(d, y, cfg, seed=seed)
        assert sel.keep.sum() == 2 and set(sel.reason[sel.keep]) == {"keep:sampled"}
        hits += sel.keep
    pi = np.array([0.3125, 0.4375, 0.5625, 0.6875])
    assert np.all(np.abs(hits / 2000 - pi) < 4.5 * np.sqrt(pi * (1 - pi) / 2000))


def test_systematic_sample_frequencies_binomial():
    pi = inclusion_probabilities(np.linspace(0.2, 2.0, 12), 5)
    n_draws = 3000
    counts = np.zeros(len(pi))
    for s in range(n_draws):
        drawn = systematic_sample(pi, np.random.default_rng(s))
        assert len(drawn) == 5
        counts[drawn] += 1
    # scipy.stats.binomtest on each row's frequency; Bonferroni over 12 rows at 0.001.
    assert min(stats.binomtest(int(c), n_draws, p).pvalue for c, p in zip(counts, pi)) > 0.001 / 12


def test_horvitz_thompson_weights_are_unbiased_for_the_class_mean():
    # Horvitz–Thompson: the weighted mean of any row value over the kept rows estimates its class
    # mean without bias. Here the value is the difficulty itself, which the tilt over-samples.
    rng = np.random.default_rng(3)
    d = rng.gamma(2.0, size=400)
    y = (rng.random(400) < 0.3).astype(np.int32)
    cfg = SelectionConfig(fraction=0.2, strategy="importance", tilt=0.7, class_floor=0, quotas="proportional",
                          weights="none")
    plain, weighted = [], []
    for seed in range(600):
        sel = select(d, y, cfg, seed=seed)
        k = sel.keep & (y == 0)
        plain.append(d[k].mean())
        weighted.append(np.average(d[k], weights=sel.weight[k]))
    truth = d[y == 0].mean()
    assert np.mean(plain) > truth * 1.1  # the tilt over-samples hard rows
    # Ratio estimator: unbiased up to O(1/n); Monte-Carlo SE of the mean of 600 draws is ~0.005.
    assert np.mean(weighted) == pytest.approx(truth, rel=0.02)


def test_auto_tilt_direction():
    # Sorscher et al.: toward easy rows when little is kept, toward hard rows when much is.
    assert auto_tilt(0.05) < 0 < auto_tilt(0.5) < auto_tilt(0.7)
    assert auto_tilt(0.05) == pytest.approx(-0.3) and auto_tilt(0.95) == 0.8
