"""The command line and the flow end to end: summary, run directory contract, bad input."""

import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from leanset.cli import app
from store_helpers import config as write_config
from leanset.config import SCORE_NAMES

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "data_samples" / "pump_faults.parquet"
DEMO = ROOT / "configs" / "demo.yaml"

runner = CliRunner()
REASON_CODES = {"keep:stratum", "keep:floor", "keep:hard", "keep:easy", "keep:random",
                "drop:over_budget", "drop:hard_cut", "drop:duplicate", "drop:suspect_label", "holdout"}


def _config(tmp_path, table_path, **extra):
    """A small, fast config for ``table_path`` written to tmp_path."""
    return write_config(tmp_path, table_path, selection__fraction=0.5, verify__random_repeats=3, **extra)


def _table(tmp_path, n=600, seed=0, name="t.parquet", **columns):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    label = np.where(x[:, 0] + 0.3 * rng.normal(size=n) > 0.3, "b", "a")
    label[: n // 6] = "c"
    df = pd.DataFrame({"x0": x[:, 0], "x1": x[:, 1], "color": rng.choice(["red", "blue"], n), "label": label})
    for k, v in columns.items():
        df[k] = v
    path = tmp_path / name
    df.to_parquet(path)
    return path


def _digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _runs(tmp_path):
    runs = tmp_path / "store" / "runs"
    return [p for p in runs.iterdir() if not p.name.startswith(".")] if runs.exists() else []


def test_demo_config_end_to_end(prefect_api, tmp_path):
    """The demo config runs through the Prefect flow and honours the output contract."""
    before = _digest(SAMPLE)
    result = runner.invoke(app, ["run", str(DEMO), "--store", str(tmp_path / "store")])
    assert result.exit_code == 0, result.output
    for text in ("rows in", "rows kept", "verdict", "speed-up", "written to"):
        assert text in result.output
    (run_dir,) = _runs(tmp_path)
    run = json.loads((run_dir / "run.json").read_text())
    manifest = pq.read_table(run_dir / "manifest.parquet").to_pandas()
    kept = pq.read_table(run_dir / "kept.parquet").to_pandas()
    source = pq.read_table(SAMPLE).to_pandas()

    assert _digest(SAMPLE) == before
    assert len(manifest) == len(source) == run["input"]["rows"]
    assert manifest["row_id"].is_unique and set(manifest["row_id"]) == set(source["inspection_id"])
    c = run["counts"]
    assert c["kept"] + c["dropped"] + c["holdout"] == run["input"]["rows"]
    assert c["kept"] == round(0.3 * c["train"])  # demo.yaml: selection.fraction 0.3
    assert set(manifest["reason"]) <= REASON_CODES
    assert (manifest["decision"] == "keep").sum() == len(kept) == c["kept"]
    assert set(kept["inspection_id"]) == set(manifest.loc[manifest["decision"] == "keep", "row_id"])
    assert list(kept.columns) == [*source.columns, "weight", "dup_count"]
    hold = manifest["split"] == "holdout"
    for name in SCORE_NAMES:
        assert manifest.loc[hold, name].isna().all() and manifest.loc[~hold, name].notna().all()
    v = run["verdict"]
    assert v["status"] in {"pass", "fail", "inconclusive"}
    assert v["ci"][0] <= v["ci"][1]
    # against_random places the kept value against random's interval (checked by hand-worked cases in test_verify)
    lo, hi = v["random_ci"]
    assert v["against_random"]["metric"] == ("better" if v["kept"] > hi else "worse" if v["kept"] < lo else "on_par")
    assert "against random" in result.output
    assert {"run_id", "config", "config_hash", "input", "counts", "verdict", "timings", "versions"} <= set(run)
    assert set(run["timings"]) >= {"load", "score", "select", "verify", "write"}
    assert {p.name for p in (run_dir / "models").iterdir()} >= {"proxy_fold0.txt", "target_full.txt", "target_kept.txt", "target_random.txt"}


def test_same_seed_same_decisions(prefect_api, tmp_path):
    """Determinism: the same data, config and seed give the same decisions."""
    cfg = _config(tmp_path, _table(tmp_path))
    for _ in range(2):
        assert runner.invoke(app, ["run", str(cfg)]).exit_code == 0
    a, b = (pq.read_table(r / "manifest.parquet").to_pandas() for r in sorted(_runs(tmp_path)))
    pd.testing.assert_frame_equal(a[["row_id", "decision", "reason"]], b[["row_id", "decision", "reason"]])


def _bad(tmp_path, args, *needles):
    result = runner.invoke(app, ["run", *map(str, args)])
    assert result.exit_code == 2, result.output
    line = result.output.strip()
    assert len(line.splitlines()) == 1, line
    for needle in needles:
        assert needle in line, line
    assert _runs(tmp_path) == []
    return line


def test_missing_file(tmp_path):
    _bad(tmp_path, [_config(tmp_path, tmp_path / "nope.parquet")], "nope.parquet", "not found")


def test_corrupt_parquet(tmp_path):
    path = tmp_path / "broken.parquet"
    path.write_bytes(b"PAR1 this is not parquet")
    digest = _digest(path)
    _bad(tmp_path, [_config(tmp_path, path)], "broken.parquet")
    assert _digest(path) == digest


def test_label_absent(tmp_path):
    _bad(tmp_path, [_config(tmp_path, _table(tmp_path), input__label="fault")], "'fault'", "input.label")


def test_single_class(tmp_path):
    _bad(tmp_path, [_config(tmp_path, _table(tmp_path, label=["a"] * 600))], "single class")


def test_missing_label_values(tmp_path):
    label = pa.array(["a", None] * 300)
    path = _table(tmp_path)
    table = pq.read_table(path).set_column(3, "label", label)
    pq.write_table(table, path)
    _bad(tmp_path, [_config(tmp_path, path)], "missing values", "'label'")


def test_duplicate_ids(tmp_path):
    ids = [f"r{i}" for i in range(599)] + ["r0"]
    _bad(tmp_path, [_config(tmp_path, _table(tmp_path, rid=ids), input__id="rid")], "'rid'", "'r0'")


def test_unknown_config_key(tmp_path):
    _bad(tmp_path, [_config(tmp_path, _table(tmp_path), selection__fractoin=0.3)], "selection.fractoin", "unknown key")


@pytest.mark.parametrize("fraction", ["0", "1.5", "-0.1"])
def test_fraction_out_of_range(tmp_path, fraction):
    _bad(tmp_path, [_config(tmp_path, _table(tmp_path)), "--fraction", fraction], "selection.fraction")


def test_class_too_small(tmp_path):
    label = ["a"] * 300 + ["b"] * 297 + ["z"] * 3
    _bad(tmp_path, [_config(tmp_path, _table(tmp_path, label=label))], "'z'", "proxy.folds")


def test_unsupported_feature_type(tmp_path):
    when = pd.date_range("2026-01-01", periods=600, freq="h")
    _bad(tmp_path, [_config(tmp_path, _table(tmp_path, seen_at=when))], "'seen_at'", "input.exclude")


def test_streamed_run_writes_the_same_decisions_as_an_in_memory_run(prefect_api, tmp_path):
    """A whole run with the features read from disk (``execution.feature_memory_mb: 0``) publishes a
    conserved manifest and kept rows, with the same decisions as the run that held the matrix."""
    table = _table(tmp_path, n=900)
    manifests = []
    for name, mb in (("memory", 1024), ("streamed", 0)):
        cfg = _config(tmp_path, table, name=f"{name}.yaml", store=tmp_path / name,
                      execution__feature_memory_mb=mb, execution__batch_rows=128)
        result = runner.invoke(app, ["run", str(cfg)])
        assert result.exit_code == 0, result.output
        (run_dir,) = [p for p in (tmp_path / name / "runs").iterdir() if not p.name.startswith(".")]
        manifests.append(pq.read_table(run_dir / "manifest.parquet").to_pandas())
        kept = pq.read_table(run_dir / "kept.parquet").to_pandas()
        assert len(kept) == (manifests[-1]["decision"] == "keep").sum()
    memory, streamed = manifests
    assert len(streamed) == 900 and streamed["row_id"].is_unique
    pd.testing.assert_frame_equal(streamed[["row_id", "split", "decision", "reason"]], memory[["row_id", "split", "decision", "reason"]])


# --- the command line as a user meets it: version, help, audit by config, rows by value, JSON errors ---

def test_version_comes_from_package_metadata():
    from importlib.metadata import version

    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0 and result.output.strip() == f"leanset {version('leanset')}"


def test_help_groups_commands_and_lists_choices():
    wide = CliRunner(env={"COLUMNS": "200"})
    top = wide.invoke(app, ["--help"]).output
    for panel in ("Pipeline", "Audit", "Tools", "--install-completion"):
        assert panel in top
    assert top.index("Pipeline") < top.index(" run ") < top.index("Audit") < top.index(" why ") < top.index("Tools")
    run_help = wide.invoke(app, ["run", "--help"]).output
    assert "stratified|hardest|easiest|random" in run_help and "auto" in run_help and "--fail-on" in run_help


def _prune_to(tmp_path, name, **extra):
    import leanset

    n = 600
    path = _table(tmp_path, n=n, name=f"{name}.parquet", serial=np.arange(1000, 1000 + n))
    cfg = _config(tmp_path, path, name=f"{name}.yaml", store=tmp_path / f"{name}-store", proxy__agreement_rows=0, **extra)
    leanset.prune(path, config=cfg)
    return cfg, path


def test_audit_finds_the_store_a_config_names_and_rows_by_value(tmp_path):
    # the table's own id column, integers: why takes its value
    with_id, _ = _prune_to(tmp_path, "ids", input__id="serial")
    listed = runner.invoke(app, ["runs", "--config", str(with_id), "--json"])
    assert listed.exit_code == 0, listed.output
    (run,) = json.loads(listed.output)
    why = runner.invoke(app, ["why", "1017", "--config", str(with_id), "--json"])
    assert why.exit_code == 0, why.output
    assert json.loads(why.output)["row_id"] == "1017" and json.loads(why.output)["run_id"] == run["run_id"]

    # derived ids: --find COLUMN=VALUE reads the run's input and names the row's derived id
    derived, path = _prune_to(tmp_path, "derived", input__exclude=["serial"])
    found = runner.invoke(app, ["why", "--find", "serial=1017", "--config", str(derived), "--json"])
    assert found.exit_code == 0, found.output
    (run_dir,) = [p for p in (tmp_path / "derived-store" / "runs").iterdir() if not p.name.startswith(".")]
    manifest = pq.read_table(run_dir / "manifest.parquet").to_pandas()
    position = int(np.flatnonzero(pd.read_parquet(path)["serial"] == 1017)[0])
    assert json.loads(found.output)["row_id"] == manifest["row_id"][position]
    assert json.loads(found.output)["decision"] == manifest["decision"][position]


def test_errors_are_json_with_json(tmp_path):
    result = runner.invoke(app, ["runs", "--store", str(tmp_path / "nowhere"), "--json"])
    assert result.exit_code == 2
    error = json.loads(result.stdout)
    assert error["type"] == "StoreError" and "nowhere" in error["error"] and error["exit_code"] == 2
    both = runner.invoke(app, ["runs", "--store", "a", "--config", "b.yaml", "--json"])
    assert both.exit_code == 2 and "one of them" in json.loads(both.stdout)["error"]
    plain = runner.invoke(app, ["runs", "--store", str(tmp_path / "nowhere")])
    assert plain.exit_code == 2 and plain.output.startswith("leanset: error:")
