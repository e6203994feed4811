"""Suspected label errors: the AUM threshold-sample procedure and the ``drop:suspect_label`` reason.

Outside sources:
- procedure: Pleiss et al., NeurIPS 2020, "Identifying Mislabeled Data using the Area Under the
  Margin Ranking": n / (c + 1) random rows get a fake extra class, and a percentile of their AUM
  is the cut-off below which a row is suspected of a wrong label.
- data: scikit-learn's bundled digits, wine and breast-cancer data, 10 % of labels flipped at
  random (seeded) to another class.
- precision, recall and ROC AUC: ``sklearn.metrics``.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import precision_score, recall_score, roc_auc_score

import leanset.scores.dynamics as scores_mod
from leanset.config import Config, SelectionConfig
from leanset.tools.datasets import flipped_table
from leanset.scores.dynamics import score
from leanset.select.suspects import select_rows, suspect_mode
from leanset.load.table import load_table

DATASETS = ("digits", "wine", "breast_cancer")
# One LightGBM thread: a runtime setting only (OpenMP threads spin on a shared 2-core runner).
ONE_THREAD = {"num_threads": 1}


def _flipped_table(tmp_path, name: str, seed: int = 20240601, rate: float = 0.1):
    """The bundled dataset with ``rate`` of its labels moved to another class; returns (config, frame, flipped)."""
    d, flip = flipped_table(name, rate, seed)
    n = len(d)
    path = tmp_path / f"{name}.parquet"
    d.to_parquet(path, index=False)
    cfg = Config.model_validate({"input": {"path": str(path), "label": "label", "id": "rid"},
                                 "proxy": {"params": ONE_THREAD, "threshold_samples": True}, "seed": 0})
    frame = load_table(cfg)
    flipped = np.isin(np.arange(n), flip)[frame.train]
    return cfg, frame, flipped


@pytest.fixture(scope="module")
def scored(tmp_path_factory):
    """Default proxy and cut-off (gbdt, threshold_percentile 90) on each flipped dataset."""
    out = {}
    for name in DATASETS:
        cfg, frame, flipped = _flipped_table(tmp_path_factory.mktemp(name), name)
        out[name] = (score(frame, cfg), flipped)
    return out


# Measured with the defaults on this draw: digits precision 0.93, recall 0.92; wine 0.87 / 0.93;
# breast cancer 0.95 / 0.83. The bar 0.6 is the issue's, not tuned here. Before the fake slice was
# capped at a tenth of the rows (``proxy.threshold_share``), wine and breast cancer fell short
# (precision 0.35 and 0.18): with n / (k + 1) rows the fake class was a quarter and a third of the table.
@pytest.mark.parametrize("name", list(DATASETS))
def test_cutoff_finds_flipped_labels(scored, name):
    s, flipped = scored[name]
    suspect = s.table["suspect_label"].to_numpy(bool)
    assert 0.05 < flipped.mean() < 0.15
    # sklearn.metrics.precision_score / recall_score of the cut-off's flags against the flips
    assert precision_score(flipped, suspect) >= 0.6
    assert recall_score(flipped, suspect) >= 0.6


@pytest.mark.parametrize("rate", [0.05, 0.2])
@pytest.mark.parametrize("name", ["wine", "breast_cancer"])
def test_cutoff_holds_at_other_flip_rates(tmp_path, name, rate):
    # The cap on the fake slice is not matched to the 10 % flip rate above: the same bar at 5 % and 20 %.
    cfg, frame, flipped = _flipped_table(tmp_path, name, seed=7, rate=rate)
    suspect = score(frame, cfg).table["suspect_label"].to_numpy(bool)
    assert precision_score(flipped, suspect) >= 0.6  # sklearn.metrics
    assert recall_score(flipped, suspect) >= 0.6


def test_aum_ranks_flipped_digits(scored):
    # Pleiss et al. 2020: mislabelled rows have low AUM; sklearn.metrics.roc_auc_score of -AUM.
    s, flipped = scored["digits"]
    assert roc_auc_score(flipped, s.difficulty("aum")) >= 0.9


def test_cutoff_is_the_percentile_of_the_threshold_rows(tmp_path, monkeypatch):
    # The procedure itself, checked step by step against Pleiss et al. 2020 on wine: each of the
    # two passes trains with k+1 classes (for half the proxy's rounds, a leanset choice), gives n // (k+1) rows the fake class k (capped here at
    # proxy.threshold_share of the rows, a leanset choice), and its cut-off
    # is the percentile of those rows' mean margin (AUM) over the pass's checkpoints.
    cfg, frame, _ = _flipped_table(tmp_path, "wine")
    calls = []
    real_fit = scores_mod.fit_proxy

    def spy(X, y, n_classes, categorical, config, seed, on_checkpoint):
        seen = []
        calls.append((np.array(y, copy=True), n_classes, seen))
        return real_fit(X, y, n_classes, categorical, config, seed,
                        lambda t, z: (seen.append(np.array(z, dtype=np.float64, copy=True)), on_checkpoint(t, z)))

    monkeypatch.setattr(scores_mod, "fit_proxy", spy)
    s = score(frame, cfg)
    passes = [c for c in calls if c[1] == 4]  # wine has 3 classes; the fake class makes 4
    assert len(passes) == 2 and len(calls) == cfg.proxy.folds + 2
    n = len(frame.train)
    fakes, gaps = [], []
    for (labels, _, seen), cutoff in zip(passes, s.info["label_errors"]["cutoffs"]):
        fake = labels == 3
        assert fake.sum() == min(n // 4, int(n * cfg.proxy.threshold_share)) == int(n * 0.1)
        np.testing.assert_array_equal(labels[~fake], frame.y[frame.train][~fake])
        # the passes boost half the rounds by default (proxy.threshold_rounds), so 30 // 5 checkpoints
        assert len(seen) == (cfg.proxy.rounds // 2) // cfg.proxy.checkpoint_every == 6
        Z = np.stack(seen)  # checkpoints x rows x classes, built here only
        zy = np.take_along_axis(Z, labels[None, :, None], -1)[..., 0]
        other = Z.copy()
        np.put_along_axis(other, labels[None, :, None], -np.inf, -1)
        aum = (zy - other.max(-1)).mean(axis=0)
        assert cutoff == pytest.approx(np.percentile(aum[fake], 90), abs=1e-9)
        fakes.append(fake)
        gaps.append(np.where(fake, np.nan, aum - cutoff))
    assert not (fakes[0] & fakes[1]).any()  # disjoint slices: every row judged at least once
    mean_gap = np.nanmean(np.stack(gaps), axis=0)
    np.testing.assert_array_equal(s.table["suspect_label"].to_numpy(bool), mean_gap < 0)


def test_suspects_are_dropped_with_their_reason_and_the_budget_holds():
    rng = np.random.default_rng(1)
    n = 400
    y = rng.integers(0, 3, n)
    d = rng.random(n)
    suspect = rng.random(n) < 0.1
    config = SelectionConfig(fraction=0.3, class_floor=0, drop_suspect_labels=True, strategy="hardest")
    sel = select_rows(d, y, config, 0, suspect=suspect)
    assert set(sel.reason[suspect]) == {"drop:suspect_label"}
    assert not sel.keep[suspect].any() and np.all(sel.weight[suspect] == 0)
    assert sel.keep.sum() == round(0.3 * n)
    assert sel.info["suspect_dropped"] == suspect.sum()
    off = select_rows(d, y, config.model_copy(update={"drop_suspect_labels": False}), 0, suspect=suspect)
    assert "drop:suspect_label" not in set(off.reason) and off.keep[suspect].any()


def test_auto_keeps_suspects_at_their_share_below_the_limit():
    # drop_suspect_labels: auto = share while at most suspect_limit (0.2) of the rows are flagged. The 0.2 is this
    # project's choice, measured by `leanset bench suite` (common practice, no source): the flipped-label tables
    # flag 7-10 % of rows, the overlapping-class table 30 %. Hand-worked counts: 40 suspects over 3 classes at
    # fraction 0.3 keep round(0.3 x per-class count) of each class; the budget stays round(0.3 x 400) = 120.
    rng = np.random.default_rng(2)
    n = 400
    y, d = rng.integers(0, 3, n), rng.random(n)
    few, many = np.zeros(n, bool), np.zeros(n, bool)
    few[:40], many[:120] = True, True  # 10 % and 30 % flagged
    config = SelectionConfig(fraction=0.3, class_floor=0, strategy="hardest")
    assert config.drop_suspect_labels == "auto"
    shared = select_rows(d, y, config, 0, suspect=few)
    per_class = [int(round(0.3 * np.sum(few & (y == c)))) for c in range(3)]
    assert [int(np.sum(shared.keep & few & (y == c))) for c in range(3)] == per_class
    assert shared.keep.sum() == 120 and shared.info["kept"] == 120
    assert shared.info["quota"] == np.bincount(y[shared.keep], minlength=3).tolist()  # a class's quota is what it keeps
    assert set(shared.reason[few]) == {"keep:suspect_share", "drop:suspect_label"}
    assert shared.info["suspect_shared"] == sum(per_class) and shared.info["suspect_dropped"] == 40 - sum(per_class)
    assert (shared.weight[shared.keep] > 0).all()
    # the hardest rule would have taken the hardest suspects; the share is drawn regardless of difficulty
    assert suspect_mode(config, few) == ("share", "")
    plain = config.model_copy(update={"drop_suspect_labels": False})
    sel = select_rows(d, y, config, 0, suspect=many)
    np.testing.assert_array_equal(sel.keep, select_rows(d, y, plain, 0, suspect=many).keep)
    assert sel.info["suspects_kept"]["rows"] == 120 and "overlapping classes" in sel.info["suspects_kept"]["because"]
    forced = select_rows(d, y, config.model_copy(update={"drop_suspect_labels": True, "fraction": 0.7}), 0, suspect=many)
    assert forced.info["suspect_dropped"] == 120 and not forced.keep[many].any()
    # the last class entirely suspect: its shared rows are kept with weight 1 and counted in its quota
    only = y == 2
    lone = select_rows(d, y, config.model_copy(update={"drop_suspect_labels": "share"}), 0, suspect=only)
    assert lone.info["quota"][2] == int(round(0.3 * only.sum())) == int((lone.keep & only).sum())
    assert (lone.weight[lone.keep & only] == 1.0).all()
    share_many = select_rows(d, y, config.model_copy(update={"drop_suspect_labels": "share"}), 0, suspect=many)
    assert share_many.info["suspect_shared"] == sum(int(round(0.3 * np.sum(many & (y == c)))) for c in range(3))


def test_run_writes_suspect_label_and_drops_suspects(tmp_path, prefect_api):
    import json

    import pyarrow.parquet as pq
    import yaml
    from rich.console import Console

    from leanset.flows import prune_flow
    from leanset.report.summary import summary

    cfg, frame, flipped = _flipped_table(tmp_path, "digits")
    raw = cfg.model_dump(mode="json")
    raw["selection"].update({"fraction": 0.5, "drop_suspect_labels": True})
    raw["target"]["params"] = {"num_boost_round": 30, "num_threads": 1}
    raw["verify"].update({"bootstrap": 200, "random_repeats": 1})
    raw["proxy"].update({"folds": 3, "agreement_rows": 400})
    raw["store"] = str(tmp_path / "store")
    path = tmp_path / "run.yaml"
    path.write_text(yaml.safe_dump(raw))
    run_dir = prune_flow(str(path), return_state=True).result(raise_on_failure=False)  # any verdict
    manifest = pq.read_table(f"{run_dir}/manifest.parquet").to_pandas()
    train = manifest["split"] == "train"
    assert manifest.loc[~train, "suspect_label"].isna().all()
    suspect = manifest.loc[train, "suspect_label"].astype(bool).to_numpy()
    reason = manifest.loc[train, "reason"].to_numpy()
    np.testing.assert_array_equal(reason == "drop:suspect_label", suspect)
    assert suspect.sum() > 50  # digits: about a tenth of the rows are flipped
    # the manifest's flags find the flipped rows (sklearn.metrics) as the score stage's did
    assert precision_score(flipped, suspect) >= 0.6 and recall_score(flipped, suspect) >= 0.6
    run = json.loads(open(f"{run_dir}/run.json").read())
    assert run["selection"]["suspect_dropped"] == suspect.sum()
    assert run["scores"]["label_errors"]["suspects"] == suspect.sum()
    ag = run["agreement"]
    assert ag["rows"] == 400 and ag["spearman"] > ag["floor"]
    console = Console(width=200, record=True)
    console.print(summary(run, run_dir))
    text = console.export_text()
    assert "proxy-target" in text and "poor stand-in" not in text
    run["agreement"] = {**ag, "spearman": 0.1, "below_floor": True}
    console = Console(width=200, record=True)
    console.print(summary(run, run_dir))
    assert "poor stand-in" in console.export_text()
