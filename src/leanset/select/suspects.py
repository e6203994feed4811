"""Suspected label errors in the select stage: whether they are dropped, and the selection without them.

``selection.drop_suspect_labels`` is ``true`` (always drop), ``false`` (never) or ``auto`` (the
default): drop them when the fraction is at most :data:`SUSPECT_DROP_UP_TO` and at most
``selection.suspect_limit`` of the training rows are flagged (so many flags mark overlapping
classes, not wrong labels).
"""

from __future__ import annotations

import numpy as np

from ..config import SelectionConfig
from .rules import Selection, select

#: What a row dropped as a suspected label error holds in each per-row field of a Selection.
_SUSPECT_FILL = {"keep": False, "reason": "drop:suspect_label", "stratum": -1, "weight": 0.0, "dup_count": 1, "conflict": False}


#: ``drop_suspect_labels: auto`` drops suspects only up to this kept fraction. When most rows are kept, a kept
#: set that holds the table's label noise stays calibrated to labels like the holdout's; dropping the suspects
#: then made the kept model over-confident (log loss above random's interval on the suite's noisy table). After
#: the coverage-centric paper (Zheng et al., ICLR 2023), which sets its hard cut by pruning rate; the value is
#: this project's choice, measured by ``leanset bench suite`` (docs/selection.md).
SUSPECT_DROP_UP_TO = 0.5


def drops_suspects(config: SelectionConfig, suspect: np.ndarray | None) -> tuple[bool, str]:
    """Whether the suspected label errors are dropped under ``config``, and why not when ``auto`` keeps
    them (``""`` otherwise)."""
    if suspect is None or config.drop_suspect_labels is False or not suspect.any():
        return False, ""
    if config.drop_suspect_labels is True:
        return True, ""
    if config.fraction > SUSPECT_DROP_UP_TO:
        return False, f"fraction above {SUSPECT_DROP_UP_TO}"
    if suspect.mean() > config.suspect_limit:
        return False, f"{suspect.mean():.1%} flagged, above suspect_limit {config.suspect_limit}: overlapping classes"
    return True, ""


def select_rows(difficulty: np.ndarray, y: np.ndarray, config: SelectionConfig, seed: int,
                suspect: np.ndarray | None = None, **per_row) -> Selection:
    """:func:`~leanset.select.rules.select`, after setting aside suspected label errors unless
    :func:`drops_suspects` says no.

    Suspects are dropped with ``drop:suspect_label``; the others are selected with the fraction
    raised so the budget stays ``round(fraction * n)`` of all ``n`` rows. ``per_row`` holds the
    optional per-row arguments of ``select`` (``segments``, ``X``). When ``auto`` keeps the
    suspects eligible, ``info["suspects_kept"]`` says why.

    Parameters
    ----------
    suspect : ndarray of bool, shape (n,), optional
        ``suspect_label`` of each row (``Scores.table``).
    """
    drop, why_not = drops_suspects(config, suspect)
    if not drop:
        sub = select(difficulty, y, config, seed, **per_row)
        if why_not:
            sub.info["suspects_kept"] = {"rows": int(suspect.sum()), "because": why_not}
        return sub
    ok = ~suspect
    n = len(y)
    fraction = min(1.0, config.fraction * n / max(int(ok.sum()), 1))
    sub = select(difficulty[ok], y[ok], config.model_copy(update={"fraction": fraction}), seed,
                 **{k: None if v is None else v[ok] for k, v in per_row.items()})
    fields = {}
    for name, value in vars(sub).items():
        if isinstance(value, np.ndarray) and len(value) == int(ok.sum()):
            full = np.full(n, _SUSPECT_FILL[name], dtype=value.dtype)
            full[ok] = value
            fields[name] = full
        else:
            fields[name] = value
    fields["info"] = {**sub.info, "suspect_dropped": int(suspect.sum())}
    return Selection(**fields)
