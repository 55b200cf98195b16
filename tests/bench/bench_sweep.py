"""Benchmark of parameter corners: 50 corners of a small cell; prints figures, asserts nothing.

    python tests/bench/bench_sweep.py [--corners N] [--jobs J ...] [--repeat R]

The cell is tests/server/test_sweep.py's finger_array (a PMOS with one n-well tap, a dozen
shapes). For each J (default: 1 and the number of cores) the sweep runs in a fresh
project folder through ``sweep.check_all`` (the code ``latchwatch check --sweep`` runs),
R times; printed per J: the best and median wall time, corners per second, and the
split of the best run into time in children (the sum of the runs' own seconds) and the
rest (checking in this process, thread hand-over). Corner runs are forked from corner
hosts (server/sandbox/hosts.py). "cold" starts with no host, as every `latchwatch check` does
(the hosts start with the first corners); "warm" finds the hosts of the previous
sweep idle, as the language server does. The target is 50 corners in <= 5 s on a
2-core machine.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from test_sweep import GENERATOR  # noqa: E402  (the cell of the sweep tests)

from latchwatch.server.config import techfiles
from latchwatch.server.runs import batch as sweep
from latchwatch.server.runs import plan
from latchwatch.server.runs.pipeline import CheckSettings
from latchwatch.server.sandbox import hosts
from latchwatch.server.sandbox.hosts import available_cpus


def corner_params(count: int) -> list[str]:
    """``fingers=1..count/2`` x ``w=1.0,2.0``: ``count`` corners (count even)."""
    fingers = ",".join(str(n) for n in range(1, count // 2 + 1))
    return [f"fingers={fingers}", "w=1.0,2.0"]


def one_sweep(folder: Path, count: int, jobs: int, cold: bool = True) -> tuple[float, float, int]:
    if cold:
        hosts.HOSTS.close()
    settings = CheckSettings(tech=techfiles.load_technology("demo", folder), timeout=30, project_root=folder)
    chosen = plan.ad_hoc_sweep(folder / "fingers.py", "finger_array", corner_params(count))
    started = time.perf_counter()
    report = sweep.check_all([folder / "fingers.py"], settings, [chosen], jobs=jobs)
    wall = time.perf_counter() - started
    bad = [r for r in report.runs if r.status != "ok"]
    if bad:
        raise SystemExit(f"a corner did not run: {bad[0]}")
    return wall, sum(r.seconds for r in report.runs), len(report.runs)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--corners", type=int, default=50)
    parser.add_argument("--jobs", type=int, action="append")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    jobs_list = args.jobs or sorted({1, available_cpus()})
    print(f"{args.corners} corners of finger_array, {os.cpu_count()} cores, best and median of {args.repeat}; "
          f"load average {os.getloadavg()[0]:.2f}")
    print(f"{'jobs':>4}  {'hosts':>5}  {'best s':>7}  {'median s':>8}  {'corners/s':>9}  {'in children s':>13}  "
          f"{'rest s':>6}")
    with tempfile.TemporaryDirectory() as tmp:
        Path(tmp).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        folder = Path(tmp)
        (folder / "latchwatch.toml").write_text('tech = "demo"\n')
        (folder / "fingers.py").write_text(GENERATOR)
        one_sweep(folder, 2, 1)  # warm the file caches and this process's imports
        for jobs in jobs_list:
            for cold in (True, False):
                samples = [one_sweep(folder, args.corners, jobs, cold) for _ in range(args.repeat)]
                best = min(samples)
                walls = [s[0] for s in samples]
                print(f"{jobs:>4}  {'cold' if cold else 'warm':>5}  {best[0]:>7.2f}  {statistics.median(walls):>8.2f}  "
                      f"{best[2] / best[0]:>9.1f}  {best[1]:>13.2f}  {max(0.0, best[0] - best[1] / jobs):>6.2f}")


if __name__ == "__main__":
    main()
