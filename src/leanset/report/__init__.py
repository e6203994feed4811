"""Reports read from a published run's records: the terminal summary, the Prefect markdown, ``report.html``,
and the tables of the audit answers.

``render_html`` is imported when first used, so that the audit commands (:mod:`leanset.report.audit_tables`)
start without loading numpy, pyarrow or matplotlib.
"""

import importlib

from .summary import read_run, summary

__all__ = ["read_run", "render_html", "summary"]


def __getattr__(name: str):
    if name == "render_html":
        return importlib.import_module(".html", __name__).render_html
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
