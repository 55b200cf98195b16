"""Benchmark of the checker on the generated rows; prints figures, asserts nothing.

    python tests/bench/bench_check.py [SHAPES ...]     default 100000 1000000

For each size and each generator (gen_row.py flat, gen_row_hier.py hierarchical),
in a fresh temporary folder:
  generator  wall time of the bare generator, `python gen_row.py SHAPES`
  check      wall time of `latchwatch check <script> --tech demo --format json` on a
             two-line script that calls the generator with SHAPES
  ratio      check / generator
  peak MiB   peak resident memory of the check: ru_maxrss of the rusage of that one
             child, which covers the processes it waited for (the script run)
  gds        wall time of `latchwatch check` on the GDS file the bare run wrote (the
             analysis without running the script)
and, over the two smallest sizes, the growth exponent log(t2/t1)/log(size2/size1)
(with the default sizes: log(t1M/t100k)/log(10)).
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
GENERATORS = {"gen_row.py": "flat", "gen_row_hier.py": "hierarchical"}
DEFAULT_SIZES = (100_000, 1_000_000)
TIMEOUT_S = 1800


def latchwatch_command() -> list[str]:
    script = Path(sys.executable).with_name("latchwatch")
    return [str(script)] if script.exists() else ["latchwatch"]


def measure(cmd: list[str], cwd: Path) -> tuple[float, int, int, str]:
    """(wall seconds, exit status, peak RSS in KiB, stdout) of one command."""
    out_path, err_path = cwd / ".stdout", cwd / ".stderr"
    with open(out_path, "wb") as out, open(err_path, "wb") as err:
        start = time.perf_counter()
        proc = subprocess.Popen(cmd, cwd=cwd, stdout=out, stderr=err, stdin=subprocess.DEVNULL)
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    stdout = out_path.read_text(encoding="utf-8", errors="replace")
    if proc.returncode not in (0, 1):
        tail = err_path.read_text(encoding="utf-8", errors="replace")[-2000:]
        print(f"  ! {' '.join(cmd)} exited {proc.returncode}:\n{tail}", file=sys.stderr)
    return seconds, proc.returncode, usage.ru_maxrss, stdout


def report_summary(stdout: str) -> str:
    try:
        report = json.loads(stdout)
    except json.JSONDecodeError:
        return "no JSON report"
    runs = report.get("runs") or [{}]
    rules: dict[str, int] = {}
    for finding in report.get("findings", []):
        rules[finding["rule"]] = rules.get(finding["rule"], 0) + 1
    listed = ", ".join(f"{n} {r}" for r, n in sorted(rules.items())) or "no findings"
    return f"status {runs[0].get('status')}, {runs[0].get('shapes')} shapes, {listed}"


def bench_one(generator: str, size: int) -> dict:
    with tempfile.TemporaryDirectory(prefix="latchwatch-bench-") as tmp:
        Path(tmp).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        folder = Path(tmp)
        for name in GENERATORS:
            shutil.copy(HERE / name, folder / name)
        module = Path(generator).stem
        wrapper = folder / f"{module}_{size}.py"
        wrapper.write_text(f"from {module} import main\n\nmain({size})\n", encoding="utf-8")
        check = latchwatch_command() + ["check", "--tech", "demo", "--format", "json",
                                        "--timeout", str(TIMEOUT_S), "--fail-on", "never"]
        bare_s, _, bare_kib, _ = measure([sys.executable, generator, str(size)], folder)
        check_s, _, check_kib, stdout = measure(check + [wrapper.name], folder)
        gds_s, _, gds_kib, _ = measure(check + [f"{module}.gds"], folder)
    return {"generator": generator, "size": size, "bare": bare_s, "check": check_s,
            "peak_mib": check_kib / 1024, "gds": gds_s, "gds_peak_mib": gds_kib / 1024,
            "summary": report_summary(stdout)}


def exponent(t1: float, t2: float, n1: int, n2: int) -> float:
    return math.log(t2 / t1) / math.log(n2 / n1)


def main(argv: list[str]) -> None:
    sizes = tuple(int(a) for a in argv) or DEFAULT_SIZES
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cpus, latchwatch at {latchwatch_command()[0]}")
    for generator, kind in GENERATORS.items():
        print(f"\n{generator} ({kind})")
        print(f"{'shapes':>10} {'generator s':>12} {'check s':>9} {'ratio':>7} {'peak MiB':>9} "
              f"{'gds s':>7} {'gds MiB':>8}  report")
        rows = []
        for size in sizes:
            r = bench_one(generator, size)
            rows.append(r)
            print(f"{size:>10} {r['bare']:>12.2f} {r['check']:>9.2f} {r['check'] / r['bare']:>7.1f} "
                  f"{r['peak_mib']:>9.0f} {r['gds']:>7.2f} {r['gds_peak_mib']:>8.0f}  {r['summary']}", flush=True)
        if len(rows) >= 2:
            a, b = rows[0], rows[1]
            print(f"growth exponent {a['size']} -> {b['size']}: generator "
                  f"{exponent(a['bare'], b['bare'], a['size'], b['size']):.2f}, check "
                  f"{exponent(a['check'], b['check'], a['size'], b['size']):.2f}, gds "
                  f"{exponent(a['gds'], b['gds'], a['size'], b['size']):.2f}")


if __name__ == "__main__":
    main(sys.argv[1:])
