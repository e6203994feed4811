"""The cost ledger: stage seconds, target fit seconds, saving per fit and break-even, worked by hand.

Break-even is the issue's definition: after ceil(cost / saving) later fits of the target on the
kept rows the selection has paid for itself; cost is leanset's own seconds without the
verification, then with it.
"""

import pytest

from leanset.report.ledger import cost_ledger, ledger_lines

TIMINGS = {"load": 1.0, "score": 4.0, "agreement": 0.5, "select": 0.5, "verify": 20.0, "write": 1.0}


def test_ledger_arithmetic_hand_worked():
    cost = cost_ledger(TIMINGS, {"full": 10.0, "kept": 3.0, "random": 3.1})
    # worked by hand: selection = 1 + 4 + 0.5 + 0.5 + 1 = 7 s; verification = 20 s; saving = 10 - 3 = 7 s
    assert cost["selection_seconds"] == 7.0 and cost["verification_seconds"] == 20.0
    assert cost["saving_per_fit"] == 7.0 and cost["speedup_per_fit"] == pytest.approx(10 / 3, abs=1e-3)
    assert cost["break_even_fits"] == 1  # ceil(7 / 7)
    assert cost["break_even_fits_with_verification"] == 4  # ceil(27 / 7) = ceil(3.857)
    # end to end on one fit (the definition): 10 / (score 4 + select 0.5 + kept fit 3) = 1.333
    assert cost["end_to_end_speedup"] == pytest.approx(4 / 3, abs=1e-3)
    assert cost["saves_time"] is True and cost["target_fits_from"] is None
    assert cost["agreement_share"] == 0.05  # agreement 0.5 s / full fit 10 s
    assert "0.50 s = 5.0% of one full-data target fit" in " ".join(t for _, t in ledger_lines(cost))


def test_small_or_no_saving_is_said_in_plain_words():
    small = cost_ledger(TIMINGS, {"full": 10.0, "kept": 9.0, "random": 9.0})
    # saving 1 s: ceil(7 / 1) = 7 and ceil(27 / 1) = 27 fits; 1 s is below a fifth of 10 s
    assert (small["break_even_fits"], small["break_even_fits_with_verification"]) == (7, 27)
    assert small["saves_time"] is False
    text = " ".join(t for _, t in ledger_lines(small))
    assert "pruning does not save time" in text and "larger table" in text
    none = cost_ledger(TIMINGS, {"full": 10.0, "kept": 11.0, "random": 11.0})
    assert none["break_even_fits"] is None and none["break_even_fits_with_verification"] is None
    assert "never" in " ".join(t for _, t in ledger_lines(none))


def test_carried_fits_name_their_run_and_no_fit_gives_stages_only():
    carried = cost_ledger({"score": 2.0, "select": 0.1}, {"full": 10.0, "kept": 2.0, "random": 2.0}, fits_from="R1")
    assert carried["target_fits_from"] == "R1" and carried["verification_seconds"] == 0.0
    assert "measured in run R1" in " ".join(t for _, t in ledger_lines(carried))
    bare = cost_ledger({"score": 2.0}, None)
    assert bare["break_even_fits"] is None and bare["selection_seconds"] == 2.0
