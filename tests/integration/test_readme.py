"""The README keeps its promises: the job first, exactly two set-up commands, the test
command that CI runs, every rule, and the caution."""

import re
import subprocess
import sys

from latchwatch.analyzers.rules import RULES
from latchwatch.server.cli.main import CAUTION

from locations import ROOT

README = (ROOT / "README.md").read_text(encoding="utf-8")


def _setup_commands():
    section = README.split("## Set up", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```\n(.*?)```", section, flags=re.S)
    return [b.strip() for b in blocks if b.strip().startswith("python3 -m venv")]


def test_job_paragraph_comes_first():
    body = [line for line in README.splitlines() if line.strip()]
    assert body[0] == "# latchwatch"
    assert "latch-up" in body[1] and not body[1].startswith(("#", "`", "|"))


def test_exactly_two_setup_commands_and_ci_runs_the_second():
    install_demo, install_tests = _setup_commands()
    assert "latchwatch check" in install_demo and "examples/" in install_demo
    assert "pytest" in install_tests
    assert install_tests in (ROOT / ".ci" / "run").read_text(encoding="utf-8")


def test_every_rule_is_listed():
    for rule in RULES:
        assert f"| {rule.id} | {rule.severity.label} |" in README


def test_caution_in_readme_and_rules_command():
    flat = " ".join(README.split())
    assert " ".join(CAUTION.split()) in flat
    out = subprocess.run([sys.executable, "-m", "latchwatch", "rules"], capture_output=True,
                         text=True, check=True).stdout
    assert "not sign-off" in out and "JESD78" in out


def test_the_demo_prints_what_the_readme_shows():
    """The demo's check, in latchwatch's own environment (no gdsfactory: examples/gdsfactory/
    is left out by examples/latchwatch.toml), prints the README's block."""
    command = _setup_commands()[0].split(" && ")[-1]
    assert command == ".venv/bin/latchwatch check --tech demo examples/"
    shown = README.split("The demo prints", 1)[1].split("```\n", 2)[1]
    run = subprocess.run([sys.executable, "-m", "latchwatch", *command.split()[1:]], cwd=ROOT,
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 1, run.stderr
    assert run.stdout == shown
