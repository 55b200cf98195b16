"""Benchmark of nets and the I/O rules on the generated rows; prints figures, asserts nothing.

    python tests/bench/bench_nets.py [SHAPES ...]     default 100000 1000000

The flat rows of gen_row.py, with every row's rails labelled VSS and VDD on the metal1
label layer (so the conductor graph is built and every tap's net is named), and, in a
second variant, one inverter output per row labelled PAD<n> (so every row has a
pad-connected NMOS and PMOS without guard rings for the I/O rules to examine). The GDS
file is read in this process and each phase is timed on its own:
  flatten   hierarchy to flat arrays          extract  wells, diffusions, taps
  core      tap-distance, floating-well and uncontacted-tap (the core check's rules)
  nets      the conductor graph and its names (analyzers/extraction/nets.py)
  io rules  tap-supply, io-guard-ring, io-spacing and isolation-tie after the nets
The figure the nets are judged by is nets / (flatten + extract + core).
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

import gdstk

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from latchwatch.analyzers.context import CheckContext, CheckOptions  # noqa: E402  (after the path insert)
from latchwatch.analyzers.extraction.nets import nets  # noqa: E402
from latchwatch.analyzers.layout.flatten import flatten  # noqa: E402
from latchwatch.analyzers.model.run_outcome import RunOutcome  # noqa: E402
from latchwatch.analyzers.rules import RULES_BY_ID  # noqa: E402
from latchwatch.server.config.techfiles import load_technology  # noqa: E402
from latchwatch.server.sandbox.runner import read_layout_file  # noqa: E402

from gen_row import GROUP_W, ROW_H, ROW_PITCH, TAP_W  # noqa: E402
from gen_row import main as draw_rows  # noqa: E402

DEFAULT_SIZES = (100_000, 1_000_000)
CORE = ("tap-distance", "floating-well", "uncontacted-tap")
IO = ("tap-supply", "io-guard-ring", "io-spacing", "isolation-tie")
PIN = (7, 5)


def labelled_rows(size: int, folder: Path, pads: bool) -> Path:
    cwd = os.getcwd()
    os.chdir(folder)
    try:
        top = draw_rows(size)
    finally:
        os.chdir(cwd)
    rows = int(round(max(p.bounding_box()[1][1] for p in top.polygons) / ROW_PITCH))
    for row in range(rows + 1):
        y = row * ROW_PITCH
        top.add(gdstk.Label("VSS", (1.0, y + 0.6), layer=PIN[0], texttype=PIN[1]))
        top.add(gdstk.Label("VDD", (1.0, y + ROW_H - 0.6), layer=PIN[0], texttype=PIN[1]))
        if pads:  # the output strap of the first inverter of the row's second group
            top.add(gdstk.Label(f"PAD{row}", (GROUP_W + TAP_W + 2.2, y + 5.0), layer=PIN[0], texttype=PIN[1]))
    lib = gdstk.Library("BENCH_NETS")
    lib.add(top)
    path = folder / f"rows_{size}_{'pads' if pads else 'rails'}.gds"
    lib.write_gds(str(path))
    return path


def timed(fn):
    start = time.perf_counter()
    value = fn()
    return time.perf_counter() - start, value


def bench(path: Path, tech) -> dict:
    layout = read_layout_file(path, "gds").layout
    outcome = RunOutcome(script=str(path), status="ok", seconds=0.0, layout=layout, failure=None, output="",
                         sandbox={})
    t_flat, flat = timed(lambda: flatten(layout, layout.top_cells()[0]))
    ctx = CheckContext(outcome, tech, CheckOptions(), flat)
    t_extract, _ = timed(lambda: ctx.extraction)
    t_core, core = timed(lambda: [f for r in CORE for f in RULES_BY_ID[r].check(ctx)])
    t_nets, ln = timed(lambda: nets(ctx))
    t_io, io = timed(lambda: [f for r in IO for f in RULES_BY_ID[r].check(ctx)])
    counts: dict[str, int] = {}
    for f in core + io:
        counts[f.rule] = counts.get(f.rule, 0) + 1
    return {"shapes": len(flat.polygons), "flatten": t_flat, "extract": t_extract, "core": t_core,
            "nets": t_nets, "io": t_io, "n_nets": ln.conn.n_nets if ln.conn else 0,
            "conductors": len(ln.conn.conductors) if ln.conn else 0, "findings": counts}


def main(argv: list[str]) -> None:
    sizes = tuple(int(a) for a in argv) or DEFAULT_SIZES
    tech = load_technology("demo")
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cpus")
    print(f"{'shapes':>9} {'variant':>7} {'flatten':>8} {'extract':>8} {'core':>6} {'nets':>6} {'io':>6} "
          f"{'nets/check':>10} {'conductors':>10} {'nets#':>7}  findings")
    for size in sizes:
        for pads in (False, True):
            with tempfile.TemporaryDirectory(prefix="latchwatch-bench-nets-") as tmp:
                Path(tmp).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
                r = bench(labelled_rows(size, Path(tmp), pads), tech)
            check = r["flatten"] + r["extract"] + r["core"]
            listed = ", ".join(f"{n} {k}" for k, n in sorted(r["findings"].items()))
            print(f"{r['shapes']:>9} {'pads' if pads else 'rails':>7} {r['flatten']:>8.2f} {r['extract']:>8.2f} "
                  f"{r['core']:>6.2f} {r['nets']:>6.2f} {r['io']:>6.2f} {r['nets'] / check:>10.2f} "
                  f"{r['conductors']:>10} {r['n_nets']:>7}  {listed}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
