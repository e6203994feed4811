"""Seconds from the ``leanset`` command's start to its refusal, for every case of the bad-input battery.

The cases are those of ``tests/test_bad_input.py``; each runs in a fresh process, as a user runs
the command, so the figure includes Python's start-up and leanset's imports. The last line is
``max_config_table_seconds=…``: the slowest refusal (wall clock) among the config and table cases
(no fit is ever started; the target cases try LightGBM on an invented 60-row dataset). CPU
seconds are printed beside the wall clock: on a shared machine they show what waiting added.

    OMP_NUM_THREADS=1 python benchmarks/refusals.py [--only table-]
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from test_bad_input import CASES  # noqa: E402

CLI = [sys.executable, "-c", "from leanset.cli import main; main()"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", default="", help="run the cases whose id starts with this")
    args = ap.parse_args()
    worst = 0.0
    for name, build, needles in CASES:
        if not name.startswith(args.only):
            continue
        with tempfile.TemporaryDirectory() as tmp:
            cmd = [*CLI, *map(str, build(Path(tmp)))]
            t0, cpu0 = time.perf_counter(), resource.getrusage(resource.RUSAGE_CHILDREN)
            done = subprocess.run(cmd, capture_output=True, text=True)
            seconds, cpu1 = time.perf_counter() - t0, resource.getrusage(resource.RUSAGE_CHILDREN)
            cpu = cpu1.ru_utime + cpu1.ru_stime - cpu0.ru_utime - cpu0.ru_stime
        ok = done.returncode == 2 and all(n in " ".join(done.stderr.split()) for n in needles)
        print(f"{name:45s} exit {done.returncode} {seconds:5.2f} s wall {cpu:5.2f} s cpu "
              f"{'clean' if ok else 'NOT CLEAN: ' + done.stderr[:200]}", flush=True)
        if name.split("-")[0] in ("config", "table"):
            worst = max(worst, seconds)
    print(f"max_config_table_seconds={worst:.2f}")


if __name__ == "__main__":
    main()
