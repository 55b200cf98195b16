"""Benchmark of the trigger analysis (injection-bias); prints figures, asserts nothing.

    python tests/bench/bench_trigger.py [SHAPES ...]     default 1000000

In-process, demo technology, in a fresh temporary folder:
  pad cells   the three pad drivers of examples/ (rings closed and double, one open,
              none): the full check with every rule, and without injection-bias;
              "added ms" is the difference (median of 5)
  each size   gen_row.py's flat rows (tests/bench/gen_row.py) with PADS of its NMOS
              diffusions marked pad-connected (io_marker boxes over the first inverter of
              evenly spaced rows): the full check with every rule and without
              injection-bias, and their ratio (one run each)
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
from pathlib import Path

import bench_shunt  # a sibling script: run as python tests/bench/bench_trigger.py

HERE = Path(__file__).resolve().parent
EXAMPLES = HERE.parent.parent / "examples"
DEFAULT_SIZES = (1_000_000,)
PADS = 8
IO_MARKER = (12, 0)  # demo.toml


def check_seconds(layout_path: Path, with_trigger: bool, repeat: int = 1) -> tuple[float, object]:
    """bench_shunt's paired timing, with and without injection-bias."""
    return bench_shunt.check_seconds(layout_path, with_trigger, repeat, rule="injection-bias")


def pad_cells(folder: Path) -> None:
    print(f"{'pad cell':>26} {'findings':>9} {'with ms':>8} {'without ms':>11} {'added ms':>9}")
    for name in ("pad_driver.py", "pad_driver_open_ring.py", "pad_driver_no_ring.py"):
        subprocess.run([sys.executable, str(EXAMPLES / name)], cwd=folder, check=True, stdout=subprocess.DEVNULL)
        path = folder / name.replace(".py", ".gds")
        with_s, result = check_seconds(path, True, repeat=5)
        without_s, _ = check_seconds(path, False, repeat=5)
        flagged = sum(f.rule == "injection-bias" for f in result.findings)
        print(f"{name:>26} {flagged:>9} {with_s * 1e3:>8.1f} {without_s * 1e3:>11.1f} "
              f"{(with_s - without_s) * 1e3:>9.1f}", flush=True)


def rows_with_pads(folder: Path, size: int) -> Path:
    """gen_row.py's layout with PADS NMOS diffusions under the io_marker layer."""
    import gdstk

    sys.path.insert(0, str(HERE))
    import gen_row

    top = gen_row.main(size)
    one = gdstk.Cell("ONE_ROW")
    gen_row.draw_row(one, 0, gen_row.GROUPS_PER_ROW)
    n_rows = round(len(top.polygons) / len(one.polygons))
    for k in range(PADS):
        row = (k * n_rows) // PADS
        x, y = gen_row.TAP_W, row * gen_row.ROW_PITCH  # the first inverter of the row
        top.add(gdstk.rectangle((x + 0.3, y + 1.6), (x + 2.7, y + 4.2), layer=IO_MARKER[0], datatype=IO_MARKER[1]))
    lib = gdstk.Library("BENCH")
    lib.add(top)
    path = folder / f"rows_{size}.gds"
    lib.write_gds(path)
    return path


def main(argv: list[str]) -> None:
    sizes = tuple(int(a) for a in argv) or DEFAULT_SIZES
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cpus, "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}")
    with tempfile.TemporaryDirectory(prefix="latchwatch-bench-trigger-") as tmp:
        Path(tmp).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        folder = Path(tmp)
        os.chdir(folder)  # gen_row.main writes gen_row.gds into the working directory
        pad_cells(folder)
        print(f"\n{'layout':>16} {'shapes':>9} {'pads':>5} {'with s':>7} {'without s':>10} {'ratio':>6}")
        for size in sizes:
            path = rows_with_pads(folder, size)
            with_s, result = check_seconds(path, True)
            without_s, _ = check_seconds(path, False)
            print(f"{'gen_row + pads':>16} {result.shapes:>9} {PADS:>5} {with_s:>7.2f} {without_s:>10.2f} "
                  f"{with_s / without_s:>6.2f}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
