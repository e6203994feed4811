"""The cost ledger of a run: what leanset spent, what a fit on the kept rows saves, and when it pays.

Stage seconds come from the flow's timings; the target's fit seconds on all, kept and random rows
from the verify stage (or from the run whose verdict was carried). A saving per later fit is
``full − kept``; the selection pays for itself after ``ceil(cost / saving)`` fits of the target on
the kept rows, where ``cost`` is leanset's own seconds without the verification, and again with it.
"""

from __future__ import annotations

import math
from typing import Any

#: Stages that make the kept set; every stage not listed under verification counts here.
VERIFICATION_STAGES = ("fit-full", "search-fraction", "verify", "frontier")
#: Stages in the end-to-end figure: full fit / (these + kept-row fit); the agreement check and
#: load and write count in the break-even, not here.
END_TO_END_STAGES = ("score", "select", "stabilise")
#: A kept-row fit that saves less than this share of the full-data fit is called no real saving
#: (a leanset choice; common practice, no source).
SMALL_SAVING = 0.2


def _ceil_ratio(cost: float, saving: float) -> int | None:
    """Fits needed to recover ``cost`` at ``saving`` per fit; None when a fit saves nothing."""
    if saving <= 0:
        return None
    return max(1, math.ceil(round(cost / saving, 9)))


def cost_ledger(timings: dict[str, float], fits: dict[str, float] | None, fits_from: str | None = None) -> dict[str, Any]:
    """The ``cost`` section of run.json.

    Parameters
    ----------
    timings : dict
        Seconds by stage, as the flow measured them.
    fits : dict or None
        The target's fit seconds: ``full``, ``kept`` and ``random`` (a same-size random subset).
        None when no target was fitted and no verdict was carried.
    fits_from : str, optional
        The run the fit seconds come from when this run carried its verdict.

    Returns
    -------
    dict
        ``stages``; ``selection_seconds`` and ``verification_seconds``; ``target_fit_seconds``
        and ``target_fits_from``; ``saving_per_fit`` and ``speedup_per_fit``;
        ``break_even_fits`` and ``break_even_fits_with_verification`` (None when a fit on the
        kept rows saves nothing); ``end_to_end_speedup`` (full fit / (score + select +
        kept-row fit)); ``saves_time`` (the saving is at least ``SMALL_SAVING`` of the
        full fit); ``agreement_share`` (the agreement check's seconds over the full-data fit's).
    """
    stages = {k: float(v) for k, v in timings.items()}
    verification = sum(s for k, s in stages.items() if k in VERIFICATION_STAGES)
    selection = sum(s for k, s in stages.items() if k not in VERIFICATION_STAGES)
    out: dict[str, Any] = {
        "stages": stages, "selection_seconds": round(selection, 3), "verification_seconds": round(verification, 3),
        "target_fit_seconds": None, "target_fits_from": fits_from, "saving_per_fit": None, "speedup_per_fit": None,
        "break_even_fits": None, "break_even_fits_with_verification": None, "end_to_end_speedup": None,
        "saves_time": None, "agreement_share": None,
    }
    if not fits:
        return out
    full, kept = float(fits["full"]), float(fits["kept"])
    saving = full - kept
    core = sum(stages.get(k, 0.0) for k in END_TO_END_STAGES)
    out.update({
        "target_fit_seconds": {k: round(float(v), 3) for k, v in fits.items()},
        "saving_per_fit": round(saving, 3),
        "speedup_per_fit": round(full / kept, 3) if kept > 0 else None,
        "break_even_fits": _ceil_ratio(selection, saving),
        "break_even_fits_with_verification": _ceil_ratio(selection + verification, saving),
        "end_to_end_speedup": round(full / (core + kept), 3) if core + kept > 0 else None,
        "saves_time": bool(saving >= SMALL_SAVING * full),
        "agreement_share": round(stages["agreement"] / full, 4) if "agreement" in stages and full > 0 else None,
    })
    return out


def ledger_lines(cost: dict[str, Any]) -> list[tuple[str, str]]:
    """The ledger as (label, text) rows for the run summary, in plain words."""
    stages = cost["stages"]
    own = " · ".join(f"{k} {s:.1f}" for k, s in stages.items() if k not in VERIFICATION_STAGES)
    check = " · ".join(f"{k} {s:.1f}" for k, s in stages.items() if k in VERIFICATION_STAGES)
    rows = [("leanset cost", f"{cost['selection_seconds']:.1f} s to select ({own})"
             + (f"; {cost['verification_seconds']:.1f} s to verify ({check})" if check else "; verification skipped"))]
    if cost.get("agreement_share") is not None:
        rows.append(("agreement cost", f"{stages['agreement']:.2f} s = {cost['agreement_share']:.1%} of one full-data "
                     "target fit"))
    fits = cost.get("target_fit_seconds")
    if not fits:
        return rows
    source = f" (measured in run {cost['target_fits_from']})" if cost.get("target_fits_from") else ""
    saving = cost["saving_per_fit"]
    speedup = f" (speed-up {cost['speedup_per_fit']:.2f}× per fit)" if cost.get("speedup_per_fit") else ""
    rows.append(("target fit", f"all rows {fits['full']:.2f} s · kept {fits['kept']:.2f} s{speedup} · random same size "
                 f"{fits.get('random', float('nan')):.2f} s{source}"))
    if cost["break_even_fits"] is None:
        rows.append(("break-even", f"never: a fit on the kept rows saves nothing ({saving:+.2f} s per fit)"))
    else:
        rows.append(("break-even", f"{saving:.2f} s saved per later fit on the kept rows; the selection pays for itself "
                     f"after {cost['break_even_fits']} fits, {cost['break_even_fits_with_verification']} counting "
                     f"the verification; end-to-end speed-up on one fit {cost['end_to_end_speedup']:.2f}× "
                     "(full fit / (score + select + kept fit))"))
    if not cost["saves_time"]:
        rows.append(("no real saving", f"pruning does not save time here: the kept-row fit takes {fits['kept']:.2f} s "
                     f"against {fits['full']:.2f} s on all rows, because the target's cost barely shrinks with rows at "
                     "this size; it would pay on a larger table, or with a target whose fit time grows with the rows "
                     "(more rounds, more leaves, a slower learner)"))
    return rows
