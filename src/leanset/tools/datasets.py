"""scikit-learn's bundled datasets as parquet tables, for trying leanset on open data."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
from sklearn import datasets

from ..errors import ConfigError

BUNDLED = {
    "digits": datasets.load_digits,
    "breast_cancer": datasets.load_breast_cancer,
    "wine": datasets.load_wine,
    "iris": datasets.load_iris,
    "diabetes": datasets.load_diabetes,
}


def export_bundled(name: str, out: str | Path) -> Path:
    """Write a bundled scikit-learn dataset to ``out`` (parquet), label in column ``label``.

    Class labels are written as their names where the dataset has them (``target_names``).
    The file is written aside and renamed, so a failed export leaves nothing behind.
    """
    if name not in BUNDLED:
        raise ConfigError(f"unknown dataset '{name}'; choose one of {', '.join(BUNDLED)}")
    bunch = BUNDLED[name]()
    columns = [str(c).replace(" ", "_") for c in (bunch.feature_names if len(bunch.feature_names) else range(bunch.data.shape[1]))]
    df = pd.DataFrame(bunch.data, columns=columns)
    names = getattr(bunch, "target_names", None)
    df["label"] = [str(names[t]) for t in bunch.target] if names is not None and name != "diabetes" else bunch.target
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp")
    df.to_parquet(tmp, index=False)
    os.replace(tmp, out)
    return out


def flipped_table(name: str, rate: float, seed: int) -> tuple[pd.DataFrame, np.ndarray]:
    """A bundled classification dataset with a ``rate`` share of its labels moved, at random, each
    to another class drawn uniformly: known label errors for checking the suspect cut-off.

    Returns the table (row id ``rid``, float32 features ``f0``, ``f1``, …, integer ``label``) and
    the positions of the flipped rows.
    """
    X, y = BUNDLED[name](return_X_y=True)
    rng = np.random.default_rng(seed)
    n, k = len(y), int(y.max()) + 1
    flip = rng.choice(n, size=int(n * rate), replace=False)
    noisy = y.copy()
    noisy[flip] = (y[flip] + rng.integers(1, k, size=flip.size)) % k  # always another class
    table = pd.DataFrame(X.astype(np.float32), columns=[f"f{i}" for i in range(X.shape[1])])
    table.insert(0, "rid", [f"r{i}" for i in range(n)])
    table["label"] = noisy
    return table, flip
