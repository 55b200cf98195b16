"""Benchmark of the shunt-resistance estimate; prints figures, asserts nothing.

    python tests/bench/bench_shunt.py [SHAPES ...]     default 100000 1000000

In-process, on GDS files written by the row generators (gen_row.py flat,
gen_row_hier.py hierarchical) in a fresh temporary folder, demo technology:
  small cells  one inverter with its taps, one tap group (4 inverters), one row of 50
               groups: the full check with every rule, and without shunt-resistance;
               "added ms" is the difference (median of 5)
  each size    core: flatten + extract + every other rule; estimate: the shunt
               estimate alone (memoized, so the rule after it costs nothing more);
               devices, distinct windows solved (sheet solves), estimate / core
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
DEFAULT_SIZES = (100_000, 1_000_000)


def check_seconds(layout_path: Path, with_rule: bool, repeat: int = 1, rule: str = "shunt-resistance"
                  ) -> tuple[float, object]:
    """The median in-process check time of a GDS file with or without ``rule``, and the last result."""
    from latchwatch.analyzers.check import CheckOptions, check_outcome
    from latchwatch.analyzers.model.run_outcome import RunOutcome
    from latchwatch.analyzers.rules import RULES
    from latchwatch.server.config.techfiles import load_technology
    from latchwatch.server.sandbox.runner import read_layout_file

    tech = load_technology("demo")
    captured = read_layout_file(layout_path, "gds").layout
    rules = tuple(r for r in RULES if with_rule or r.id != rule)
    from latchwatch.analyzers.electrical.window_memo import SOLVED_WINDOWS

    times, result = [], None
    for _ in range(repeat):
        SOLVED_WINDOWS.clear()  # cold, as a fresh `latchwatch check` process is
        run = RunOutcome(script=str(layout_path), status="ok", seconds=0.0, layout=captured, failure=None,
                         output="", sandbox={})
        start = time.perf_counter()
        result = check_outcome(run, tech, CheckOptions(), rules=rules)
        times.append(time.perf_counter() - start)
    return statistics.median(times), result


def phases(layout_path: Path) -> dict:
    """Seconds of the core check and of the estimate, and the estimate's counts."""
    from latchwatch.analyzers.context import CheckContext, CheckOptions
    from latchwatch.analyzers.electrical import shunt
    from latchwatch.analyzers.layout.flatten import flatten
    from latchwatch.analyzers.model.run_outcome import RunOutcome
    from latchwatch.analyzers.rules import RULES
    from latchwatch.server.config.techfiles import load_technology
    from latchwatch.server.sandbox.runner import read_layout_file

    tech = load_technology("demo")
    captured = read_layout_file(layout_path, "gds").layout
    run = RunOutcome(script=str(layout_path), status="ok", seconds=0.0, layout=captured, failure=None,
                     output="", sandbox={})
    solves = []
    real_solve = shunt.solve
    shunt.solve = lambda problem: solves.append(1) or real_solve(problem)
    try:
        start = time.perf_counter()
        ctx = CheckContext(run, tech, CheckOptions(), flatten(captured, captured.top_cells()[0]))
        for rule in RULES:
            if rule.id != "shunt-resistance":
                list(rule.check(ctx))
        core = time.perf_counter() - start
        start = time.perf_counter()
        estimates = shunt.shunt_estimates(ctx)
        estimate = time.perf_counter() - start
    finally:
        shunt.solve = real_solve
    devices = sum(len(e.ohm) for e in estimates.values())
    return {"core": core, "estimate": estimate, "devices": devices, "solves": len(solves)}


def write_gds(folder: Path, generator: str, size: int) -> Path:
    subprocess.run([sys.executable, str(HERE / generator), str(size)], cwd=folder, check=True,
                   stdout=subprocess.DEVNULL)
    return folder / f"{Path(generator).stem}.gds"


def small_cells(folder: Path) -> None:
    import gdstk

    sys.path.insert(0, str(HERE))
    import gen_row

    cases = {}
    lib = gdstk.Library("ONE")
    cell = lib.new_cell("INV")
    gen_row.well_tap(cell, 0.0, 0.0)
    gen_row.inverter(cell, gen_row.TAP_W, 0.0)
    gen_row.well_tap(cell, gen_row.TAP_W + gen_row.INV_W, 0.0)
    cases["inverter + taps"] = lib
    lib = gdstk.Library("GROUP")
    cell = lib.new_cell("GROUP")
    gen_row.draw_row(cell, 0, 1)
    cases["tap group (4 inverters)"] = lib
    lib = gdstk.Library("ROW")
    cell = lib.new_cell("ROW")
    gen_row.draw_row(cell, 0, gen_row.GROUPS_PER_ROW)
    cases[f"one row ({gen_row.GROUPS_PER_ROW} groups)"] = lib
    print(f"{'small cell':>26} {'shapes':>7} {'devices':>8} {'with ms':>8} {'without ms':>11} {'added ms':>9}")
    for name, lib in cases.items():
        path = folder / f"{lib.name}.gds"
        lib.write_gds(path)
        with_s, result = check_seconds(path, True, repeat=5)
        without_s, _ = check_seconds(path, False, repeat=5)
        devices = phases(path)["devices"]
        print(f"{name:>26} {result.shapes:>7} {devices:>8} {with_s * 1e3:>8.1f} {without_s * 1e3:>11.1f} "
              f"{(with_s - without_s) * 1e3:>9.1f}", flush=True)


def main(argv: list[str]) -> None:
    sizes = tuple(int(a) for a in argv) or DEFAULT_SIZES
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cpus, "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}")
    with tempfile.TemporaryDirectory(prefix="latchwatch-bench-shunt-") as tmp:
        Path(tmp).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        folder = Path(tmp)
        small_cells(folder)
        print(f"\n{'generator':>16} {'shapes':>9} {'devices':>8} {'solves':>7} {'core s':>7} {'estimate s':>11} "
              f"{'estimate/core':>14}")
        for generator in ("gen_row.py", "gen_row_hier.py"):
            for size in sizes:
                p = phases(write_gds(folder, generator, size))
                print(f"{generator:>16} {size:>9} {p['devices']:>8} {p['solves']:>7} {p['core']:>7.2f} "
                      f"{p['estimate']:>11.2f} {p['estimate'] / p['core']:>14.2f}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
