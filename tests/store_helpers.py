"""Helpers for the run-store tests: invented tables in a growing folder, small configs, runs."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import yaml
from typer.testing import CliRunner

from leanset.cli import app

runner = CliRunner(env={"COLUMNS": "200"})  # wide enough that paths and ids are not folded
CLI = [sys.executable, "-c", "from leanset.cli import main; main()"]


def part(folder: Path, name: str, start: int, n: int, seed: int, ids: bool = True) -> Path:
    """Write ``n`` invented rows (ids ``r<start>`` … when ``ids``) as ``folder/name``; return the file."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    label = np.where(x[:, 0] + 0.4 * rng.normal(size=n) > 0.3, "b", "a")
    label[x[:, 2] > 1.0] = "c"
    df = pd.DataFrame({"x0": x[:, 0], "x1": x[:, 1], "x2": x[:, 2], "color": rng.choice(["red", "blue"], n), "label": label})
    if ids:
        df.insert(0, "rid", [f"r{i:07d}" for i in range(start, start + n)])
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    df.to_parquet(path)
    return path


def config(tmp_path: Path, input_path: Path, store: Path | None = None, name: str = "config.yaml", **extra) -> Path:
    """A small, fast config; ``extra`` keys are dotted with ``__`` (``selection__fraction=0.3``)."""
    sections = {
        "input": {"path": str(input_path), "label": "label"},
        "proxy": {"folds": 3, "rounds": 20, "checkpoint_every": 5},
        "selection": {"fraction": 0.4, "class_floor": 5},
        "target": {"params": {"num_boost_round": 30}},
        "verify": {"bootstrap": 200, "tolerance": 0.05, "random_repeats": 1},
        "store": str(store or tmp_path / "store"),
        "seed": 3,
    }
    for dotted, value in extra.items():
        node = sections
        *parents, leaf = dotted.split("__")
        for p in parents:
            node = node.setdefault(p, {})
        node[leaf] = value
    path = tmp_path / name
    path.write_text(yaml.safe_dump(sections))
    return path


def cli(*args) -> "object":
    """Invoke the CLI in-process; returns typer's Result."""
    return runner.invoke(app, [str(a) for a in args])


def run_ok(cfg: Path, *args):
    """``leanset run`` that must succeed; returns typer's Result."""
    result = cli("run", cfg, *args)
    assert result.exit_code == 0, result.output
    return result


def subprocess_run(args: list, api_url: str, **kwargs) -> subprocess.Popen:
    """Start ``leanset ARGS`` in a child process using the test session's Prefect API."""
    env = {**os.environ, "PREFECT_API_URL": api_url, "PREFECT_LOGGING_LEVEL": "WARNING", "COLUMNS": "200"}
    return subprocess.Popen([*CLI, *map(str, args)], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, **kwargs)


def published(store: Path) -> list[Path]:
    """Published run directories, in publication order."""
    runs = store / "runs"
    if not runs.exists():
        return []
    dirs = [d for d in runs.iterdir() if not d.name.startswith(".")]
    return sorted(dirs, key=lambda d: json.loads((d / "run.json").read_text())["sequence"])


def manifest(run_dir: Path) -> pd.DataFrame:
    return pq.read_table(run_dir / "manifest.parquet").to_pandas()


def run_json(run_dir: Path) -> dict:
    return json.loads((run_dir / "run.json").read_text())


def assert_conserved(run_dir: Path, input_ids: set) -> None:
    """The run's manifest holds every input row once, and kept + dropped + holdout = input rows."""
    m = manifest(run_dir)
    r = run_json(run_dir)
    assert m["row_id"].is_unique and set(m["row_id"]) == input_ids
    c = r["counts"]
    assert c["kept"] + c["dropped"] + c["holdout"] == r["input"]["rows"] == len(m)
    assert (m["decision"] == "keep").sum() == c["kept"] == pq.read_metadata(run_dir / "kept.parquet").num_rows
    assert {"run.json", "manifest.parquet", "kept.parquet", "report.html", "models"} <= {p.name for p in run_dir.iterdir()}
