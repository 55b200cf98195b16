"""How much capturing costs: gen_flat.py (200,000 rectangles) bare and under the runner.

    python tests/bench/bench_capture.py [--runs N] [--phases]

Prints the wall time of ``python gen_flat.py`` and of ``run_script(gen_flat.py)``
(child start, capture, transfer and decoding into a CapturedLayout), the minimum of
N interleaved runs of each, and their ratio. ``--phases`` adds where the extra time
goes, measured inside fresh interpreters: the script itself bare and with logging
``add`` calls, reading the cells into arrays, encoding and decoding the payload.
A figure to read, not a timed test.
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

GENERATOR = Path(__file__).resolve().with_name("gen_flat.py")


def bare_run(python: str) -> float:
    with tempfile.TemporaryDirectory() as folder:  # gen_flat writes flat.gds into the current folder
        Path(folder).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        started = time.perf_counter()
        subprocess.run([python, str(GENERATOR)], cwd=folder, check=True, stdin=subprocess.DEVNULL)
        return time.perf_counter() - started


def captured_run(python: str) -> tuple[float, int]:
    from latchwatch.server.sandbox.runner import run_script

    started = time.perf_counter()
    outcome = run_script(GENERATOR, python=python, timeout=120)
    seconds = time.perf_counter() - started
    if outcome.status != "ok":
        raise SystemExit(f"capture failed: {outcome.failure}\n{outcome.output}")
    return seconds, outcome.layout.shape_count


def phase_child(capture: bool) -> None:
    """One measurement in this (fresh) interpreter; prints a JSON dict of seconds."""
    import gdstk  # noqa: F401  (imported first, as the probe does)

    from latchwatch.server.child import capture_gdstk, collect_gdstk, wire_format
    from latchwatch.server.sandbox import wire

    recorder = capture_gdstk.Recorder()
    if capture:
        capture_gdstk.install(recorder)
    code = compile(GENERATOR.read_bytes(), str(GENERATOR), "exec")
    figures = {}
    with tempfile.TemporaryDirectory() as folder:
        Path(folder).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        os.chdir(folder)
        started = time.perf_counter()
        exec(code, {"__name__": "__main__"})
        figures["script"] = time.perf_counter() - started
    if capture:
        started = time.perf_counter()
        header, arrays = collect_gdstk.collect(collect_gdstk.captured_cells(recorder), recorder)
        figures["collect"] = time.perf_counter() - started
        started = time.perf_counter()
        payload = bytearray(b"".join(bytes(chunk) for chunk in wire_format.encode_payload(header, arrays)))
        figures["encode"] = time.perf_counter() - started
        started = time.perf_counter()
        wire.decode_layout(payload)
        figures["decode"] = time.perf_counter() - started
    print(json.dumps(figures))


def phases(python: str, runs: int) -> None:
    samples: dict[str, list[float]] = {}
    for _ in range(runs):
        for mode in ("bare", "capture"):
            out = subprocess.run([python, __file__, "--phase-child", mode], check=True, capture_output=True, text=True)
            for name, seconds in json.loads(out.stdout).items():
                samples.setdefault(f"{mode}:{name}", []).append(seconds)
    bare_script = min(samples["bare:script"])
    print("phases (min of runs):")
    print(f"  script, bare                 {bare_script:.3f} s")
    print(f"  script, add calls logged     {min(samples['capture:script']):.3f} s"
          f"  (+{min(samples['capture:script']) - bare_script:.3f} s)")
    for name in ("collect", "encode", "decode"):
        print(f"  {name:<28} {min(samples['capture:' + name]):.3f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    parser.add_argument("--python", default=sys.executable)
    parser.add_argument("--phases", action="store_true", help="also break the extra time down")
    parser.add_argument("--phase-child", choices=("bare", "capture"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.phase_child:
        return phase_child(args.phase_child == "capture")
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
    if args.phases:
        phases(args.python, args.runs)


if __name__ == "__main__":
    main()
