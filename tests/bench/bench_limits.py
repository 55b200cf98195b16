"""What the parent's limits cost; prints figures, asserts nothing.

    python tests/bench/bench_limits.py [REPEATS]        default 20

- check_outcome against analyse() (server/runs/analysis.py), the median of REPEATS
  paired runs: a small cell (an n-well, a P+ diffusion, its tap), which analyse()
  checks in process, and a row of 2000 diffusions, which it checks in a fork;
- the layout budget's count of an array of 32767 x 32767 (nothing is allocated);
- one 10^7-vertex polygon checked in process: its time and peak memory, the figure
  behind the default vertex limit (server/config/limits.py).
"""

from __future__ import annotations

import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from latchwatch.analyzers.check import CheckOptions, check_outcome  # noqa: E402
from latchwatch.analyzers.layout.budget import LayoutBudget, LayoutTooLarge, check_budget  # noqa: E402
from latchwatch.analyzers.model.run_outcome import RunOutcome  # noqa: E402
from latchwatch.analyzers.rules import RULES  # noqa: E402
from latchwatch.server.config.limits import DEFAULT_LIMITS  # noqa: E402
from latchwatch.server.config.techfiles import load_technology  # noqa: E402
from latchwatch.server.runs.analysis import analyse  # noqa: E402

from builders import ACTIVE, NPLUS, NWELL, PPLUS, CellBuilder, layout  # noqa: E402


def _outcome(captured):
    return RunOutcome("bench.py", "ok", 0.0, captured, None, "", {})


def small_cell():
    cell = (CellBuilder("TOP").rect(NWELL, -5, -5, 40, 10).rect(PPLUS, 0, 0, 30, 4).rect(ACTIVE, 0, 0, 30, 4)
            .rect(NPLUS, -3, 0, -1, 4).rect(ACTIVE, -3, 0, -1, 4))
    return _outcome(layout(cell))


def row(count: int):
    """``count`` P+ diffusions in one n-well, with a tap: above analysis.SMALL_SHAPES, so forked."""
    cell = CellBuilder("ROW").rect(NWELL, -5, -5, 3 * count, 10).rect(NPLUS, -3, 0, -1, 4).rect(ACTIVE, -3, 0, -1, 4)
    for k in range(count):
        cell.rect(PPLUS, 3 * k, 0, 3 * k + 2, 4).rect(ACTIVE, 3 * k, 0, 3 * k + 2, 4)
    return _outcome(layout(cell))


def paired(repeats: int, run, label: str) -> None:
    tech = load_technology("demo")
    options = CheckOptions()
    in_process, forked = [], []
    for _ in range(repeats):
        start = time.perf_counter()
        check_outcome(run, tech, options, rules=RULES, severity={}, want_devices=True)
        in_process.append(time.perf_counter() - start)
        start = time.perf_counter()
        analyse(run, tech, options, DEFAULT_LIMITS, rules=RULES, severity={}, want_devices=True)
        forked.append(time.perf_counter() - start)
    a, b = statistics.median(in_process) * 1e3, statistics.median(forked) * 1e3
    print(f"{label}, median of {repeats}: check_outcome in process {a:.1f} ms, analyse() {b:.1f} ms "
          f"(+{b - a:.1f} ms)")


def budget_count() -> None:
    unit = CellBuilder("U").rect(NWELL, 0, 0, 1, 1)
    top = CellBuilder("T").ref(0, columns=32767, rows=32767, v1=(2, 0), v2=(0, 2))
    captured = layout(unit, top)
    start = time.perf_counter()
    try:
        check_budget(captured, 1, LayoutBudget(), 64)
    except LayoutTooLarge as error:
        print(f"budget count of a 32767 x 32767 array: {(time.perf_counter() - start) * 1e3:.2f} ms: {error}")


TESTS = str(Path(__file__).resolve().parents[1])


def big_polygon() -> None:
    code = (
        "import sys, time, resource, numpy as np; sys.path.insert(0, " + repr(TESTS) + ")\n"
        "from builders import CellBuilder, layout, ACTIVE, NWELL\n"
        "from latchwatch.analyzers.check import check_outcome\n"
        "from latchwatch.analyzers.model.run_outcome import RunOutcome\n"
        "from latchwatch.server.config.techfiles import load_technology\n"
        "t = np.linspace(0, 2 * np.pi, 10**7, endpoint=False)\n"
        "cell = CellBuilder('TOP').polygon(ACTIVE, np.column_stack([1e3 * np.cos(t), 1e3 * np.sin(t)]))\n"
        "cell.rect(NWELL, -2e3, -2e3, 2e3, 2e3)\n"
        "start = time.perf_counter()\n"
        "check_outcome(RunOutcome('b.py', 'ok', 0.0, layout(cell), None, '', {}), load_technology('demo'))\n"
        "print(f'one 10^7-vertex polygon in process: {time.perf_counter() - start:.1f} s, peak '\n"
        "      f'{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss >> 10} MiB')\n"
    )
    subprocess.run([sys.executable, "-c", code], check=False)


if __name__ == "__main__":
    repeats = int(sys.argv[1]) if len(sys.argv) > 1 else 20
    paired(repeats, small_cell(), "small cell (checked in process)")
    paired(repeats, row(2000), "2000-diffusion row (forked)")
    budget_count()
    big_polygon()
    print(f"this process: peak {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss >> 10} MiB; numpy {np.__version__}")
