"""Benchmark of the tap-distance search; prints figures, asserts nothing.

    python tests/bench/bench_tapdistance.py [SHAPES ...]     default 100000 1000000

In-process, on the GDS file gen_row.py writes (flat rows, demo technology), for the
P+ and N+ device diffusions of each size:
  kd s        farthest_from_taps with exact values, through TapIndex (rectangle taps
              by the KD-tree path)
  shapely s   the same search with every nearest-tap query on the general STRtree path
  same        whether the two find the same nearest taps (and the same diffusions without one)
  max diff    the largest difference of the two values, um
  extract s   flatten + extraction, for scale
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
DEFAULT_SIZES = (100_000, 1_000_000)


class GeneralOnly:
    """A TapIndex whose nearest-tap queries all take the general shapely path."""

    def __init__(self, index):
        self.index = index

    def nearest(self, xy, body):
        return self.index._every_tap().nearest(xy, body)

    def corner_bound(self, corners, centre_xy, tap):
        return self.index.corner_bound(corners, centre_xy, tap)


def bench(size: int) -> None:
    from latchwatch.analyzers.extraction.extract import extract
    from latchwatch.analyzers.extraction.tapdistance import TapIndex, farthest_from_taps
    from latchwatch.analyzers.layout.flatten import flatten
    from latchwatch.server.config.techfiles import load_technology
    from latchwatch.server.sandbox.runner import read_layout_file

    with tempfile.TemporaryDirectory(prefix="latchwatch-bench-") as tmp:
        subprocess.run([sys.executable, str(HERE / "gen_row.py"), str(size)], cwd=tmp, check=True)
        captured = read_layout_file(Path(tmp) / "gen_row.gds", "gds", timeout=600).layout
    tech = load_technology("demo")
    start = time.perf_counter()
    ex = extract(flatten(captured, 0), tech)
    extract_s = time.perf_counter() - start
    for kind, pieces, taps in (("P+", ex.pdiff, ex.ntap.select(ex.ntap_contacted)),
                               ("N+", ex.ndiff, ex.ptap.select(ex.ptap_contacted))):
        index = TapIndex(taps.geoms, taps.body)
        timed = {}
        for name, tap_index in (("kd", index), ("shapely", GeneralOnly(index))):
            start = time.perf_counter()
            timed[name] = farthest_from_taps(pieces.geoms, pieces.body, tap_index, exact=True)
            timed[name + "_s"] = time.perf_counter() - start
        a, b = timed["kd"], timed["shapely"]
        finite = np.isfinite(b.value)
        value_diff = float(np.max(np.abs(a.value[finite] - b.value[finite]), initial=0.0))
        same = np.array_equal(np.isfinite(a.value), finite) and np.array_equal(a.tap, b.tap)
        print(f"{size:>10} {kind:>3} {len(pieces):>8} {len(taps):>7} {timed['kd_s']:>7.2f} "
              f"{timed['shapely_s']:>10.2f} {str(same):>6} {value_diff:>9.1e} {extract_s:>10.2f}", flush=True)


def main(argv: list[str]) -> None:
    sizes = tuple(int(a) for a in argv) or DEFAULT_SIZES
    print(f"{'shapes':>10} {'kind':>3} {'diffs':>8} {'taps':>7} {'kd s':>7} {'shapely s':>10} "
          f"{'same':>6} {'max diff':>9} {'extract s':>10}")
    for size in sizes:
        bench(size)


if __name__ == "__main__":
    main(sys.argv[1:])
