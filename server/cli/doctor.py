"""``latchwatch doctor``: which sandbox protections a script run gets on this machine.

It starts a real child, exactly as a run does, and lists what the child reported:
every protection in force with how, every missing one with the reason.
"""

from __future__ import annotations

import os
import platform
import sys

from latchwatch.server.sandbox.policy import SandboxSettings, unavailable_message
from latchwatch.server.sandbox.workers import inspect_sandbox


def doctor_command(python: str | None, require: bool, out=sys.stdout, err=sys.stderr,
                   pass_env: tuple[str, ...] = ()) -> int:
    """Print the report; 2 when ``require`` and a required protection is missing."""
    interpreter = python or sys.executable
    report, ready, output = inspect_sandbox(interpreter, os.getcwd(), SandboxSettings(pass_env=pass_env))
    who = "root" if hasattr(os, "geteuid") and os.geteuid() == 0 else "an unprivileged user"
    print("latchwatch doctor: the sandbox of a script run on this machine", file=out)
    print(f"  machine      {platform.system()} {platform.release()} ({platform.machine()}), "
          f"latchwatch running as {who}", file=out)
    print(f"  interpreter  {interpreter}: {_interpreter_state(ready, output)}", file=out)
    print(f"  identity     {_identity_text(report)}", file=out)
    print(f"  environment  {_environment_text(pass_env)}", file=out)
    if report.setup_ms is not None:
        print(f"  set-up       {report.setup_ms:.1f} ms in the child", file=out)
    for line in report.doctor_lines():
        print(line, file=out)
    missing = report.missing_required()
    if missing:
        print(f"  {len(missing)} of the required protections are unavailable; runs fall back to the others "
              f"and each run's `sandbox` entry says so. --require-sandbox turns this into an error.", file=out)
    else:
        print("  every required protection is in force.", file=out)
    if require and missing:
        print(f"latchwatch: {unavailable_message(missing)}", file=err)
        return 2
    return 0


def _identity_text(report) -> str:
    """Who a script runs as, from the child's own report: never claimed, only reported."""
    if "privileges" in report.in_force:
        return "scripts run as " + report.in_force["privileges"].removeprefix("runs as ")
    return "scripts do NOT run as an unprivileged user: " + report.missing.get("privileges", "not reported")


def _environment_text(pass_env: tuple[str, ...]) -> str:
    """What the scripts see of the environment: the fixed allow-list, and the names the user passes."""
    fixed = "PATH, HOME, LANG, LANGUAGE, TZ, LC_*, TMPDIR (the run's folder)"
    if not pass_env:
        return f"{fixed}; nothing else (pass more with `env` in the project file or --env NAME)"
    shown = ", ".join(f"{name}{'' if name in os.environ else ' (not set here)'}" for name in pass_env)
    return f"{fixed}; and, as asked: {shown}"


def _interpreter_state(ready: str | None, output: str) -> str:
    if ready is None:
        tail = output.strip().splitlines()[-1:] or ["no output"]
        return f"the child did not get ready ({tail[0]})"
    if "import-error=" in ready:
        return "cannot capture: " + ready.split("import-error=", 1)[1].strip('"')[:200]
    return "imports " + ", ".join(part.replace("=", " ") for part in ready.split()[1:])
