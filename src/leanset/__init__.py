"""leanset: shrink a labeled table with a cheap proxy model, verify a target model on the kept rows, record why.

The select and verify stages are the functions ``leanset.select.select`` and ``leanset.verify.verify``.
"""

import importlib
from importlib import metadata

from .errors import ConfigError, InputError, LeansetError, StoreError

# Public names are imported when first used, so that `leanset runs` / `why` / `history` start
# without loading the model libraries (LightGBM, scikit-learn, SciPy).
_LAZY = {
    "Config": "config", "load_config": "config", "Scores": "scores.dynamics", "score": "scores.dynamics",
    "Selection": "select.rules", "write_run": "store.publish", "RowFrame": "load.rows", "load_table": "load.table",
    "Verdict": "verify.verdict",
    "RowPruner": "api", "prune": "api", "PruneResult": "api",
}

__all__ = [
    "Config", "ConfigError", "InputError", "LeansetError", "PruneResult", "RowFrame", "RowPruner", "Scores", "Selection",
    "StoreError", "Verdict", "load_config", "load_table", "prune", "score", "write_run",
]


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'leanset' has no attribute {name!r}")


try:
    __version__ = metadata.version(__name__)  # the one place the version is set is pyproject.toml
except metadata.PackageNotFoundError:  # run from a source tree that was never installed
    __version__ = "0+unknown"
