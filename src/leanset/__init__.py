"""leanset: shrink a labeled table with a cheap proxy model, verify a target model on the kept rows, record why."""

from .config import Config, load_config
from .errors import ConfigError, InputError, LeansetError, StoreError
from .scores import Scores, score
from .select import Selection, select
from .store import write_run
from .table import RowFrame, load_table
from .verify import Verdict, verify

__all__ = [
    "Config", "ConfigError", "InputError", "LeansetError", "RowFrame", "Scores", "Selection",
    "StoreError", "Verdict", "load_config", "load_table", "score", "select", "verify", "write_run",
]
__version__ = "0.1.0"
