"""Command line: parses arguments and calls the flows; every LeansetError becomes one line and exit 2
(a JSON object with ``--json``).

Stage modules are imported inside the commands that use them, so the audit commands start
without loading pandas, LightGBM or Prefect. Commands are grouped in the help by the panels
``PIPELINE``, ``AUDIT`` and ``TOOLS``; a new command names its panel with ``rich_help_panel=``.
"""

import os
from pathlib import Path

# each module registers its commands on the app; the help lists the panels in this order
from . import pipeline  # noqa: F401
from . import audit  # noqa: F401,I001
from . import tools  # noqa: F401,I001
from .common import app, err
from ..errors import LeansetError

__all__ = ["app", "main"]


def main() -> None:
    """Console-script entry point.

    A problem of the input or the environment (a ``LeansetError``, an ``OSError`` such as a full
    disk or a denied write, memory running out) is one line and exit 2; any other error is one
    line naming a log file that holds its traceback, and exit 1. Without ``--verbose``, Prefect logs
    nothing below CRITICAL, so that a failed task's traceback reaches the log file, not the terminal.
    """
    import sys

    if "--verbose" not in sys.argv[1:]:
        os.environ.setdefault("PREFECT_LOGGING_LEVEL", "CRITICAL")
    try:
        app()
    except LeansetError as exc:
        _line(str(exc))
    except OSError as exc:
        where = f"{exc.filename}: " if exc.filename else ""
        _line(f"{where}{exc.strerror or exc}; check that the path exists, its permissions and the free space")
    except MemoryError:
        _line("out of memory; lower execution.feature_memory_mb so that features are read in batches, or use a larger machine")
    except Exception as exc:
        first = (str(exc).splitlines() or [""])[0]
        _line(f"{type(exc).__name__}: {first} (unexpected, a leanset bug; the traceback is in {_traceback_log()})",
              code=1, kind="internal error")


def _line(message: str, code: int = 2, kind: str = "error") -> None:
    from rich.markup import escape

    err.print(f"[red]leanset: {kind}:[/red] {escape(message)}", soft_wrap=True, highlight=False)
    raise SystemExit(code)


def _traceback_log() -> Path:
    """Write the exception being handled, with its traceback, to a new log file; return its path."""
    import tempfile
    import traceback

    folder = Path(os.environ.get("LEANSET_LOG_DIR") or tempfile.gettempdir())
    folder.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix="leanset-error-", suffix=".log", dir=folder)
    with os.fdopen(fd, "w") as handle:
        handle.write(traceback.format_exc())
    return Path(name)
