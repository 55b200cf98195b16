"""Hostile inputs against the parent, through the real `latchwatch` command (issue 14,
points 5 and 8): each case ends in a finding or exit status 2 with a message naming
the file, never a hang, a traceback or gigabytes.

Run as root. As an unprivileged user the file-type checks, the budget and the
terminal escaping behave the same (they do not depend on the user); only creating
the FIFO and the /dev/zero symlink needs a writable folder, which tmp_path is.
"""

from __future__ import annotations

import json
import os

import gdstk
import pytest
from test_bad_input import latchwatch

OSC52 = "\x1b]52;c;aGVsbG8=\x07"


def _array_gds(path, columns, rows):
    lib = gdstk.Library()
    unit = lib.new_cell("U")
    unit.add(gdstk.rectangle((0, 0), (1, 1), layer=1))
    top = lib.new_cell("T")
    top.add(gdstk.Reference(unit, (0, 0), columns=columns, rows=rows, spacing=(2, 2)))
    lib.write_gds(str(path))


@pytest.fixture(scope="module")
def checked(tmp_path_factory):
    """One `latchwatch check` over a folder of files that would hang or exhaust the parent."""
    folder = tmp_path_factory.mktemp("hostile")
    (folder / "zero.gds").symlink_to("/dev/zero")
    (folder / "random.oas").symlink_to("/dev/urandom")
    os.mkfifo(folder / "fifo.gds")
    os.mkfifo(folder / "fifo.py")
    _array_gds(folder / "array.gds", 32767, 32767)
    (folder / "nested.py").write_text(
        "import gdstk\nlib = gdstk.Library()\nunit = lib.new_cell('U')\n"
        "unit.add(gdstk.rectangle((0, 0), (1, 1), layer=1))\nrow = lib.new_cell('ROW')\n"
        "row.add(gdstk.Reference(unit, columns=1000, rows=1000, spacing=(2, 2)))\ntop = lib.new_cell('TOP')\n"
        "top.add(gdstk.Reference(row, columns=1000, rows=1000, spacing=(3000, 3000)))\n")
    run = latchwatch("check", "--tech", "demo", "--format", "json", ".", cwd=folder, timeout=240)
    return run, json.loads(run.stdout) if run.stdout.strip() else None


def _finding(report, file):
    (finding,) = [f for f in report["findings"] if f["file"] == file]
    return finding


def test_nothing_hangs_and_nothing_crashes(checked):
    run, report = checked
    assert "Traceback" not in run.stderr and report is not None, run.stderr
    assert {r["script"]: r["status"] for r in report["runs"]} == {
        "array.gds": "limit", "fifo.gds": "error", "fifo.py": "error", "nested.py": "limit", "random.oas": "error",
        "zero.gds": "error"}


@pytest.mark.parametrize("file, words", [
    ("zero.gds", "(which leads to /dev/zero) is a character device, not a regular file"),
    ("random.oas", "(which leads to /dev/urandom) is a character device"),
    ("fifo.gds", "is a FIFO (named pipe), not a regular file"),
    ("fifo.py", "is a FIFO (named pipe), not a regular file"),
])
def test_files_that_are_no_regular_files_are_refused(checked, file, words):
    finding = _finding(checked[1], file)
    assert finding["rule"] == "script-error" and words in finding["message"]


def test_an_array_of_32767_by_32767_is_a_budget_finding(checked):
    finding = _finding(checked[1], "array.gds")
    assert finding["rule"] == "script-limit"
    assert "expands to 1,073,676,289 shapes, above the limit of 10,000,000; raise it with `shapes = 20000000`" \
        in finding["message"]  # 32767^2 (arithmetic)


def test_nested_arrays_are_a_budget_finding_on_the_line_of_an_array(checked):
    finding = _finding(checked[1], "nested.py")
    assert finding["rule"] == "script-limit" and finding["line"] in (6, 8)
    assert "expands to 1,000,000,000,000 shapes" in finding["message"]  # 1000^4 (arithmetic)


def test_a_lowered_limit_in_the_project_file_applies(tmp_path):
    _array_gds(tmp_path / "small.gds", 3, 3)
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\n[limits]\nshapes = 8\n')
    run = latchwatch("check", "--format", "json", "small.gds", cwd=tmp_path)
    (finding,) = json.loads(run.stdout)["findings"]
    assert "expands to 9 shapes, above the limit of 8; raise it with `shapes = 16`" in finding["message"]
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\n[limits]\nfile-mib = 0.0001\n')
    run = latchwatch("check", "--format", "json", "small.gds", cwd=tmp_path)
    (finding,) = json.loads(run.stdout)["findings"]
    assert "above the limit of 104 bytes for an input file; raise it with `file-mib = 0.000198364`" in finding["message"]


def test_a_bad_limit_is_exit_status_2(tmp_path):
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\n[limits]\nshapes = "many"\n')
    (tmp_path / "a.py").write_text("")
    run = latchwatch("check", "a.py", cwd=tmp_path)
    assert run.returncode == 2 and "latchwatch.toml: limits.shapes: expected a positive whole number" in run.stderr


# -- configuration: exit status 2 with the file named ----------------------------------------------


def test_deeply_nested_toml_in_the_project_file(tmp_path):
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\nx = ' + "[" * 5000 + "]" * 5000 + "\n")
    (tmp_path / "a.py").write_text("")
    run = latchwatch("check", "a.py", cwd=tmp_path)
    assert run.returncode == 2 and "Traceback" not in run.stderr
    assert "latchwatch.toml: not valid TOML for latchwatch: arrays or tables nest deeper" in run.stderr


def test_deeply_nested_toml_in_a_technology_file(tmp_path):
    (tmp_path / "deep.toml").write_text('extends = "demo"\nname = "d"\nx = ' + "{a = " * 5000 + "1" + "}" * 5000)
    (tmp_path / "a.py").write_text("")
    run = latchwatch("check", "--tech", "deep.toml", "a.py", cwd=tmp_path)
    assert run.returncode == 2 and "Traceback" not in run.stderr
    assert "deep.toml: expected valid TOML, got arrays or tables nested deeper" in run.stderr


def test_a_1500_file_extends_chain(tmp_path):
    for number in range(1500):
        parent = f"t{number + 1}.toml" if number < 1499 else "demo"
        (tmp_path / f"t{number}.toml").write_text(f'name = "t{number}"\nextends = "{parent}"\n')
    (tmp_path / "a.py").write_text("")
    run = latchwatch("check", "--tech", "t0.toml", "a.py", cwd=tmp_path)
    assert run.returncode == 2 and "Traceback" not in run.stderr
    assert "t0.toml: extends: expected a chain of at most 32 technology files" in run.stderr


def test_a_technology_file_that_is_a_fifo(tmp_path):
    os.mkfifo(tmp_path / "fifo.toml")
    (tmp_path / "a.py").write_text("")
    run = latchwatch("check", "--tech", "fifo.toml", "a.py", cwd=tmp_path, timeout=60)
    assert run.returncode == 2 and "fifo.toml is a FIFO (named pipe), not a regular file" in run.stderr


# -- terminal control sequences in script text (point 8) -------------------------------------------


def test_script_output_and_messages_reach_the_terminal_escaped(tmp_path):
    (tmp_path / "loud.py").write_text(
        f"import sys\nprint({OSC52!r})\nprint('\\x9b2J and \\x1b[31mred', file=sys.stderr)\n"
        f"raise ValueError({OSC52!r})\n")
    run = latchwatch("check", "--tech", "demo", "loud.py", cwd=tmp_path)
    for stream in (run.stdout, run.stderr):
        assert "\x1b" not in stream and "\x07" not in stream and "\x9b" not in stream
    assert "\\x1b]52;c;aGVsbG8=\\x07" in run.stderr  # the script's print, shown
    assert "\\x9b2J and \\x1b[31mred" in run.stderr
    assert "ValueError: \\x1b]52;c;aGVsbG8=\\x07" in run.stdout  # the finding's message


def test_a_fifo_put_in_place_after_the_parent_looked_is_refused_by_the_child(tmp_path):
    """run_script skips the parent's check (pipeline.run_path makes it), as a swap after it would."""
    from latchwatch.server.sandbox.runner import run_script

    os.mkfifo(tmp_path / "late.py")
    outcome = run_script(tmp_path / "late.py", timeout=30)
    assert (outcome.status, outcome.failure.message) == (
        "error", f"cannot read the script {tmp_path / 'late.py'}: not a regular file")
    assert outcome.seconds < 20  # refused at once, not ended at the time limit
