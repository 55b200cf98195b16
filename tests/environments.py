"""Python environments of layout frameworks other than the test environment's own, for
the tests that run real framework code through `latchwatch check --python`.

`.ci/run` builds each one in the checkout and names its interpreter in an environment
variable; without either, the tests that need it skip and say how to build it.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

from locations import ROOT


def framework_python(variable: str, folder: str, probe: str) -> tuple[str | None, str | None]:
    """(interpreter, None) when the environment named by ``variable`` (else ROOT/``folder``)
    runs ``probe``; (None or the interpreter, why not) otherwise."""
    named = os.environ.get(variable)
    beside = ROOT / folder / "bin" / "python"
    python = named or (str(beside) if beside.exists() else None)
    if python is None:
        return None, f"no environment: set {variable} or build {folder} (see the test module's docstring; .ci/run builds it)"
    if not Path(python).exists():
        return None, f"{variable} names {python}, which does not exist"
    ran = subprocess.run([python, "-c", probe], capture_output=True, text=True, timeout=180)
    if ran.returncode != 0:
        return None, f"{python} cannot run {probe!r}: {ran.stderr.strip().splitlines()[-1:]}"
    return python, None


def latchwatch_here() -> str:
    """The `latchwatch` console script of the test environment."""
    beside = Path(sys.executable).with_name("latchwatch")
    found = str(beside) if beside.exists() else shutil.which("latchwatch")
    assert found, "the `latchwatch` console script is not installed (pip install -e .)"
    return found


def check(command: list[str], cwd: Path, *args: str) -> dict:
    """The JSON report (with --devices) of `latchwatch check` run by ``command`` in ``cwd``."""
    # --timeout: importing gdsfactory alone takes seconds, more on a busy machine.
    proc = subprocess.run([*command, "check", "--format", "json", "--devices", "--timeout", "240", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode in (0, 1), f"exit {proc.returncode}\n{proc.stderr}"
    return json.loads(proc.stdout)


def line_of(text: str, fragment: str) -> int:
    """The one line of ``text`` holding ``fragment``, from 1."""
    (number,) = [k + 1 for k, line in enumerate(text.splitlines()) if fragment in line]
    return number
