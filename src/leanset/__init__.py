"""leanset: shrink a labeled table with a cheap proxy model, verify a target model on the kept rows, record why.

The select and verify stages are the functions ``leanset.select.select`` and ``leanset.verify.verify``.
"""

from .config import Config, load_config
from .errors import ConfigError, InputError, LeansetError, StoreError
from .scores import Scores, score
from .select import Selection
from .store import write_run
from .table import RowFrame, load_table
from .verify import Verdict

__all__ = [
    "Config", "ConfigError", "InputError", "LeansetError", "RowFrame", "Scores", "Selection",
    "StoreError", "Verdict", "load_config", "load_table", "score", "write_run",
]
__version__ = "0.1.0"
