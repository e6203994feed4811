"""Benchmark commands: the invented parquet table (determinism, shape, refusal) and ``bench scale``'s report.

The tables are invented; the benchmarks' figures are printed, never asserted here.
"""

import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

import leanset.tools.bench as bench
import leanset.tools.invented as invented
from leanset.cli import app
from leanset.errors import ConfigError

runner = CliRunner()


def _read(folder):
    """The table in ``folder``, files in name order, as (X, y)."""
    table = pa.concat_tables([pq.read_table(f) for f in sorted(folder.glob("part-*.parquet"))])
    label = table.column("label").to_numpy()
    return np.column_stack([table.column(n).to_numpy() for n in table.column_names if n != "label"]), label


def _make(folder, *args):
    result = runner.invoke(app, ["bench", "make-table", "--out", str(folder), *args])
    assert result.exit_code == 0, result.output
    return result


def test_make_table_same_seed_same_rows_whatever_the_files(tmp_path, monkeypatch):
    """Same seed, same data for 2 or 3 files; file cuts fall inside generator chunks; columns and dtypes as documented."""
    monkeypatch.setattr(invented, "CHUNK_ROWS", 700)  # several chunks, cut by the files at other places
    result = _make(tmp_path / "two", "--rows", "2000", "--features", "4", "--classes", "3", "--files", "2", "--seed", "7")
    assert re.search(r"wrote 2,000 rows x 4 features, 3 classes to .*: 2 parquet files, [\d.]+ MiB in [\d.]+ s", result.output)
    _make(tmp_path / "three", "--rows", "2000", "--features", "4", "--classes", "3", "--files", "3", "--seed", "7")
    _make(tmp_path / "other", "--rows", "2000", "--features", "4", "--classes", "3", "--files", "2", "--seed", "8")

    parts = sorted(p.name for p in (tmp_path / "three").glob("*.parquet"))
    assert parts == ["part-00000.parquet", "part-00001.parquet", "part-00002.parquet"]
    schema = pq.read_schema(tmp_path / "three" / "part-00000.parquet")
    assert schema.names == ["x0", "x1", "x2", "x3", "label"]
    assert [str(t) for t in schema.types] == ["float"] * 4 + ["int32"]

    X2, y2 = _read(tmp_path / "two")
    X3, y3 = _read(tmp_path / "three")
    assert X2.shape == (2000, 4) and np.array_equal(X2, X3) and np.array_equal(y2, y3)
    assert set(np.unique(y2)) == {0, 1, 2}
    assert not np.array_equal(X2, _read(tmp_path / "other")[0])

    frame = invented.make_table(2000, 4, 3, seed=7)  # the in-memory table of `bench score`: the same rows
    assert np.array_equal(frame.X, X2) and np.array_equal(frame.y, y2)
    shorter = invented.make_table(1500, 4, 3, seed=7)  # a smaller table is the first rows of a larger one
    assert np.array_equal(shorter.X, X2[:1500]) and np.array_equal(shorter.y, y2[:1500])


def test_make_table_default_files_and_loadable(tmp_path):
    """Without --files the table is cut in at least 2 files, and load_table reads the folder as the table."""
    from leanset.config import Config
    from leanset.load.table import load_table

    _make(tmp_path / "t", "--rows", "900", "--features", "3", "--classes", "2")
    assert len(list((tmp_path / "t").glob("part-*.parquet"))) == 2
    frame = load_table(Config.model_validate({"input": {"path": tmp_path / "t", "label": "label"}}))
    assert frame.X.shape == (900, 3) and frame.feature_names == ["x0", "x1", "x2"] and frame.classes == [0, 1]


def test_make_table_refuses_a_non_empty_folder(tmp_path):
    """A folder with anything in it is left alone: exit 2, one line naming it and the fix."""
    out = tmp_path / "taken"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    result = runner.invoke(app, ["bench", "make-table", "--rows", "500", "--features", "2", "--classes", "2", "--out", str(out)])
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and str(out) in lines[0] and "remove" in lines[0]
    assert [p.name for p in out.iterdir()] == ["keep.txt"]
    assert [p.name for p in tmp_path.iterdir()] == ["taken"]  # no temporary folder left behind


def test_make_table_into_an_empty_folder(tmp_path):
    """An existing empty folder is filled."""
    (tmp_path / "empty").mkdir()
    _make(tmp_path / "empty", "--rows", "300", "--features", "2", "--classes", "2")
    assert len(list((tmp_path / "empty").glob("part-*.parquet"))) == 2


@pytest.mark.parametrize("args, text", [
    (["--sizes", "2000"], "at least two different sizes"),
    (["--sizes", "2000,lots"], "not whole numbers"),
])
def test_scale_refuses_bad_sizes(args, text):
    result = runner.invoke(app, ["bench", "scale", *args, "--features", "3"])
    assert result.exit_code == 2 and text in result.output and len(result.output.strip().splitlines()) == 1


def test_scale_report_and_table_reuse(tmp_path):
    """A tiny run: machine line, one row per size with its figures, the exponent last; its tables are kept for reuse."""
    args = ["bench", "scale", "--sizes", "4000,2000", "--features", "5", "--classes", "3", "--folds", "2", "--rounds", "8",
            "--checkpoint-every", "2", "--no-threshold-samples", "--dir", str(tmp_path)]
    result = runner.invoke(app, args)
    assert result.exit_code == 0, result.output
    lines = result.output.strip().splitlines()
    assert lines[0].startswith("machine: ")
    rows = [line.split() for line in lines if re.match(r"\s+[\d,]+\s+\d", line)]
    assert [r[0] for r in rows] == ["2,000", "4,000"] and [r[-1] for r in rows] == ["made", "made"]
    for r in rows:
        load, score_s, select_s, total = map(float, r[1:5])
        assert total == pytest.approx(load + score_s + select_s, abs=0.02)
        peak, start = float(r[5].replace(",", "")), float(r[7].replace(",", ""))
        assert peak >= start > 0
        assert float(r[6].rstrip("x")) == pytest.approx(peak * 2**20 / (int(r[0].replace(",", "")) * 5 * 4), rel=0.01)
        assert 0 < int(r[8].replace(",", "")) < int(r[0].replace(",", ""))
    assert re.fullmatch(r"time_exponent=-?\d+\.\d{3}", lines[-1])

    made = tmp_path / "rows-2000-f5-c3-seed0"
    assert invented.ensure_table(made, 2000, 5, 3, seed=0) is None  # there already: reused
    with pytest.raises(ConfigError, match="remove it or pass another --dir"):  # another shape: refused, not overwritten
        invented.ensure_table(made, 2000, 6, 3, seed=0)


def test_time_exponent_is_the_log_log_slope():
    """Seconds growing as rows**1.5 give exponent 1.5."""
    sizes = [bench.SizeBench(rows=n, features=1, load_seconds=0.0, score_seconds=2e-6 * n**1.5, select_seconds=1e-6 * n**1.5,
                             start_rss=1, peak_rss=1, kept=0, made=True) for n in (1000, 4000, 16000)]
    assert bench.time_exponent(sizes) == pytest.approx(1.5)


def test_scale_passes_on_an_error_found_in_the_child(tmp_path):
    """Bad input found by load_table in the per-size process comes back as its one line, exit 2."""
    result = runner.invoke(app, ["bench", "scale", "--sizes", "100,200", "--features", "2", "--classes", "40", "--dir", str(tmp_path)])
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert "needs at least" in lines[-1] and str(tmp_path / "rows-100-f2-c40-seed0") in lines[-1]
