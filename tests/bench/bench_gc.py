"""What the cyclic garbage collector costs a capture and a check, at Python's default pace
and at the pace latchwatch sets (server/child/collector.py); prints figures, asserts nothing.

    python tests/bench/bench_gc.py [SHAPES] [--runs N]     default 1000000 shapes, 3 runs

In fresh interpreters, paired run by run (default pace, then latchwatch's):
  capture  gen_row.py's rows drawn under the gdstk capture, and their collection
  check    check_outcome on the GDS file the rows were written to (in process, the
           window memo cleared before each run)
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def child(phase: str, paced: bool, shapes: int, folder: str) -> None:
    """One measurement in this fresh interpreter; prints its seconds as JSON."""
    import gc

    from latchwatch.server.child.collector import pace_for_layouts

    os.chdir(folder)
    if phase == "capture":
        import gdstk  # noqa: F401  (imported before the capture is installed, as a run does)

        from latchwatch.server.child import capture_gdstk, collect_gdstk

        recorder = capture_gdstk.Recorder()
        capture_gdstk.install(recorder)
        if paced:
            pace_for_layouts()
        sys.path.insert(0, str(HERE))
        from gen_row import main

        started = time.perf_counter()
        main(shapes)
        collect_gdstk.collect(collect_gdstk.captured_cells(recorder), recorder)
    else:
        from latchwatch.analyzers.check import CheckOptions, check_outcome
        from latchwatch.server.config.techfiles import load_technology
        from latchwatch.server.sandbox.runner import read_layout_file

        tech = load_technology("demo")
        outcome = read_layout_file(Path(folder) / "gen_row.gds", "gds", timeout=600)
        if paced:
            gc.freeze()
            pace_for_layouts()
        started = time.perf_counter()
        check_outcome(outcome, tech, CheckOptions())
    print(json.dumps(time.perf_counter() - started))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("shapes", nargs="?", type=int, default=1_000_000)
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        phase, paced, folder = args.child
        return child(phase, paced == "paced", args.shapes, folder)
    with tempfile.TemporaryDirectory() as folder:
        Path(folder).chmod(0o755)  # as root, the file is read as nobody
        subprocess.run([sys.executable, str(HERE / "gen_row.py"), str(args.shapes)], cwd=folder, check=True)
        for phase in ("capture", "check"):
            pairs = []
            for _ in range(args.runs):
                seconds = [json.loads(subprocess.run(
                    [sys.executable, __file__, str(args.shapes), "--child", phase, pace, folder],
                    check=True, capture_output=True, text=True).stdout) for pace in ("default", "paced")]
                pairs.append(seconds)
            default = statistics.median(p[0] for p in pairs)
            paced = statistics.median(p[1] for p in pairs)
            ratios = sorted(p[1] / p[0] for p in pairs)
            print(f"{phase:<8} {args.shapes} shapes: default pace {default:6.2f} s   latchwatch's {paced:6.2f} s   "
                  f"paired ratio {', '.join(f'{r:.2f}' for r in ratios)}")


if __name__ == "__main__":
    main()
