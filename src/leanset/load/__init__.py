"""Load stage: read and check the input table, derive row ids, split the holdout, assign proxy folds."""

from .table import RowFrame, RowView, check_input, load_table

__all__ = ["RowFrame", "RowView", "check_input", "load_table"]
