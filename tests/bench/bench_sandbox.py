"""What the sandbox costs per run; prints figures, asserts nothing.

    python tests/bench/bench_sandbox.py [RUNS]        default 20

For each configuration, RUNS cold runs of a tiny script (one rectangle):
  set-up   the child's own clock from its first line to its sandbox report:
           namespaces, the keeper and init forks, identity, limits, Landlock, seccomp
  run      run_script wall time (interpreter start, set-up, imports, script, pipes)
Configurations: every mechanism (what a run gets), and none of the optional ones
(namespaces, Landlock and the identity change left out; the keeper fork and the
limits stay), so their difference is what the isolation adds. Budget: <= 30 ms of
set-up per run (issue 6).
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

from latchwatch.server.sandbox import runner
from latchwatch.server.sandbox.policy import SKIPPABLE, SandboxReport

SCRIPT = "import gdstk\ngdstk.Cell('T').add(gdstk.rectangle((0, 0), (1, 1)))\n"
BUDGET_MS = 30.0


def measure(script: Path, runs: int, skip: tuple[str, ...], python: str | None = None) -> tuple[list[float], list[float]]:
    setups: list[float] = []
    parse = SandboxReport.from_control_line.__func__

    def recording(cls, line):
        report = parse(cls, line)
        setups.append(report.setup_ms)
        return report

    SandboxReport.from_control_line = classmethod(recording)
    walls = []
    try:
        for _ in range(runs):
            started = time.perf_counter()
            outcome = runner.run_script(script, skip_protections=skip, python=python)
            walls.append(1e3 * (time.perf_counter() - started))
            assert outcome.status == "ok", outcome.failure
    finally:
        SandboxReport.from_control_line = classmethod(parse)
    return setups, walls


def main() -> None:
    runs = int(sys.argv[1]) if len(sys.argv) > 1 else 20
    with tempfile.TemporaryDirectory(prefix="latchwatch-bench-") as folder:
        Path(folder).chmod(0o755)  # as root, a run is nobody, and is refused a folder only root can read
        script = Path(folder) / "tiny.py"
        script.write_text(SCRIPT)
        measure(script, 2, ())  # page caches warm
        full_setup, full_run = measure(script, runs, ())
        bare_setup, bare_run = measure(script, runs, SKIPPABLE)
        # The same interpreter under another name: the confined worker execs it (the --python case).
        other = next((str(Path(sys.executable).with_name(n)) for n in ("python", "python3")
                      if str(Path(sys.executable).with_name(n)) != sys.executable
                      and Path(sys.executable).with_name(n).exists()), None)
        named_run = measure(script, runs, (), python=other)[1] if other else None
    med = statistics.median
    print(f"sandbox cost over {runs} cold runs each (medians; min-max):")
    print(f"  set-up, every mechanism      {med(full_setup):6.1f} ms  ({min(full_setup):.1f}-{max(full_setup):.1f})")
    print(f"  set-up, optional ones off    {med(bare_setup):6.1f} ms  ({min(bare_setup):.1f}-{max(bare_setup):.1f})")
    print(f"  run,    every mechanism      {med(full_run):6.1f} ms")
    print(f"  run,    optional ones off    {med(bare_run):6.1f} ms")
    if named_run:
        print(f"  run,    every mechanism, a named interpreter exec'd once confined  {med(named_run):6.1f} ms")
    added = med(full_run) - med(bare_run)
    print(f"  isolation adds {med(full_setup) - med(bare_setup):.1f} ms of set-up, {added:.1f} ms of run time; "
          f"set-up {'within' if med(full_setup) <= BUDGET_MS else 'OVER'} the {BUDGET_MS:g} ms budget")


if __name__ == "__main__":
    main()
