"""How small a subset of the economics benchmark table can any selection keep?

``leanset bench economics`` asks for a passing fraction small enough that pruning pays several
times over. Whether one exists is a property of the table, not of the rule, so this script measures
the table's learning curve directly, without leanset's pipeline: on the table of
:func:`leanset.tools.economics.economics_chunks` (a 20 % random holdout), a LightGBM multiclass
model is fit on three kinds of subsets of the remaining rows at each fraction:

- ``random``: a uniform draw;
- ``spread``: per class, rows taken evenly along the locality key of ``selection.spread``
  (:class:`leanset.scores.locus.Locus` over the rows' own ranges, :func:`leanset.select.spread.spread_keys`);
- ``oracle``: one row of every prototype first (the generator's own prototype index, which no
  selection can see), then uniform: the best a near-copy-aware rule could do.

It prints accuracy and log loss on the holdout, and the share of prototypes each subset covers. The
model is the target's shape at a fifth of its rounds and five times its learning rate (127 leaves).

    OMP_NUM_THREADS=2 python benchmarks/economics_ceiling.py --rows 1000000 --fractions 0.1,0.2,0.3,1
"""

from __future__ import annotations

import argparse
import time

import lightgbm as lgb
import numpy as np

from leanset.scores.locus import Locus
from leanset.select.spread import spread_keys
from leanset.tools.bench import machine
from leanset.tools.economics import economics_chunks
from leanset.tools.invented import CHUNK_ROWS


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--fractions", default="0.1,0.2,0.3,1")
    ap.add_argument("--rounds", type=int, default=200)
    ap.add_argument("--learning-rate", type=float, default=0.25)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    features, classes, flip, copies, seed = 30, 4, 0.03, 10, args.seed  # `leanset bench economics` defaults
    parts = list(economics_chunks(args.rows, features, classes, flip, copies, seed))
    X, y = np.vstack([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
    # the generator's prototype of every row, drawn as economics_chunks draws it
    protos = max(1, args.rows // copies)
    proto = np.concatenate([np.random.default_rng([seed, 0xEC0, i]).integers(0, protos, min(CHUNK_ROWS, args.rows - s))
                            for i, s in enumerate(range(0, args.rows, CHUNK_ROWS))])
    order = np.random.default_rng([seed, 1]).permutation(args.rows)
    hold, train = order[: args.rows // 5], order[args.rows // 5:]
    Xt, yt, pt = X[train], y[train], proto[train]
    locus = Locus(Xt.min(axis=0), Xt.max(axis=0), seed)(Xt)
    params = {"objective": "multiclass", "num_class": classes, "num_leaves": 127, "learning_rate": args.learning_rate,
              "num_threads": args.threads, "verbose": -1, "seed": seed}
    print(machine())
    print(f"table: {args.rows:,} rows, {protos:,} prototypes; train {len(train):,}, holdout {len(hold):,}; "
          f"model {args.rounds} rounds at learning rate {args.learning_rate}")

    def fit(kind: str, fraction: float, idx: np.ndarray) -> None:
        t = time.perf_counter()
        model = lgb.train(params, lgb.Dataset(Xt[idx], yt[idx]), args.rounds)
        p = model.predict(X[hold])
        acc = float((p.argmax(axis=1) == y[hold]).mean())
        ll = float(-np.log(np.clip(p[np.arange(len(hold)), y[hold]], 1e-15, 1)).mean())
        cover = len(np.unique(pt[idx])) / len(np.unique(pt))
        print(f"{kind:7s} fraction {fraction:<5g} rows {len(idx):>9,}  prototypes {cover:.3f}  accuracy {acc:.4f}  "
              f"log loss {ll:.4f}  ({time.perf_counter() - t:.1f} s)", flush=True)

    rng = np.random.default_rng([seed, 2])
    first = rng.permutation(len(train))
    _, once = np.unique(pt[first], return_index=True)
    oracle = np.concatenate([first[once], rng.permutation(np.setdiff1d(np.arange(len(train)), first[once]))])
    for fraction in sorted(float(f) for f in args.fractions.split(",")):
        k = int(fraction * len(train))
        if fraction >= 1:
            fit("all", 1.0, np.arange(len(train)))
            continue
        fit("random", fraction, np.sort(rng.choice(len(train), k, replace=False)))
        spread = []
        for c in range(classes):
            rows = np.flatnonzero(yt == c)
            keys = spread_keys(locus[rows], rows, np.random.default_rng([seed, 3, c]))
            spread.append(rows[np.argsort(keys)[: int(round(fraction * len(rows)))]])
        fit("spread", fraction, np.sort(np.concatenate(spread)))
        fit("oracle", fraction, np.sort(oracle[:k]))


if __name__ == "__main__":
    main()
