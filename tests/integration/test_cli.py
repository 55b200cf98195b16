"""The command line end to end (docs/command-line.md): formats, rule selection, exit statuses,
layout files as input, and errors that name what is wrong."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import gdstk
import pytest

from builders import FAR_SCRIPT

FLOATING = '''import gdstk
lib = gdstk.Library()
cell = lib.new_cell("TOP")
cell.add(gdstk.rectangle((0, 0), (30, 10), layer=1))   # n-well
cell.add(gdstk.rectangle((0, 0), (30, 4), layer=5))    # P+ implant
cell.add(gdstk.rectangle((0, 0), (30, 4), layer=2))    # P+ diffusion
cell.add(gdstk.rectangle((0, 6), (2, 8), layer=4))     # N+ implant
cell.add(gdstk.rectangle((0, 6), (2, 8), layer=2))     # an n-tap without contact
'''

FAR = FAR_SCRIPT


def latchwatch(*args, cwd, timeout=120):
    exe = Path(sys.executable).with_name("latchwatch")
    cmd = [str(exe) if exe.exists() else shutil.which("latchwatch"), *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout)


@pytest.fixture
def project(tmp_path):
    (tmp_path / "floating.py").write_text(FLOATING)
    (tmp_path / "far.py").write_text(FAR)
    return tmp_path


def test_text_format_is_gnu_style(project):
    run = latchwatch("check", "--tech", "demo", "far.py", cwd=project)
    assert run.returncode == 1, run.stderr
    # The farthest point is x = 30, 31 um from the tap edge at x = -1 (analytic).
    assert run.stdout.splitlines()[0] == (
        "far.py:6:1: error: P+ diffusion is 31.00 um from the nearest n-well tap (limit 20.00 um) [tap-distance]")


def test_json_select_ignore_and_fail_on(project):
    run = latchwatch("check", "--tech", "demo", "--format", "json", "floating.py", cwd=project)
    report = json.loads(run.stdout)
    assert report["schema"] == "latchwatch-report/1"
    assert [f["rule"] for f in report["findings"]] == ["floating-well", "uncontacted-tap"]
    assert report["summary"] == {"error": 1, "warning": 1, "info": 0}
    only = latchwatch("check", "--tech", "demo", "--format", "json", "--select", "uncontacted-tap",
                      "floating.py", cwd=project)
    assert [f["rule"] for f in json.loads(only.stdout)["findings"]] == ["uncontacted-tap"]
    assert only.returncode == 1  # a warning fails at the default --fail-on warning
    assert latchwatch("check", "--tech", "demo", "--select", "uncontacted-tap", "--fail-on", "error",
                      "floating.py", cwd=project).returncode == 0
    rest = latchwatch("check", "--tech", "demo", "--format", "json", "--ignore", "floating-well",
                      "floating.py", cwd=project)
    assert [f["rule"] for f in json.loads(rest.stdout)["findings"]] == ["uncontacted-tap"]
    assert latchwatch("check", "--tech", "demo", "--fail-on", "never", "floating.py", cwd=project).returncode == 0


def test_output_file_and_devices(project):
    run = latchwatch("check", "--tech", "demo", "--format", "json", "--devices", "--output", "r.json",
                     "far.py", cwd=project)
    assert run.stdout == ""
    report = json.loads((project / "r.json").read_text())
    (device,) = report["devices"]
    assert device["kind"] == "pdiff" and device["line"] == 6
    assert device["tap_distance_um"] == pytest.approx(31.0, abs=1e-3)


def test_gds_input_carries_cell_and_location(project):
    lib = gdstk.Library()
    cell = lib.new_cell("CHIP")
    for layer, box in ((1, (-5, -5, 40, 10)), (5, (0, 0, 30, 4)), (2, (0, 0, 30, 4)), (4, (-3, 0, -1, 4)),
                       (2, (-3, 0, -1, 4)), (6, (-2.5, 1.5, -1.5, 2.5))):
        cell.add(gdstk.rectangle(box[:2], box[2:], layer=layer))
    lib.write_gds(str(project / "chip.gds"))
    run = latchwatch("check", "--tech", "demo", "--format", "json", "chip.gds", cwd=project)
    (finding,) = json.loads(run.stdout)["findings"]
    assert finding["file"] == "chip.gds" and finding["line"] is None and finding["cell"] == "CHIP"
    assert finding["location"] == [30.0, 0.0] or finding["location"] == [30.0, 4.0]
    text = latchwatch("check", "--tech", "demo", "chip.gds", cwd=project).stdout
    assert text.startswith("chip.gds: error: P+ diffusion is 31.00 um")


def test_script_that_draws_nothing_and_one_that_times_out(project):
    (project / "empty.py").write_text("import gdstk\nlib = gdstk.Library()\nlib.new_cell('E')\n")
    (project / "slow.py").write_text("import time\nwhile True:\n    time.sleep(0.05)\n")
    run = latchwatch("check", "--tech", "demo", "--format", "json", "--timeout", "1", "empty.py", "slow.py",
                     cwd=project)
    rules = {(f["rule"], f["file"], f["line"]) for f in json.loads(run.stdout)["findings"]}
    assert ("no-geometry", "empty.py", 1) in rules
    assert ("script-timeout", "slow.py", 3) in rules
    assert run.returncode == 1


def test_usage_errors_exit_2_and_name_the_problem(project):
    no_tech = latchwatch("check", "far.py", cwd=project)
    assert no_tech.returncode == 2 and "no technology" in no_tech.stderr
    bad_rule = latchwatch("check", "--tech", "demo", "--select", "tap-distanse", "far.py", cwd=project)
    assert bad_rule.returncode == 2 and "did you mean 'tap-distance'" in bad_rule.stderr
    bad_top = latchwatch("check", "--tech", "demo", "--top", "NOPE", "far.py", cwd=project)
    assert bad_top.returncode == 2 and "NOPE" in bad_top.stderr and "TOP" in bad_top.stderr
    (project / "broken.toml").write_text('name = "x"\n[layers]\nnwell = [1, 0\n')
    bad_tech = latchwatch("check", "--tech", "broken.toml", "far.py", cwd=project)
    assert bad_tech.returncode == 2 and "broken.toml" in bad_tech.stderr
    missing = latchwatch("check", "--tech", "demo", "nothere.py", cwd=project)
    assert missing.returncode == 2 and "nothere.py" in missing.stderr
    assert "Traceback" not in "".join(r.stderr for r in (no_tech, bad_rule, bad_top, bad_tech, missing))


def test_project_configuration_and_includes(project):
    (project / "cells").mkdir()
    (project / "cells" / "far.py").write_text(FAR)
    (project / "pyproject.toml").write_text(
        '[tool.latchwatch]\ntech = "demo"\ninclude = ["cells/*.py"]\nseverity = { tap-distance = "info" }\n')
    run = latchwatch("check", "--format", "json", cwd=project)
    report = json.loads(run.stdout)
    assert [(f["file"], f["severity"]) for f in report["findings"]] == [("cells/far.py", "info")]
    assert run.returncode == 0


def test_rules_command(project):
    listing = latchwatch("rules", cwd=project)
    assert "tap-distance" in listing.stdout and "not sign-off" in listing.stdout
    one = latchwatch("rules", "floating-well", cwd=project)
    for part in ("What it flags", "Why it matters", "Example", "How to fix it"):
        assert part in one.stdout


def test_devices_in_text_output_lists_the_rows_the_json_report_has(project):
    text = latchwatch("check", "--tech", "demo", "--devices", "far.py", cwd=project)
    as_json = json.loads(latchwatch("check", "--tech", "demo", "--devices", "--format", "json", "far.py",
                                    cwd=project).stdout)
    rows = [line for line in text.stdout.splitlines() if line.startswith("  ")]
    assert f"devices ({len(as_json['devices'])}):" in text.stdout.splitlines()
    assert len(rows) == len(as_json["devices"]) >= 1
    for row, device in zip(rows, as_json["devices"], strict=True):
        assert row.split()[0] == device["kind"] and f"tap {device['tap_distance_um']:.2f} um" in row
        assert f"far.py line {device['line']}" in row
    # Rows are not finding lines: nothing but the findings has the path:line:col: form.
    assert all(not row.lstrip().startswith("far.py:") for row in rows)


def test_an_unknown_sweep_function_is_one_usage_error(tmp_path):
    script = tmp_path / "fingers.py"
    script.write_text("import gdstk\n\n\ndef finger_array(fingers=1):\n    return gdstk.Cell('F')\n")
    done = latchwatch("check", "--tech", "demo", str(script), "--sweep", "finger_arry", "--param", "fingers=1,2,3",
                      cwd=tmp_path)
    assert done.returncode == 2, done.stdout + done.stderr
    assert "defines no function named 'finger_arry'; did you mean 'finger_array'?" in done.stderr
    assert "script-error" not in done.stdout
    # A function bound by an import is not refused on sight: the run decides.
    script.write_text("from os.path import join as finger_arry\n")
    assert "defines no function" not in latchwatch("check", "--tech", "demo", str(script), "--sweep",
                                                   "finger_arry", cwd=tmp_path).stderr


def test_a_layout_whose_every_cell_is_referenced_is_an_error_not_an_empty_pass(tmp_path):
    script = tmp_path / "selfref.py"
    script.write_text("import gdstk\nlib = gdstk.Library()\ncell = lib.new_cell('A')\ncell.add(gdstk.Reference(cell))\n")
    done = latchwatch("check", "--tech", "demo", str(script), cwd=tmp_path)
    assert done.returncode == 2 and "none is a top: the references form a cycle (cells: A)" in done.stderr


def test_an_unreadable_layout_file_says_so_not_that_a_script_raised(tmp_path):
    (tmp_path / "broken.gds").write_bytes(b"not a GDSII stream" * 20)
    done = latchwatch("check", "--tech", "demo", "broken.gds", cwd=tmp_path)
    assert done.returncode == 1
    assert "broken.gds:1:1: error: the layout file could not be read: cannot read broken.gds as GDSII" in done.stdout
    assert "script raised" not in done.stdout


ENV_SCRIPT = '''import os
import gdstk
print("PDK_ROOT=" + str(os.environ.get("PDK_ROOT")), "TOKEN=" + str(os.environ.get("LW_TEST_TOKEN")))
'''


def test_env_passes_named_variables_and_nothing_else(tmp_path, monkeypatch):
    (tmp_path / "env.py").write_text(ENV_SCRIPT)
    monkeypatch.setenv("PDK_ROOT", "/opt/pdks")
    monkeypatch.setenv("LW_TEST_TOKEN", "secret")
    plain = latchwatch("check", "--tech", "demo", "env.py", cwd=tmp_path)
    assert "PDK_ROOT=None TOKEN=None" in plain.stderr + plain.stdout
    passed = latchwatch("check", "--tech", "demo", "--env", "PDK_ROOT", "env.py", cwd=tmp_path)
    assert "PDK_ROOT=/opt/pdks TOKEN=None" in passed.stderr + passed.stdout
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\nenv = ["PDK_ROOT"]\n')
    from_project = latchwatch("check", "env.py", cwd=tmp_path)
    assert "PDK_ROOT=/opt/pdks TOKEN=None" in from_project.stderr + from_project.stdout
    doctor = latchwatch("doctor", cwd=tmp_path)
    assert "as asked: PDK_ROOT" in doctor.stdout
    refused = latchwatch("check", "--env", "LD_PRELOAD", "env.py", cwd=tmp_path)
    assert refused.returncode == 2 and "--env: LD_PRELOAD is not passed into a run" in refused.stderr


def test_the_report_names_the_checked_tops_and_why(project):
    (project / "two.py").write_text(
        "import klayout.db as kdb\nlayout = kdb.Layout()\n"
        "for name in ('A', 'B'):\n    layout.create_cell(name).shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 9, 9))\n"
        "layout.cell('B').write('b.gds')\n")
    text = latchwatch("check", "--tech", "demo", "two.py", "far.py", cwd=project).stdout.splitlines()
    assert "checked two.py: B (written by the script to b.gds, line 5)" in text
    assert "checked far.py: TOP (assigned to cell at module level, line 3)" in text
    runs = json.loads(latchwatch("check", "--tech", "demo", "--format", "json", "two.py", cwd=project).stdout)["runs"]
    assert runs[0]["tops"] == [{"cell": "B", "how": "written", "reason": "written by the script to b.gds",
                                "file": "two.py", "line": 5}]
