"""leanset: shrink a labeled table with a cheap proxy model, verify a target model on the kept rows, record why.

The select and verify stages are the functions ``leanset.select.select`` and ``leanset.verify.verify``.
"""

import importlib

from .errors import ConfigError, InputError, LeansetError, StoreError

# Public names are imported when first used, so that `leanset runs` / `why` / `history` start
# without loading the model libraries (LightGBM, scikit-learn, SciPy).
_LAZY = {
    "Config": "config", "load_config": "config", "Scores": "scores.dynamics", "score": "scores.dynamics",
    "Selection": "select.rules", "write_run": "store.publish", "RowFrame": "load.table", "load_table": "load.table",
    "Verdict": "verify.stats",
}

__all__ = [
    "Config", "ConfigError", "InputError", "LeansetError", "RowFrame", "Scores", "Selection",
    "StoreError", "Verdict", "load_config", "load_table", "score", "write_run",
]


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'leanset' has no attribute {name!r}")


__version__ = "0.1.0"
