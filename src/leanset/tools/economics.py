"""``leanset bench economics``: does pruning pay on a large table with an expensive target?

The table is invented: ``rows / copies`` prototype rows from :func:`leanset.tools.invented.table_chunks`
(a seeded linear rule with Gumbel label noise), each drawn ``copies`` times on average with a
little jitter (redundant rows), ``redundant`` extra columns that are noisy mixes of the first
ones (redundant features), and a share ``flip`` of labels moved to another class. The run is the
ordinary pipeline with ``selection.fraction: auto`` and an expensive LightGBM target; its figures
come from its run.json (timings, verdict and the cost ledger).
"""

from __future__ import annotations

import shutil
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import yaml

from .bench import machine
from .invented import CHUNK_ROWS, table_chunks
from ..errors import ConfigError

#: Columns of the rule; the others are mixes of these.
INFORMATIVE = 20


def economics_chunks(rows: int, features: int, classes: int, flip: float, copies: int, seed: int):
    """The invented table, ``CHUNK_ROWS`` rows at a time: ``(X, y)`` with X float32 (m, features).

    Every row copies a prototype (uniform over ``max(1, rows // copies)`` prototypes) plus
    N(0, 0.05²) jitter; columns from ``INFORMATIVE`` on are mixes of the informative ones plus
    N(0, 0.1²) noise; a share ``flip`` of the labels is moved to another class uniformly.
    """
    informative = min(INFORMATIVE, features)
    protos = max(1, rows // copies)
    P = np.empty((protos, informative), np.float32)
    label = np.empty(protos, np.int32)
    for start, Xc, yc in table_chunks(protos, informative, classes, seed):
        P[start:start + len(yc)], label[start:start + len(yc)] = Xc, yc
    mix = np.random.default_rng([seed, 0xEC0]).standard_normal((informative, features - informative)).astype(np.float32)
    mix /= np.sqrt(informative)
    for index, start in enumerate(range(0, rows, CHUNK_ROWS)):
        m = min(CHUNK_ROWS, rows - start)
        rng = np.random.default_rng([seed, 0xEC0, index])
        pick = rng.integers(0, protos, m)
        base = P[pick] + 0.05 * rng.standard_normal((m, informative), dtype=np.float32)
        extra = base @ mix + 0.1 * rng.standard_normal((m, features - informative), dtype=np.float32)
        y = label[pick].copy()
        flipped = rng.random(m) < flip
        y[flipped] = (y[flipped] + rng.integers(1, classes, int(flipped.sum()))) % classes
        yield np.hstack([base, extra]), y


def write_economics_table(out: Path, rows: int, features: int, classes: int, flip: float, copies: int,
                          seed: int) -> Path:
    """Write :func:`economics_chunks` as ``out/part-00000.parquet``, … (built aside, then renamed).

    Columns ``x0`` … and ``label``. A table already at ``out`` with the same shape is reused.
    """
    out = Path(out)
    meta = {"rows": rows, "features": features, "classes": classes, "flip": flip, "copies": copies, "seed": seed}
    stamp = out / "_economics.yaml"
    if stamp.is_file() and yaml.safe_load(stamp.read_text()) == meta:
        return out
    if out.exists() and any(out.iterdir()):
        raise ConfigError(f"{out}: holds something other than this benchmark's table; pass another --dir or remove it")
    if features < 2 or classes < 2 or not 0 <= flip < 1 or copies < 1:
        raise ConfigError(f"bench economics: {features} features, {classes} classes, flip {flip}, copies {copies}; "
                          "give at least 2 features and 2 classes, a flip share in [0, 1) and copies of 1 or more")
    tmp = out.parent / f"{out.name}.tmp-{uuid.uuid4().hex[:12]}"
    tmp.mkdir(parents=True)
    schema = pa.schema([(f"x{j}", pa.float32()) for j in range(features)] + [("label", pa.int32())])
    try:
        per_file = 10  # chunks per parquet file
        writer = None
        for i, (X, y) in enumerate(economics_chunks(rows, features, classes, flip, copies, seed)):
            if i % per_file == 0:
                if writer is not None:
                    writer.close()
                writer = pq.ParquetWriter(tmp / f"part-{i // per_file:05d}.parquet", schema)
            writer.write_table(pa.Table.from_arrays([*np.ascontiguousarray(X.T), y], schema=schema))
        writer.close()
        (tmp / "_economics.yaml").write_text(yaml.safe_dump(meta))
        if out.exists():
            out.rmdir()
        tmp.rename(out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


def economics_config(folder: Path, table: Path, rounds: int, leaves: int, threads: int, random_repeats: int,
                     seed: int, selection: dict[str, Any] | None = None) -> Path:
    """Write the run's config beside the table: ``fraction: auto``, the expensive target, and any
    ``selection`` keys that replace the defaults."""
    config = {
        "input": {"path": str(table), "label": "label"},
        "selection": {"fraction": "auto", "quotas": "proportional", **(selection or {})},
        "target": {"params": {"num_boost_round": rounds, "num_leaves": leaves, "learning_rate": 0.05,
                              "num_threads": threads}},
        "verify": {"random_repeats": random_repeats},
        "store": str(folder / "store"),
        "seed": seed,
    }
    path = folder / "economics.yaml"
    path.write_text(yaml.safe_dump(config))
    return path


def economics_lines(run: dict[str, Any], rows: int) -> list[str]:
    """The benchmark's figures from a run's run.json; the last line is ``end_to_end_speedup=…``."""
    t, v, cost = run["timings"], run["verdict"], run["cost"]
    fits = cost["target_fit_seconds"]
    full = fits["full"]
    kept_share = run["counts"]["kept"] / max(run["counts"]["train"], 1)
    score_select = t.get("score", 0.0) + t.get("select", 0.0) + t.get("stabilise", 0.0)
    found = run.get("search", {}).get("fraction")
    return [
        machine(),
        f"table: {rows:,} rows; train {run['counts']['train']:,}, holdout {run['counts']['holdout']:,}; target "
        f"{run['config']['target']['params']}",
        f"full-data fit: {full:.2f} s",
        f"score: {t.get('score', 0.0):.2f} s ({t.get('score', 0.0) / full:.1%} of the full fit); "
        f"agreement: {t.get('agreement', 0.0):.2f} s ({t.get('agreement', 0.0) / full:.1%})",
        f"select: {t.get('select', 0.0):.2f} s; score + select = {score_select / full:.1%} of the full fit",
        f"fraction found: {found}; kept {run['counts']['kept']:,} rows ({kept_share:.1%}); kept-row fit: {fits['kept']:.2f} s",
        f"fraction search: {t.get('search-fraction', 0.0):.2f} s over {len(run.get('search', {}).get('tried', []))} "
        f"fractions; verify: {t.get('verify', 0.0):.2f} s",
        f"verdict: {v['status']} (Δ {v['metric']} {v['delta']:+.4f}, CI [{v['ci'][0]:+.4f}, {v['ci'][1]:+.4f}], "
        f"tolerance {v['tolerance']})",
        f"break-even: {cost['break_even_fits']} later fits; {cost['break_even_fits_with_verification']} counting "
        f"the verification ({cost['verification_seconds']:.1f} s)",
        f"end_to_end_speedup={cost['end_to_end_speedup']:.3f}",
    ]
