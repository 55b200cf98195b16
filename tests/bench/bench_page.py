"""Benchmark of the page (`latchwatch check --html`) on the generated rows; prints figures, asserts nothing.

    python tests/bench/bench_page.py [SHAPES ...]     default 100000 1000000

For each size and each generator (gen_row.py flat, gen_row_hier.py hierarchical), on the
GDS file the bare generator wrote, and on a layout of random rectangles (random.gds,
written here: positions and sizes on a 1 nm grid, the worst case for the page's packing,
which codes the steps between sorted shapes), in a fresh temporary folder:
  check s     wall time of `latchwatch check FILE.gds --tech demo` (no page)
  page s      wall time of the same with `--html page.html`
  peak MiB    peak resident memory of the run with the page
  page MB     size of the page file (10^6 bytes); the budget is 20 MB for 1M shapes
  drawn       shapes on the page (drawn layers and the extracted ones)
"""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import gdstk
import numpy as np
from bench_check import GENERATORS, latchwatch_command, measure

DEFAULT_SIZES = (100_000, 1_000_000)


RANDOM = "random rectangles"


def write_random(path: Path, size: int) -> None:
    """``size`` rectangles 0.2-5 um wide at random over a square of 1 um^2 per shape, on poly and metal1."""
    rng = np.random.default_rng(7)
    side = size ** 0.5
    xy = np.round(rng.uniform(0, side, (size, 2)), 3)
    wh = np.round(rng.uniform(0.2, 5.0, (size, 2)), 3)
    cell = gdstk.Cell("RANDOM")
    for (x, y), (w, h), layer in zip(xy.tolist(), wh.tolist(), rng.choice([3, 7], size).tolist(), strict=True):
        cell.add(gdstk.rectangle((x, y), (x + w, y + h), layer=layer))
    lib = gdstk.Library()
    lib.add(cell)
    lib.write_gds(str(path))


def bench_one(generator: str, size: int) -> dict:
    with tempfile.TemporaryDirectory(prefix="latchwatch-bench-page-") as tmp:
        Path(tmp).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        folder = Path(tmp)
        for name in GENERATORS:
            shutil.copy(Path(__file__).resolve().parent / name, folder / name)
        if generator == RANDOM:
            write_random(folder / "random.gds", size)
            gds = "random.gds"
        else:
            subprocess.run([sys.executable, generator, str(size)], cwd=folder, check=True, capture_output=True)
            gds = f"{Path(generator).stem}.gds"
        check = latchwatch_command() + ["check", "--tech", "demo", "--fail-on", "never", "--timeout", "1800", gds]
        check_s, _, _, _ = measure(check, folder)
        page_s, _, page_kib, _ = measure(check + ["--html", "page.html"], folder)
        page = folder / "page.html"
        size_mb = page.stat().st_size / 1e6 if page.exists() else float("nan")
        text = page.read_text(encoding="utf-8") if page.exists() else ""
        drawn = sum(int(n) for n in re.findall(r'<p class="count">(\d+) shapes', text))
    return {"check": check_s, "page": page_s, "peak_mib": page_kib / 1024, "page_mb": size_mb, "drawn": drawn}


def main(argv: list[str]) -> None:
    sizes = tuple(int(a) for a in argv) or DEFAULT_SIZES
    for generator, kind in {**GENERATORS, RANDOM: "flat, irregular"}.items():
        print(f"\n{generator} ({kind})")
        print(f"{'shapes':>10} {'check s':>8} {'page s':>8} {'peak MiB':>9} {'page MB':>8} {'drawn':>9}")
        for size in sizes:
            r = bench_one(generator, size)
            print(f"{size:>10} {r['check']:>8.1f} {r['page']:>8.1f} {r['peak_mib']:>9.0f} {r['page_mb']:>8.2f} "
                  f"{r['drawn']:>9}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
