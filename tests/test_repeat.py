"""Byte-for-byte repeats: the same table, config and seed give the same files on one machine.

Two runs publish into the same store path (the first store moved aside in between, so that the
second has no parent run and the config, store included, is the same). ``manifest.parquet`` and
``kept.parquet`` must be identical bytes, and ``run.json`` identical but for the run id, the
creation time and the measured seconds.
"""

from __future__ import annotations

import json

from store_helpers import config, part, published, run_ok

#: run.json entries that hold the run id, the clock or measured seconds.
VARYING = {"run_id", "created", "timings", "cost"}  # cost: the ledger of measured seconds
VARYING_VERDICT = {"train_seconds", "speedup"}


def _comparable(run_dir) -> dict:
    run = json.loads((run_dir / "run.json").read_text())
    for key in VARYING:
        run.pop(key)
    for key in VARYING_VERDICT:
        run["verdict"].pop(key)
    run["scores"].pop("timings", None)
    if run.get("agreement"):
        run["agreement"].pop("seconds", None)  # the agreement check's measured seconds
    return run


def test_same_table_config_and_seed_give_identical_files(prefect_api, tmp_path):
    table = part(tmp_path / "t", "a.parquet", 0, 2000, seed=5, ids=False)  # derived row ids, threshold samples on
    cfg = config(tmp_path, table, verify__random_repeats=2)
    store = tmp_path / "store"
    run_ok(cfg)
    (first,) = published(store)
    store.rename(tmp_path / "first")
    first = tmp_path / "first" / "runs" / first.name
    run_ok(cfg)
    (second,) = published(store)
    assert first.name.split("-")[-1] == second.name.split("-")[-1]  # the hash of config and input
    for name in ("manifest.parquet", "kept.parquet"):
        assert (first / name).read_bytes() == (second / name).read_bytes(), name
    for model in sorted((first / "models").iterdir()):
        assert model.read_bytes() == (second / "models" / model.name).read_bytes(), model.name
    assert _comparable(first) == _comparable(second)
