"""How much capturing costs: gen_flat.py (200,000 rectangles) bare and under the runner.

    python tests/bench/bench_capture.py [--runs N]

Prints the wall time of ``python gen_flat.py`` and of ``run_script(gen_flat.py)``
(child start, capture, transfer and decoding into a CapturedLayout), the minimum of
N interleaved runs of each, and their ratio. A figure to read, not a timed test.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from latchwatch.server.runner import run_script

GENERATOR = Path(__file__).resolve().with_name("gen_flat.py")


def bare_run(python: str) -> float:
    with tempfile.TemporaryDirectory() as folder:  # gen_flat writes flat.gds into the current folder
        started = time.perf_counter()
        subprocess.run([python, str(GENERATOR)], cwd=folder, check=True, stdin=subprocess.DEVNULL)
        return time.perf_counter() - started


def captured_run(python: str) -> tuple[float, int]:
    started = time.perf_counter()
    outcome = run_script(GENERATOR, python=python, timeout=120)
    seconds = time.perf_counter() - started
    if outcome.status != "ok":
        raise SystemExit(f"capture failed: {outcome.failure}\n{outcome.output}")
    return seconds, outcome.layout.shape_count


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    parser.add_argument("--python", default=sys.executable)
    args = parser.parse_args()
    bare, captured = [], []
    shapes = 0
    for _ in range(args.runs):
        bare.append(bare_run(args.python))
        seconds, shapes = captured_run(args.python)
        captured.append(seconds)
    print(f"shapes captured: {shapes}")
    print(f"bare     python gen_flat.py : min {min(bare):.3f} s   median {statistics.median(bare):.3f} s")
    print(f"captured run_script         : min {min(captured):.3f} s   median {statistics.median(captured):.3f} s")
    print(f"ratio (min / min)           : {min(captured) / min(bare):.2f}")


if __name__ == "__main__":
    main()
