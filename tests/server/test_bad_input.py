"""The tool's own bad input, through the real `latchwatch` command (issue 6): broken
technology and project files are exit status 2 with a message naming the file; broken
layouts and scripts are findings on their own file, and the rest of the report is
all there. Never a traceback."""

from __future__ import annotations

import json
import random
import shutil
import subprocess
import sys
from pathlib import Path

import gdstk
import pytest

from builders import FAR_SCRIPT

FAR = FAR_SCRIPT

HUGE = '''import gdstk, math
cell = gdstk.Cell("HUGE")
n = 200000
cell.add(gdstk.Polygon([(1000 * math.cos(2 * math.pi * k / n), 1000 * math.sin(2 * math.pi * k / n))
                        for k in range(n)], layer=2))
cell.add(gdstk.rectangle((-1e7, -1e7), (1e7, 1e7), layer=1))
'''

DEGENERATE = '''import gdstk
cell = gdstk.Cell("DEG")
cell.add(gdstk.rectangle((0, 0), (1, 4), layer=1))
cell.add(gdstk.Polygon([(0, 0), (5, 0), (10, 0)], layer=2))
cell.add(gdstk.Polygon([(0, 0), (4, 4), (4, 0), (0, 4)], layer=2))
cell.add(gdstk.rectangle((2, 2), (2, 3), layer=5))
'''

NON_FINITE = '''import gdstk
cell = gdstk.Cell("NAN")
cell.add(gdstk.rectangle((0, 0), (float("nan"), 4), layer=2))
cell.add(gdstk.rectangle((0, 0), (float("inf"), 4), layer=1))
cell.add(gdstk.Polygon([(0, 0), (1, float("-inf")), (2, 0)], layer=5))
cell.add(gdstk.rectangle((10, 0), (12, 4), layer=2))
cell.add(gdstk.Polygon([(float("nan"), 0), (3, 0), (3, 3)], layer=2))
'''


def latchwatch(*args, cwd, timeout=300):
    exe = Path(sys.executable).with_name("latchwatch")
    command = [str(exe) if exe.exists() else shutil.which("latchwatch"), *args]
    return subprocess.run(command, cwd=cwd, capture_output=True, text=True, timeout=timeout)


def _good_gds(path: Path) -> bytes:
    lib = gdstk.Library()
    cell = lib.new_cell("G")
    cell.add(gdstk.rectangle((0, 0), (10, 10), layer=1))
    for i in range(200):
        cell.add(gdstk.rectangle((i, 0), (i + 0.5, 1), layer=2))
    lib.write_gds(str(path))
    return path.read_bytes()


@pytest.fixture(scope="module")
def checked(tmp_path_factory):
    """One `latchwatch check` over a folder of bad inputs and one good script."""
    folder = tmp_path_factory.mktemp("bad-input")
    (folder / "far.py").write_text(FAR)
    (folder / "huge.py").write_text(HUGE)
    (folder / "degenerate.py").write_text(DEGENERATE)
    (folder / "nonfinite.py").write_text(NON_FINITE)
    (folder / "junk.py").write_bytes(random.Random(6).randbytes(3000))
    (folder / "latin1.py").write_bytes("# caf\xe9\nname = 'caf\xe9'\n".encode("latin-1"))
    good = _good_gds(folder / "good.gds")
    (folder / "truncated.gds").write_bytes(good[: len(good) // 2])
    (folder / "random.gds").write_bytes(random.Random(7).randbytes(5000))
    run = latchwatch("check", "--tech", "demo", "--format", "json", ".", cwd=folder)
    return run, json.loads(run.stdout) if run.stdout.strip() else None


def _findings(report, file):
    return [f for f in report["findings"] if f["file"] == file]


def test_the_report_is_complete_and_nothing_crashed(checked):
    run, report = checked
    assert "Traceback" not in run.stderr, run.stderr
    assert run.returncode == 1 and report is not None
    runs = {r["script"]: r["status"] for r in report["runs"]}
    assert runs == {"degenerate.py": "ok", "far.py": "ok", "good.gds": "ok", "huge.py": "ok", "junk.py": "error",
                    "latin1.py": "error", "nonfinite.py": "ok", "random.gds": "error", "truncated.gds": "error"}
    far = _findings(report, "far.py")
    assert [(f["rule"], f["line"], f["value"]) for f in far] == [("tap-distance", 6, 31.0)]


@pytest.mark.parametrize("file, words", [
    ("truncated.gds", "cannot read truncated.gds as GDSII"),
    ("random.gds", "cannot read random.gds as GDSII"),
    ("junk.py", "null bytes"),
    ("latin1.py", "can't decode byte 0xe9"),
])
def test_unreadable_input_is_a_script_error_on_its_file(checked, file, words):
    _run, report = checked
    findings = _findings(report, file)
    assert [f["rule"] for f in findings] == ["script-error"] and words in findings[0]["message"]


def test_zero_area_and_self_intersecting_polygons_are_reported_on_their_lines(checked):
    _run, report = checked
    findings = _findings(report, "degenerate.py")
    assert [(f["rule"], f["line"]) for f in findings] == [("invalid-geometry", 4), ("invalid-geometry", 5),
                                                          ("invalid-geometry", 6)]


def test_nan_and_infinite_coordinates_are_reported_on_their_lines(checked):
    _run, report = checked
    findings = _findings(report, "nonfinite.py")
    # Line 7's first vertex is NaN: GEOS would refuse to close that ring, so it is never built.
    assert [(f["rule"], f["line"]) for f in findings] == [("invalid-geometry", 3), ("invalid-geometry", 4),
                                                          ("invalid-geometry", 5), ("invalid-geometry", 7)]
    assert all("NaN or infinite coordinates" in f["message"] for f in findings)


def test_a_single_huge_polygon_is_checked(checked):
    _run, report = checked
    huge = next(r for r in report["runs"] if r["script"] == "huge.py")
    assert (huge["status"], huge["shapes"]) == ("ok", 2)


def test_a_gds_that_crashes_gdstk_is_contained(tmp_path):
    """Some corrupt files make gdstk abort or segfault (seen while writing this test):
    read in the sandboxed child, that is a finding, not a dead command."""
    good = _good_gds(tmp_path / "good.gds")
    rng = random.Random(1)
    crashing = None
    for attempt in range(60):
        data = bytearray(good)
        for _ in range(20):
            data[rng.randrange(len(data))] = rng.randrange(256)
        candidate = tmp_path / f"m{attempt}.gds"
        candidate.write_bytes(bytes(data))
        probe = subprocess.run([sys.executable, "-c", f"import gdstk; gdstk.read_gds({str(candidate)!r})"],
                               capture_output=True)
        if probe.returncode < 0:
            crashing = candidate
            break
        candidate.unlink()
    if crashing is None:
        pytest.skip("no corrupted file among 60 made this gdstk crash")
    (tmp_path / "good.gds").unlink()
    run = latchwatch("check", "--tech", "demo", "--format", "json", crashing.name, cwd=tmp_path)
    assert "Traceback" not in run.stderr and run.returncode == 1
    (finding,) = json.loads(run.stdout)["findings"]
    assert finding["rule"] == "script-error" and "killed by SIG" in finding["message"]


# -- configuration: exit status 2, a message naming the file ---------------------------------------


def _no_traceback(run):
    assert "Traceback" not in run.stderr and run.stderr.startswith("latchwatch: "), run.stderr


def test_malformed_technology_toml(tmp_path):
    (tmp_path / "far.py").write_text(FAR)
    (tmp_path / "broken.toml").write_text('name = "broken"\n[layers\nnwell = 1\n')
    run = latchwatch("check", "--tech", "broken.toml", "far.py", cwd=tmp_path)
    assert run.returncode == 2 and run.stdout == ""
    _no_traceback(run)
    assert "broken.toml:2:" in run.stderr and "expected valid TOML" in run.stderr


def test_technology_toml_with_a_wrong_value(tmp_path):
    (tmp_path / "far.py").write_text(FAR)
    (tmp_path / "odd.toml").write_text('extends = "demo"\nname = "odd"\n[layers]\nnwell = "one"\n')
    run = latchwatch("check", "--tech", "odd.toml", "far.py", cwd=tmp_path)
    assert run.returncode == 2
    _no_traceback(run)
    assert "odd.toml" in run.stderr and "nwell" in run.stderr


@pytest.mark.parametrize("text, words", [
    ('tech = "demo"\ntimeout = = 3\n', "line 2"),
    ('tech = "demo"\nrequire-sandbox = "yes"\n', "require-sandbox: expected true or false"),
    ("\x00\xff binary", "not valid TOML"),
])
def test_malformed_project_file(tmp_path, text, words):
    (tmp_path / "far.py").write_text(FAR)
    (tmp_path / "latchwatch.toml").write_bytes(text.encode("latin-1"))
    run = latchwatch("check", "far.py", cwd=tmp_path)
    assert run.returncode == 2
    _no_traceback(run)
    assert "latchwatch.toml" in run.stderr and words in run.stderr


def test_required_sandbox_from_the_project_file_is_an_error_where_incomplete(tmp_path):
    (tmp_path / "far.py").write_text(FAR)
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\nrequire-sandbox = true\n')
    from latchwatch.server.sandbox.policy import REQUIRED
    from latchwatch.server.sandbox.workers import inspect_sandbox

    in_force = inspect_sandbox(project_root=str(tmp_path))[0].in_force
    missing = [name for name in REQUIRED if name not in in_force]
    run = latchwatch("check", "far.py", cwd=tmp_path)
    if missing:
        assert run.returncode == 2 and "the sandbox is required" in run.stderr
        _no_traceback(run)
    else:
        assert run.returncode == 1 and "Traceback" not in run.stderr
        assert run.stdout.startswith("far.py:6:")
    doctor = latchwatch("doctor", "--require-sandbox", cwd=tmp_path)
    assert doctor.returncode == (2 if missing else 0) and "in force" in doctor.stdout
    assert all(f"unavailable  {name}" in doctor.stdout for name in missing)


def test_doctor_lists_every_protection(tmp_path):
    run = latchwatch("doctor", cwd=tmp_path)
    assert run.returncode == 0 and "Traceback" not in run.stderr
    from latchwatch.server.sandbox.policy import PROTECTIONS

    listed = [line.split()[2] if line.startswith("  in force") else line.split()[1]
              for line in run.stdout.splitlines() if line.startswith(("  in force", "  unavailable"))]
    assert listed == [name for name, _title in PROTECTIONS]
