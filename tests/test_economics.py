"""``leanset bench economics``: the invented table has the redundancy and label flips it claims
(invented data, for the benchmark only), and its figures are read from a run's cost ledger."""

import numpy as np
from scipy import stats

from leanset.tools.invented import table_chunks
from leanset.tools.economics import INFORMATIVE, economics_chunks, economics_lines


def test_table_flips_the_share_asked_and_mixes_the_extra_columns():
    rows, copies, flip = 30_000, 10, 0.05
    X, y = map(np.concatenate, zip(*economics_chunks(rows, 30, 4, flip, copies, seed=2)))
    assert X.shape == (rows, 30) and X.dtype == np.float32
    # the prototypes' labels, as the generator of leanset bench make-table draws them
    protos = np.concatenate([c for _, _, c in table_chunks(rows // copies, INFORMATIVE, 4, 2)])
    P = np.concatenate([c for _, c, _ in table_chunks(rows // copies, INFORMATIVE, 4, 2)])
    nearest = np.argmin(((X[:200, None, :INFORMATIVE] - P[None]) ** 2).sum(-1), axis=1)
    moved = y[:200] != protos[nearest]
    # flipped rows: binomial(200, 0.05); scipy.stats.binom's 99.9 % interval
    lo, hi = stats.binom.interval(0.999, 200, flip)
    assert lo <= moved.sum() <= hi
    # the extra columns are linear mixes of the informative ones plus noise: least squares explains
    # nearly all their variance (numpy.linalg.lstsq)
    coef, *_ = np.linalg.lstsq(X[:, :INFORMATIVE], X[:, INFORMATIVE:], rcond=None)
    resid = X[:, INFORMATIVE:] - X[:, :INFORMATIVE] @ coef
    assert (resid.var(axis=0) / X[:, INFORMATIVE:].var(axis=0)).max() < 0.05


def test_lines_end_with_the_end_to_end_speedup():
    run = {"timings": {"score": 2.0, "select": 0.5, "verify": 30.0}, "counts": {"train": 1000, "holdout": 250, "kept": 100},
           "config": {"target": {"params": {"num_boost_round": 1000}}}, "search": {"fraction": 0.1, "tried": [{}, {}]},
           "verdict": {"status": "pass", "metric": "accuracy", "delta": 0.001, "ci": [-0.002, 0.004], "tolerance": 0.01},
           "cost": {"target_fit_seconds": {"full": 20.0, "kept": 2.5, "random": 2.5}, "break_even_fits": 1,
                    "break_even_fits_with_verification": 2, "verification_seconds": 30.0, "end_to_end_speedup": 4.0}}
    lines = economics_lines(run, 1250)
    assert lines[-1] == "end_to_end_speedup=4.000"
    assert any(line.startswith("full-data fit: 20.00 s") for line in lines)
