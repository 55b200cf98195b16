"""How much capturing a gdsfactory 9 script costs: gen_gdsfactory.py (100,000 rectangles) bare and captured.

    python tests/bench/bench_capture_gdsfactory.py --python /path/to/gdsfactory-venv/bin/python [--runs N] [--shapes N]

The interpreter named by --python needs gdsfactory 9 (with kfactory and klayout); latchwatch
itself runs from this interpreter. Three commands, interleaved, the minimum and median of
N runs of each:
  bare      ``python gen_gdsfactory.py`` in a fresh folder
  capture   ``run_script(gen_gdsfactory.py)``: the child's run with every insertion logged,
            the collection of the cells into arrays, their transfer and decoding
  check     ``latchwatch check --python ... --tech demo`` of the same script: the capture
            and the whole analysis
and the ratios capture / bare and check / bare. Then, inside fresh interpreters of
--python, where the capture's extra time goes: the script's own run (imports excluded)
bare and with the capture installed, the collection, the encoding. Figures to read, not a
timed test.
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
GENERATOR = HERE / "gen_gdsfactory.py"
CHILD_FOLDER = HERE.parents[1] / "server" / "child"


def bare_run(python: str, shapes: int) -> float:
    with tempfile.TemporaryDirectory() as folder:
        Path(folder).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        started = time.perf_counter()
        subprocess.run([python, str(GENERATOR), str(shapes)], cwd=folder, check=True, stdin=subprocess.DEVNULL,
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        return time.perf_counter() - started


def captured_run(python: str, shapes: int) -> tuple[float, int]:
    from latchwatch.server.sandbox.runner import run_script

    with tempfile.TemporaryDirectory() as folder:
        Path(folder).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        script = Path(folder) / GENERATOR.name
        script.write_text(GENERATOR.read_text(encoding="utf-8").replace(
            "int(sys.argv[1]) if len(sys.argv) > 1 else 100_000", str(shapes)), encoding="utf-8")
        started = time.perf_counter()
        outcome = run_script(script, python=python, timeout=600)
        seconds = time.perf_counter() - started
    if outcome.status != "ok":
        raise SystemExit(f"capture failed: {outcome.failure}\n{outcome.output}")
    return seconds, outcome.layout.shape_count


def check_run(python: str, shapes: int) -> tuple[float, str]:
    latchwatch = Path(sys.executable).with_name("latchwatch")
    with tempfile.TemporaryDirectory() as folder:
        Path(folder).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        script = Path(folder) / GENERATOR.name
        script.write_text(GENERATOR.read_text(encoding="utf-8").replace(
            "int(sys.argv[1]) if len(sys.argv) > 1 else 100_000", str(shapes)), encoding="utf-8")
        started = time.perf_counter()
        proc = subprocess.run([str(latchwatch), "check", "--tech", "demo", "--python", python, "--timeout", "600",
                               "--format", "json", script.name], cwd=folder, capture_output=True, text=True)
        seconds = time.perf_counter() - started
    if proc.returncode not in (0, 1):
        raise SystemExit(f"check failed ({proc.returncode}):\n{proc.stderr[-2000:]}")
    return seconds, json.loads(proc.stdout)["runs"][0]["status"]


def phase_child(capture: bool, shapes: int) -> None:
    """One measurement in this (fresh, gdsfactory) interpreter; prints a JSON dict of seconds.

    The child's modules load as the sandboxed child loads them (server/child/start.py),
    since latchwatch need not be installed in this interpreter.
    """
    sys.path.insert(0, str(CHILD_FOLDER))
    import start

    start.load_package()
    from latchwatch_child import backends, wire_format

    recorder = backends.Capture(16) if capture else None
    import gdsfactory  # noqa: F401  (imported before the clock starts: the script's own run is measured)

    source = GENERATOR.read_text(encoding="utf-8").replace("int(sys.argv[1]) if len(sys.argv) > 1 else 100_000",
                                                           str(shapes))
    code = compile(source, str(GENERATOR), "exec")
    figures = {}
    with tempfile.TemporaryDirectory() as folder:
        Path(folder).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        os.chdir(folder)
        started, cpu = time.perf_counter(), time.process_time()
        exec(code, {"__name__": "__main__"})
        figures["script"] = time.perf_counter() - started
        figures["script cpu"] = time.process_time() - cpu
    if recorder is not None:
        started, cpu = time.perf_counter(), time.process_time()
        header, arrays = recorder.collect(str(GENERATOR))
        figures["collect"] = time.perf_counter() - started
        figures["collect cpu"] = time.process_time() - cpu
        started = time.perf_counter()
        b"".join(bytes(chunk) for chunk in wire_format.encode_payload(header, arrays))
        figures["encode"] = time.perf_counter() - started
    print(json.dumps(figures))


def phases(python: str, runs: int, shapes: int) -> None:
    samples: dict[str, list[float]] = {}
    for _ in range(runs):
        for mode in ("bare", "capture"):
            out = subprocess.run([python, __file__, "--phase-child", mode, "--shapes", str(shapes)], check=True,
                                 capture_output=True, text=True)
            for name, seconds in json.loads(out.stdout.strip().splitlines()[-1]).items():
                samples.setdefault(f"{mode}:{name}", []).append(seconds)
    print("where the capture's time goes (min of runs, imports excluded; wall, and CPU of the process,")
    print("which a busy machine distorts less):")
    for clock in ("", " cpu"):
        bare_script = min(samples["bare:script" + clock])
        logged = min(samples["capture:script" + clock])
        collect = min(samples["capture:collect" + clock])
        print(f"  script, bare{clock:<18} {bare_script:.3f} s")
        print(f"  script, insertions logged{clock:<5} {logged:.3f} s  (+{logged - bare_script:.3f} s)")
        print(f"  collect{clock:<23} {collect:.3f} s")
        print(f"  script + capture / script{clock:<5} {(logged + collect) / bare_script:.2f}")
    print(f"  encode                        {min(samples['capture:encode']):.3f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--python", help="an interpreter with gdsfactory 9 (required)")
    parser.add_argument("--runs", type=int, default=5)
    parser.add_argument("--shapes", type=int, default=100_000)
    parser.add_argument("--no-phases", action="store_true", help="skip the breakdown")
    parser.add_argument("--phase-child", choices=("bare", "capture"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.phase_child:
        return phase_child(args.phase_child == "capture", args.shapes)
    if not args.python:
        parser.error("--python: name an interpreter with gdsfactory 9")
    bare, captured, checked = [], [], []
    shapes = 0
    for _ in range(args.runs):
        bare.append(bare_run(args.python, args.shapes))
        seconds, shapes = captured_run(args.python, args.shapes)
        captured.append(seconds)
        seconds, status = check_run(args.python, args.shapes)
        checked.append(seconds)
    print(f"shapes captured (unflattened): {shapes}; check's run status: {status}")
    for label, values in (("bare     python gen_gdsfactory.py", bare), ("capture  run_script", captured),
                          ("check    latchwatch check", checked)):
        print(f"{label:<34}: min {min(values):.3f} s   median {statistics.median(values):.3f} s")
    print(f"ratio capture / bare (min / min)  : {min(captured) / min(bare):.2f}")
    print(f"ratio check / bare (min / min)    : {min(checked) / min(bare):.2f}")
    if not args.no_phases:
        phases(args.python, args.runs, args.shapes)


if __name__ == "__main__":
    main()
