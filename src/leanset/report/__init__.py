"""Reports read from a published run's records: the terminal summary, the Prefect markdown, ``report.html``."""

from .html import render_html
from .summary import read_run, summary

__all__ = ["read_run", "render_html", "summary"]
