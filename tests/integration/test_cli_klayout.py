"""klayout.db scripts through `latchwatch check`: findings on the user's line, through helpers,
instances and instance arrays, as for gdstk scripts (docs/provenance.md)."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("klayout.db")

# Demo technology (server/config/technologies/demo.toml): nwell 1, active 2, nplus 4,
# pplus 5, contact 6; tap-distance limit 20 um.
PRELUDE = '''import klayout.db as kdb

layout = kdb.Layout()
NWELL, ACTIVE, NPLUS, PPLUS, CONTACT = (layout.layer(n, 0) for n in (1, 2, 4, 5, 6))


def box(cell, layer, x0, y0, x1, y1):
    cell.shapes(layer).insert(kdb.DBox(x0, y0, x1, y1))


def pmos(cell):
    box(cell, PPLUS, 0, 0, 4, 4)
    box(cell, ACTIVE, 0, 0, 4, 4)  # the P+ diffusion


def ntap(cell, x):
    box(cell, NPLUS, x, 0, x + 2, 4)
    box(cell, ACTIVE, x, 0, x + 2, 4)
    box(cell, CONTACT, x + 0.5, 1.5, x + 1.5, 2.5)


top = layout.create_cell("TOP")
'''


def latchwatch(*args, cwd, timeout=120):
    exe = Path(sys.executable).with_name("latchwatch")
    cmd = [str(exe) if exe.exists() else shutil.which("latchwatch"), *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout)


def check(tmp_path, body, name="gen.py"):
    script = tmp_path / name
    script.write_text(PRELUDE + body)
    run = latchwatch("check", "--tech", "demo", "--format", "json", name, cwd=tmp_path)
    assert run.returncode in (0, 1), run.stderr
    report = json.loads(run.stdout)
    assert report["runs"][0]["status"] == "ok", report["runs"]
    return report, (PRELUDE + body).splitlines()


def line_of(lines, text):
    (number,) = [k + 1 for k, line in enumerate(lines) if text in line]
    return number


def test_a_floating_nwell_drawn_directly_is_found_on_its_line(tmp_path):
    report, lines = check(tmp_path, '''\
top.shapes(NWELL).insert(kdb.Box(0, 0, 30000, 10000))   # an n-well without a tap
pmos(top)
''')
    [finding] = [f for f in report["findings"] if f["rule"] == "floating-well"]
    assert finding["line"] == line_of(lines, "an n-well without a tap")
    assert finding["bbox"] == pytest.approx([0, 0, 30, 10], abs=1e-6)


def test_a_far_pmos_drawn_through_a_helper_is_found_on_the_helpers_line(tmp_path):
    report, lines = check(tmp_path, '''\
box(top, NWELL, -5, -5, 40, 10)
ntap(top, -3)
unit = layout.create_cell("UNIT")
pmos(unit)
top.insert(kdb.DCellInstArray(unit.cell_index(), kdb.DTrans(26.0, 0.0)))
''')
    [finding] = report["findings"]
    assert finding["rule"] == "tap-distance"
    # The helper ``box`` draws on every layer: the anchor is its layer-specific caller.
    assert finding["line"] == line_of(lines, "the P+ diffusion")
    assert [(f["function"], f["line"]) for f in finding["stack"]] == [
        ("pmos", finding["line"]), ("<module>", line_of(lines, "pmos(unit)"))]
    # Farthest point x = 26 + 4 = 30 from the tap's right edge at x = -1: 31 um (analytic).
    assert finding["value"] == pytest.approx(31.0, abs=1e-3)
    assert finding["placements"] == [{"file": "gen.py", "line": line_of(lines, "top.insert("),
                                      "cell": "TOP", "instance": "UNIT"}]


def test_an_instance_array_names_the_column_past_the_last_tap(tmp_path):
    report, lines = check(tmp_path, '''\
box(top, NWELL, -5, -5, 60, 10)
ntap(top, -3)
unit = layout.create_cell("UNIT")
pmos(unit)
top.insert(kdb.CellInstArray(unit.cell_index(), kdb.Trans(), kdb.Vector(6000, 0), kdb.Vector(0, 0), 9, 1))
''')
    # Columns at x = 0, 6, ..., 48; a column is too far when its right edge x + 4 is more than
    # 20 um from the tap edge at x = -1: columns 3 (x = 18, 23 um) to 8.
    findings = sorted(report["findings"], key=lambda f: f["value"])
    assert [f["rule"] for f in findings] == ["tap-distance"] * 6
    assert {f["line"] for f in findings} == {line_of(lines, "the P+ diffusion")}
    assert [f["placements"][0]["instance"] for f in findings] == [f"UNIT[{c},0]" for c in range(3, 9)]
    assert {f["placements"][0]["line"] for f in findings} == {line_of(lines, "top.insert(")}
    assert findings[0]["value"] == pytest.approx(23.0, abs=1e-3)


def test_text_output_points_at_the_line_through_pya(tmp_path):
    script = tmp_path / "far.py"
    script.write_text('''import pya
ly = pya.Layout()
top = ly.create_cell("TOP")
top.shapes(ly.layer(1, 0)).insert(pya.DBox(-5, -5, 40, 10))
top.shapes(ly.layer(5, 0)).insert(pya.DBox(0, 0, 30, 4))
top.shapes(ly.layer(2, 0)).insert(pya.DPolygon(pya.DBox(0, 0, 30, 4)))    # P+ diffusion, 30 um long
top.shapes(ly.layer(4, 0)).insert(pya.DBox(-3, 0, -1, 4))
top.shapes(ly.layer(2, 0)).insert(pya.DSimplePolygon(pya.DBox(-3, 0, -1, 4)))
top.shapes(ly.layer(6, 0)).insert(pya.DBox(-2.5, 1.5, -1.5, 2.5))
''')
    run = latchwatch("check", "--tech", "demo", "far.py", cwd=tmp_path)
    assert run.returncode == 1, run.stderr
    # As the gdstk script of test_cli.py: 31 um from the tap edge at x = -1.
    assert run.stdout.splitlines()[0] == (
        "far.py:6:1: error: P+ diffusion is 31.00 um from the nearest n-well tap (limit 20.00 um) [tap-distance]")


def test_an_instance_moved_after_its_insert_keeps_the_insert_line(tmp_path):
    # kfactory's and gdsfactory's ref.move(...), rotate, xmin = ... change the Instance in
    # place, through its trans setters and transform().
    report, lines = check(tmp_path, '''\
box(top, NWELL, -5, -5, 60, 10)
ntap(top, -3)
unit = layout.create_cell("UNIT")
pmos(unit)
placed = top.insert(kdb.CellInstArray(unit.cell_index(), kdb.Trans()))   # the insert
placed.transform(kdb.Trans(kdb.Vector(20000, 0)))
placed.dtrans = kdb.DTrans(placed.dtrans.disp + kdb.DVector(6.0, 0.0))
''')
    [finding] = report["findings"]
    # Moved to x = 26: the farthest point x = 30 is 31 um from the tap edge at x = -1 (analytic).
    assert finding["value"] == pytest.approx(31.0, abs=1e-3)
    assert finding["placements"] == [{"file": "gen.py", "line": line_of(lines, "# the insert"),
                                      "cell": "TOP", "instance": "UNIT"}]
