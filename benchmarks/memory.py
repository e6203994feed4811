"""Peak memory of a whole ``leanset run`` against the float32 feature matrix.

Writes an invented classification table (``leanset bench make-table``: float32 features x0…,
an int32 label), then runs the ``leanset`` command on it twice in fresh processes, with the
features held in memory (``execution.feature_memory_mb`` large) and streamed (0): load, score,
select, verify with the default LightGBM target, write. It prints, for each, the seconds and the
process's peak RSS (its ``VmHWM``, polled from ``/proc``) against the bound
3 × matrix + 0.6 GB; the last line is ``within_bound=…``.

    OMP_NUM_THREADS=1 python benchmarks/memory.py --rows 2000000 --features 40 --dir /tmp/mem

``--proxy-rounds`` and ``--target-rounds`` shorten the fits on a slow machine; the matrices and
datasets LightGBM holds do not depend on the number of rounds (trees are a few kB each).
``--by-stage`` runs the stages as plain functions (no Prefect) in one fresh process instead, and
prints each stage's peak RSS and the RSS it leaves behind, to find where the memory goes.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

from leanset.tools.invented import write_table

BOUND_EXTRA_MB = 0.6 * 1024


def _peak_mb(proc: subprocess.Popen) -> float:
    """Poll the process's VmHWM until it exits; the last value read, in MiB."""
    peak = 0.0
    status = Path(f"/proc/{proc.pid}/status")
    while proc.poll() is None:
        try:
            for line in status.read_text().splitlines():
                if line.startswith("VmHWM:"):
                    peak = max(peak, int(line.split()[1]) / 1024)
        except (FileNotFoundError, ProcessLookupError):
            break
        time.sleep(0.05)
    return peak


def by_stage(path: Path) -> None:
    """Run the stages of the config at ``path`` as plain functions, printing each one's peak and
    remaining RSS (MiB); the high-water mark is reset between stages (``/proc/self/clear_refs``)."""
    from leanset.config import load_config
    from leanset.flows import PLAIN
    from leanset.load.memory import release_memory
    from leanset.preflight import preflight
    from leanset.store.publish import write_run

    def status(key: str) -> float:
        line = next(x for x in Path("/proc/self/status").read_text().splitlines() if x.startswith(key))
        return int(line.split()[1]) / 1024

    def stage(name: str, fn, *args):
        t0 = time.perf_counter()
        out = fn(*args)
        print(f"  {name:<10} peak {status('VmHWM:'):7,.0f} MiB, after {status('VmRSS:'):7,.0f} MiB, "
              f"{time.perf_counter() - t0:6,.1f} s", flush=True)
        Path("/proc/self/clear_refs").write_text("5")
        return out

    config = load_config(path)
    stage("imports", lambda: None)
    stage("preflight", preflight, config)
    frame = stage("load", PLAIN.load, config, None)
    scores = stage("score", PLAIN.score, frame, config, False)
    scores.info["agreement"] = stage("agreement", PLAIN.agreement, frame, scores, config)
    selection = stage("select", PLAIN.select, frame, scores, config)
    verdict, _ = stage("verify", PLAIN.verify, frame, selection, config, None)
    frame.release_features()  # as the run does: every model is trained, the write stage reads no features
    release_memory()
    stage("write", write_run, frame, scores, selection, verdict, config, {})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--features", type=int, default=40)
    ap.add_argument("--classes", type=int, default=3)
    ap.add_argument("--dir", type=Path, default=None, help="folder for the table (kept and reused) and the stores")
    ap.add_argument("--proxy-rounds", type=int, default=None, help="proxy.rounds (default: leanset's)")
    ap.add_argument("--target-rounds", type=int, default=None, help="target num_boost_round (default: leanset's)")
    ap.add_argument("--target-threads", type=int, default=None, help="target num_threads (default: leanset's)")
    ap.add_argument("--modes", default="memory,streamed")
    ap.add_argument("--by-stage", action="store_true", help="peak RSS stage by stage, stages run as plain functions")
    ap.add_argument("--child", type=Path, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        return by_stage(args.child)
    root = args.dir or Path(tempfile.mkdtemp(prefix="leanset-memory-"))
    table = root / f"table-{args.rows}x{args.features}"
    if not table.exists():
        print(write_table(table, args.rows, args.features, args.classes, seed=0).line(), flush=True)
    matrix_mb = args.rows * args.features * 4 / 2**20
    bound = 3 * matrix_mb + BOUND_EXTRA_MB
    print(f"table {args.rows:,} x {args.features}: float32 matrix {matrix_mb:,.0f} MiB; bound 3 x matrix + 0.6 GB = {bound:,.0f} MiB")
    within = True
    for mode in args.modes.split(","):
        config = {"input": {"path": str(table), "label": "label"}, "store": str(root / f"store-{mode}"),
                  "execution": {"feature_memory_mb": 0 if mode == "streamed" else 1e6}}
        if args.proxy_rounds:
            config["proxy"] = {"rounds": args.proxy_rounds, "checkpoint_every": min(5, args.proxy_rounds)}
        target = {"num_boost_round": args.target_rounds, "num_threads": args.target_threads}
        if any(target.values()):
            config["target"] = {"params": {k: v for k, v in target.items() if v}}
        path = root / f"{mode}.yaml"
        path.write_text(yaml.safe_dump(config))
        t0 = time.perf_counter()
        if args.by_stage:
            print(f"{mode}, stage by stage:", flush=True)
            subprocess.run([sys.executable, __file__, "--child", str(path)], check=True, env=os.environ)
            continue
        proc = subprocess.Popen([sys.executable, "-c", "from leanset.cli import main; main()", "run", str(path)],
                                stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=os.environ)
        peak = _peak_mb(proc)
        out = proc.communicate()[0]
        seconds = time.perf_counter() - t0
        if proc.returncode:
            sys.exit(f"{mode} run failed ({proc.returncode}):\n{out}")
        within &= peak <= bound
        print(f"{mode}: {seconds:,.0f} s, peak RSS {peak:,.0f} MiB = {peak / matrix_mb:.2f} x matrix "
              f"({'within' if peak <= bound else 'above'} the bound)", flush=True)
    if not args.by_stage:
        print(f"within_bound={within}")


if __name__ == "__main__":
    main()
