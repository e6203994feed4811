"""The verdict against random subsets in plain words, shared by the terminal summary and report.html.

Plain Python only: the command line imports it at start-up.
"""

from __future__ import annotations


AGAINST_RANDOM = {
    "better": "better than random subsets of the same size (above their interval)",
    "on_par": "no better than random subsets of the same size (inside their interval): a random subset would do as "
              "well and costs nothing",
    "worse": "worse than random subsets of the same size (below their interval): prefer a random subset, or try "
             "another rule with `leanset frontier`",
}


def against_random_text(a: dict[str, str]) -> str:
    """The verdict's ``against_random`` in plain words (metric first, then calibration)."""
    text = f"metric {AGAINST_RANDOM[a['metric']]}"
    if "calibration" in a:
        text += f"; calibration {AGAINST_RANDOM[a['calibration']].split(' (')[0]}"
    return text
