"""Findings and device figures of the benchmark layouts and the examples, for the results-unchanged test.

The stored reference (tests/data/results_reference.json) was written by this module
with the code of the commit that added it, before any speed work touched the
analysis; the test re-runs the same checks and compares. Re-write it only when a
change is meant to change results (say so in the commit):

    python tests/results_reference.py
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from locations import BENCH, DATA, EXAMPLES

REFERENCE = DATA / "results_reference.json"
BENCH_SHAPES = 20_000  # small enough for a quick test, large enough for many rows and all defects
BENCH_GENERATORS = ("gen_row.py", "gen_row_hier.py")
# Run-dependent fields: timing and the sandbox this machine offers; everything else must match.
RUN_KEYS = ("script", "corner", "status", "cells", "shapes")


def latchwatch() -> str:
    beside = Path(sys.executable).with_name("latchwatch")
    found = str(beside) if beside.exists() else shutil.which("latchwatch")
    if not found:
        raise RuntimeError("the `latchwatch` console script is not installed (pip install -e .)")
    return found


def check(script: str, cwd: Path) -> dict:
    """The JSON report of `latchwatch check --devices` on one script, with run-dependent fields left out."""
    proc = subprocess.run(
        [latchwatch(), "check", script, "--tech", "demo", "--devices", "--format", "json",
         "--fail-on", "never", "--timeout", "300"],
        cwd=cwd, capture_output=True, text=True, timeout=900,
    )
    if proc.returncode != 0:
        raise RuntimeError(f"latchwatch check {script} exited {proc.returncode}:\n{proc.stderr[-3000:]}")
    report = json.loads(proc.stdout)
    runs = [{key: run.get(key) for key in RUN_KEYS} for run in report["runs"]]
    return {"runs": runs, "findings": report["findings"], "devices": report.get("devices", []),
            "summary": report["summary"]}


def collect() -> dict[str, dict]:
    """Report of each benchmark layout (at BENCH_SHAPES) and each example, keyed by a name."""
    results: dict[str, dict] = {}
    with tempfile.TemporaryDirectory(prefix="latchwatch-results-") as tmp:
        folder = Path(tmp)
        folder.chmod(0o755)  # as root, a run is nobody and must read the scripts
        for name in BENCH_GENERATORS:
            shutil.copy(BENCH / name, folder / name)
        for name in BENCH_GENERATORS:
            module = Path(name).stem
            wrapper = f"{module}_{BENCH_SHAPES}.py"
            (folder / wrapper).write_text(f"from {module} import main\n\nmain({BENCH_SHAPES})\n", encoding="utf-8")
            results[wrapper] = check(wrapper, folder)
        examples = folder / "examples"
        shutil.copytree(EXAMPLES, examples)
        for script in sorted(examples.glob("*.py")):
            results[f"examples/{script.name}"] = check(script.name, examples)
    return results


def write(results: dict[str, dict], path: Path) -> None:
    """One line per finding and per device, so a difference shows as a short diff."""
    lines = ["{"]
    for i, (name, report) in enumerate(results.items()):
        lines.append(f"{json.dumps(name)}: {{")
        lines.append(f'"runs": {json.dumps(report["runs"])},')
        lines.append(f'"summary": {json.dumps(report["summary"])},')
        for key in ("findings", "devices"):
            rows = report[key]
            lines.append(f'"{key}": [' + ("" if rows else "]" + ("," if key == "findings" else "")))
            for j, row in enumerate(rows):
                end = "," if j < len(rows) - 1 else ("]," if key == "findings" else "]")
                lines.append(json.dumps(row, separators=(",", ":")) + end)
        lines.append("}" + ("," if i < len(results) - 1 else ""))
    lines.append("}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


if __name__ == "__main__":
    write(collect(), REFERENCE)
    print(f"wrote {REFERENCE}")
