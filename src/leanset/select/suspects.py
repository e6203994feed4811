"""Suspected label errors in the select stage: how many of them a selection may keep.

``selection.drop_suspect_labels``:

- ``true``: drop every suspect;
- ``share``: keep a uniform draw of ``fraction`` of each class's suspects and drop the rest, so the
  kept rows hold suspects at the table's rate, as a random subset of the same size does, while the
  rule cannot favour them as hard rows;
- ``auto`` (the default): ``share`` while at most ``selection.suspect_limit`` of the training rows are
  flagged; above that the flags mark overlapping classes rather than wrong labels, and they are left to
  the rule like any other row;
- ``false``: leave them to the rule.
"""

from __future__ import annotations

import numpy as np

from ..config import SelectionConfig
from .rules import Selection, select, strata_count

#: What a row dropped as a suspected label error holds in each per-row field of a Selection.
_SUSPECT_FILL = {"keep": False, "reason": "drop:suspect_label", "stratum": -1, "weight": 0.0, "dup_count": 1, "conflict": False}


def suspect_mode(config: SelectionConfig, suspect: np.ndarray | None) -> tuple[str, str]:
    """``"drop"``, ``"share"`` or ``"eligible"`` for the suspects under ``config``, and why ``auto`` left
    them eligible (``""`` otherwise)."""
    if suspect is None or config.drop_suspect_labels is False or not suspect.any():
        return "eligible", ""
    if config.drop_suspect_labels is True:
        return "drop", ""
    if config.drop_suspect_labels == "auto" and suspect.mean() > config.suspect_limit:
        return "eligible", f"{suspect.mean():.1%} flagged, above suspect_limit {config.suspect_limit}: overlapping classes"
    return "share", ""


def suspect_share(y: np.ndarray, suspect: np.ndarray, fraction: float, seed: int) -> np.ndarray:
    """A uniform draw of round(``fraction`` × its suspects) of each class's suspects, as a boolean mask."""
    rng = np.random.default_rng([seed, 0x5A5E])
    take = np.zeros(len(y), bool)
    for c in np.unique(y[suspect]):
        rows = np.flatnonzero(suspect & (y == c))
        take[rng.choice(rows, size=int(round(fraction * len(rows))), replace=False)] = True
    return take


def select_rows(difficulty: np.ndarray, y: np.ndarray, config: SelectionConfig, seed: int,
                suspect: np.ndarray | None = None, **per_row) -> Selection:
    """:func:`~leanset.select.rules.select`, after setting the suspected label errors aside as
    :func:`suspect_mode` says.

    Suspects that are not kept get ``drop:suspect_label``; those ``share`` keeps get
    ``keep:suspect_share`` and their class's weight. The others are selected with the fraction set so
    that the budget stays ``round(fraction * n)`` of all ``n`` rows. ``per_row`` holds the optional
    per-row arguments of ``select`` (``segments``, ``X``). When ``auto`` leaves the suspects eligible,
    ``info["suspects_kept"]`` says why.

    Parameters
    ----------
    suspect : ndarray of bool, shape (n,), optional
        ``suspect_label`` of each row (``Scores.table``).
    """
    mode, why_not = suspect_mode(config, suspect)
    if mode == "eligible":
        sub = select(difficulty, y, config, seed, **per_row)
        if why_not:
            sub.info["suspects_kept"] = {"rows": int(suspect.sum()), "because": why_not}
        return sub
    share = suspect_share(y, suspect, config.fraction, seed) if mode == "share" else np.zeros(len(y), bool)
    ok = ~suspect
    n = len(y)
    fraction = min(1.0, max(config.fraction * n - share.sum(), 0.0) / max(int(ok.sum()), 1))
    # the bins follow the fraction asked for, not the share of the unflagged rows that makes it up
    sub = select(difficulty[ok], y[ok], config.model_copy(update={"fraction": fraction, "strata": strata_count(config)}), seed,
                 **{k: None if v is None else v[ok] for k, v in per_row.items()})
    fields = {}
    for name, value in vars(sub).items():
        if isinstance(value, np.ndarray) and len(value) == int(ok.sum()):
            full = np.full(n, _SUSPECT_FILL[name], dtype=value.dtype)
            full[ok] = value
            fields[name] = full
        else:
            fields[name] = value
    fields["keep"][share] = True
    fields["reason"][share] = "keep:suspect_share"
    # a class whose every row is suspect is absent from ``sub``: quota 0, weight 1
    k = int(y.max()) + 1
    weights = np.pad(np.asarray(sub.info["class_weights"], np.float64), (0, k - len(sub.info["class_weights"])),
                     constant_values=1.0)
    fields["weight"][share] = weights[y[share]]
    quota = np.pad(np.asarray(sub.info["quota"]), (0, k - len(sub.info["quota"]))) + np.bincount(y[share], minlength=k)
    fields["info"] = {**sub.info, "kept": int(fields["keep"].sum()), "quota": quota.tolist(),
                      "suspect_dropped": int((suspect & ~share).sum()), "suspect_shared": int(share.sum())}
    return Selection(**fields)
