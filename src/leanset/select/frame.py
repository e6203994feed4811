"""The select stage on a loaded table: difficulty, groups, segments and duplicates from the ``RowFrame``."""

from __future__ import annotations

import logging

import numpy as np

from ..config import Config, SelectionConfig
from .rules import Selection
from .suspects import select_rows

logger = logging.getLogger(__name__)


def select_frame(frame, scores, config: Config, selection: SelectionConfig | None = None,
                 rows: np.ndarray | None = None) -> Selection:
    """The select stage on a loaded ``RowFrame`` and its ``Scores``: difficulty by ``selection.score``,
    quotas over classes (label bins on a regression table) and segments, duplicates by feature
    hash, suspected label errors; ``selection`` replaces ``config.selection`` when given.
    ``rows`` (positions among the training rows) restricts the selection to those rows."""
    selection = selection or config.selection
    rows = np.arange(len(frame.train)) if rows is None else rows
    logger.info("select: %s on %s, fraction %s of %d training rows", selection.strategy, selection.score, selection.fraction, len(rows))
    train, suspect = frame.train[rows], scores.suspects()
    return select_rows(scores.difficulty(selection.score)[rows], frame.groups[train], selection, config.seed,
                       suspect=None if suspect is None else suspect[rows],
                       segments=None if frame.segments is None else frame.segments[train], X=frame.feature_hash[train],
                       locus=None if (locus := scores.locus()) is None else locus[rows])
