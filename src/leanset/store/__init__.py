"""Write stage and the store: atomic run directories, lineage and churn, and the audit questions.

Names are imported when first used, so that the audit commands (:mod:`leanset.store.audit`) start
without loading pandas, pyarrow or the model libraries.
"""

import importlib

_LAZY = {"write_run": "publish", "read_parent": "lineage", "store_lock": "publish", "ParentRun": "lineage"}

__all__ = ["ParentRun", "read_parent", "store_lock", "write_run"]


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
