"""Real open-PDK cells through `latchwatch check`: gf180mcu's gdsfactory transistors, as a script
and as the GDS file that script writes, and the gdsfactory example of examples/gdsfactory/.

They need a Python environment with the PDK package: gf180mcu 0.5.0 from PyPI, which pins
its own gdsfactory (~9.39) and brings no gdstk. `.ci/run` builds it as `.venv-pdk` in the
checkout (latchwatch installed into it too) and names its interpreter in
LATCHWATCH_PDK_PYTHON; without one of the two these tests skip, saying so. Build it by hand:

    python3 -m venv .venv-pdk && .venv-pdk/bin/pip install gf180mcu==0.5.0 && .venv-pdk/bin/pip install --no-deps -e .

Expected figures are worked out by hand from the cell code of gf180mcu 0.5.0
(gf180mcu/cells/fet.py, `nfet` with its defaults: l_gate 0.28, w_gate 0.22, one
contact column, grw 0.22, comp_spacing 0.28 at 3.3 V), as derived beside each check.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from environments import check, framework_python, latchwatch_here, line_of
from locations import ROOT

PDK_PYTHON_VARIABLE = "LATCHWATCH_PDK_PYTHON"
PDK_PYTHON, SKIP_REASON = framework_python(PDK_PYTHON_VARIABLE, ".venv-pdk",
                                           "import gf180mcu, gdsfactory; print(gdsfactory.__version__)")
pytestmark = pytest.mark.skipif(SKIP_REASON is not None, reason=SKIP_REASON or "")

# A user script: the PDK's NMOS in its own guard ring, and the same NMOS without a bulk tie
# placed 60 um from that ring (the nearest tap), in the gf180mcu technology.
PAIR = '''"""Two gf180mcu NMOS transistors: one in the PDK's own guard ring, one without any bulk tie."""
import gdsfactory as gf
import gf180mcu  # noqa: F401  (importing it activates the PDK)
from gf180mcu.cells import nfet

top = gf.Component("PAIR")
ringed = top << nfet(bulk="Guard Ring")
bare = top << nfet(bulk="None")
bare.move((61.8, 0.0))
top.write_gds("pair.gds")
'''

# Hand, from fet.py: the diffusion is the channel strip x 0..0.42 (l_gate + 2 * 0.07),
# y 0..0.22 and two 0.36 um square contact pads (0.22 + 2 * 0.07) beside it, centred on
# it: x -0.36..0.78, y -0.07..0.29. The guard ring (bulk_gr_gen) surrounds the cell's
# box (x -0.52..0.94 from the N+ implant's 0.16 enclosure, y -0.58..0.80 from the poly
# contact pads) at comp_spacing 0.28, grw 0.22 wide: inner edge x -0.80..1.22,
# y -0.86..1.08; outer edge x -1.02..1.44, y -1.08..1.30.
# The channel centre (0.21, 0.11) to the ring's inner edge: min(0.11 + 0.86, 1.08 - 0.11, 0.21 + 0.80, 1.22 - 0.21).
RINGED_TAP_UM = 0.97
BARE_NEAR_EDGE_UM = 60.0  # moved by 61.8: diffusion x 61.44..62.58, its left edge 61.44 - 1.44 from the ring
BARE_TAP_UM = 61.14  # its right edge 62.58 - 1.44; the diffusion's y span lies inside the ring's, so straight across
LIMIT_UM = 20.0  # gf180mcu.toml [rules.tap-distance] limit_n: DF.14 (3.3 V), substrate tap to N+ outside Nwell


@pytest.fixture(scope="module")
def pair_folder(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("pdk")
    (folder / "pair.py").write_text(PAIR, encoding="utf-8")
    return folder


def assert_bare_transistor_fails(report: dict, script_line: int | None) -> None:
    [finding] = report["findings"]
    assert (finding["rule"], finding["severity"]) == ("tap-distance", "error")
    assert finding["value"] == pytest.approx(BARE_TAP_UM, abs=2e-3)
    assert finding["limit"] == LIMIT_UM
    assert finding["bbox"][0] - 1.44 == pytest.approx(BARE_NEAR_EDGE_UM, abs=1e-6)
    assert finding["location"][0] == pytest.approx(62.58, abs=1e-6)
    assert finding["line"] == script_line
    assert finding["cell"] == "PAIR"
    # The ringed transistor passes: its diffusion lies 0.97 um inside its ring.
    devices = sorted(report["devices"], key=lambda d: d["tap_distance_um"])
    assert [d["kind"] for d in devices] == ["ndiff", "ndiff"]
    assert [d["tap_distance_um"] for d in devices] == pytest.approx([RINGED_TAP_UM, BARE_TAP_UM], abs=2e-3)


def test_a_guarded_pdk_transistor_passes_and_the_bare_one_fails_at_the_users_line(pair_folder):
    # --top: the guard-ring generator leaves an unplaced helper cell ("temp_store") in the
    # library; the layout the script made is PAIR.
    report = check([latchwatch_here()], pair_folder, "--tech", "gf180mcu", "--python", PDK_PYTHON, "--top", "PAIR",
                   "pair.py")
    assert report["runs"][0]["status"] == "ok"
    assert_bare_transistor_fails(report, line_of(PAIR, 'bare = top << nfet(bulk="None")'))
    [finding] = report["findings"]
    # The PDK drew the transistor's shapes (cached cells it shares with the ringed one);
    # the user's frames are the call that asked for this transistor.
    assert [(f["file"], f["line"]) for f in finding["stack"]] == [("pair.py", finding["line"])]
    # Placements: the transistor in PAIR, placed by that line with ``<<`` and moved
    # (the move keeps the insert's line), then the PDK's own cells inside it.
    outer = finding["placements"][0]
    assert (outer["file"], outer["line"], outer["cell"]) == ("pair.py", finding["line"], "PAIR")
    assert "BNone" in outer["instance"]
    # The nearest tap is the ring, on the line of the ringed transistor, at its outer edge x = 1.44.
    ring = [r for r in finding["related"] if r.get("location")]
    assert [r["line"] for r in ring] == [line_of(PAIR, 'ringed = top << nfet(bulk="Guard Ring")')]
    assert ring[0]["location"][0] == pytest.approx(1.44, abs=1e-6)


def test_latchwatch_installed_into_the_pdk_environment_gives_the_same_finding(pair_folder):
    installed = Path(PDK_PYTHON).with_name("latchwatch")
    if not installed.exists():
        pytest.skip(f"latchwatch is not installed beside {PDK_PYTHON}")
    report = check([str(installed)], pair_folder, "--tech", "gf180mcu", "--top", "PAIR", "pair.py")
    assert_bare_transistor_fails(report, line_of(PAIR, 'bare = top << nfet(bulk="None")'))


@pytest.mark.parametrize("reader", ["gdstk", "klayout"])
def test_the_gds_written_by_the_pdk_environment(pair_folder, reader):
    """The file the script writes, written by gdsfactory (KLayout), read by gdstk (latchwatch's own
    environment) and by KLayout (the PDK environment, which has no gdstk)."""
    if not (pair_folder / "pair.gds").exists():
        subprocess.run([PDK_PYTHON, "pair.py"], cwd=pair_folder, check=True, capture_output=True, timeout=300)
    python = ["--python", PDK_PYTHON] if reader == "klayout" else []
    report = check([latchwatch_here()], pair_folder, "--tech", "gf180mcu", *python, "pair.gds")
    assert report["runs"][0]["status"] == "ok"
    assert_bare_transistor_fails(report, None)
    assert report["findings"][0]["file"] == "pair.gds"


def test_pdk_bug_the_bulk_tie_variant_raises(tmp_path):
    """gf180mcu 0.5.0 bug: nfet(bulk="Bulk Tie") fails under the gdsfactory it pins: the
    P+ implant of the tie is joined to the N+ implant with ports of different widths
    (fet.py, psdm.connect("e1", nsdm.ports["e3"])). latchwatch reports it as the
    script's error, on the user's call."""
    script = PAIR.replace('bulk="None"', 'bulk="Bulk Tie"')
    (tmp_path / "tie.py").write_text(script, encoding="utf-8")
    report = check([latchwatch_here()], tmp_path, "--tech", "gf180mcu", "--python", PDK_PYTHON, "tie.py")
    [finding] = report["findings"]
    assert finding["rule"] == "script-error"
    assert finding["line"] == line_of(script, 'bare = top << nfet(bulk="Bulk Tie")')
    assert "PortWidthMismatchError" in finding["message"]


def test_pdk_bug_the_transistor_cells_draw_no_metal1():
    """gf180mcu 0.5.0 bug: via_stack (cells/via_generator.py) draws the metal over its
    contacts on its base layer (COMP, Poly2) instead of Metal1, and the guard ring's
    metal (bulk_gr_gen's boolean of two COMP rectangles, taken on Metal1) comes out
    empty: neither the terminals nor the ring are on Metal1 (34/0), so no label on
    Metal1 can reach them and the tap-supply rule has no net to judge."""
    probe = '''
import gf180mcu  # noqa: F401
import klayout.db as kdb
from gf180mcu.cells import nfet
for bulk in ("Guard Ring", "None"):
    c = nfet(bulk=bulk)
    count = lambda layer: sum(1 for _ in kdb.Region(c.kdb_cell.begin_shapes_rec(c.kcl.layer(*layer))).each())
    print(bulk, count((34, 0)), count((33, 0)))
'''
    out = subprocess.run([PDK_PYTHON, "-c", probe], capture_output=True, text=True, timeout=300, check=True).stdout
    # Contacts: the ring's 4 sides (3 + 3 + 3 + 3) and the transistor's 4 (2 S/D, 2 gate).
    assert out.split("\n")[:2] == ["Guard Ring 0 16", "None 0 4"]


def test_the_gdsfactory_example(tmp_path):
    name = "excitation_switches.py"
    text = (ROOT / "examples" / "gdsfactory" / name).read_text(encoding="utf-8")
    report = check([latchwatch_here()], ROOT, "--tech", "demo", "--python", PDK_PYTHON, f"examples/gdsfactory/{name}")
    [finding] = report["findings"]
    file = f"examples/gdsfactory/{name}"
    assert (finding["rule"], finding["file"]) == ("tap-distance", file)
    assert [(f["line"], f["function"]) for f in finding["stack"]] == [
        (line_of(text, "rect(c, ACTIVE, 0.0, 0.0, 3.0, w)  # switch diffusion"), "pmos_switch"),
        (line_of(text, "fingers = c.add_ref(pmos_switch(), columns=count"), "switch_bank"),
        (line_of(text, "bank = switch_bank()"), "<module>"),
    ]
    assert finding["line"] == finding["stack"][0]["line"]
    # Groups 2 + 8 * 4 = 34 wide; the second starts at x0 = 36 with its tap at 34.25..35.75;
    # its sixth switch (array column 5) spans x 56..59: 59 - 35.75 = 23.25 um (demo limit 20).
    assert finding["value"] == pytest.approx(23.25, abs=2e-3) and finding["limit"] == 20.0
    assert finding["bbox"] == pytest.approx([56.0, 0.0, 59.0, 4.0], abs=1e-6)
    [placement] = finding["placements"]
    # The second group's array, moved into place after its add_ref: the add_ref's line.
    assert placement["line"] == line_of(text, "fingers = c.add_ref(pmos_switch(), columns=count")
    assert placement["instance"].endswith("[5,0]")
    [tap] = finding["related"]
    assert tap["line"] == line_of(text, "c << gf.components.rectangle(size=(1.5, h), layer=ACTIVE)")
    assert tap["location"] == pytest.approx([35.75, 4.0], abs=1e-3)


# A plain kfactory script (kfactory comes with the PDK's gdsfactory), no gdsfactory: a helper
# draws a 2 um P+ device, an instance array places six of it at a 10 um pitch in one n-well
# whose only contacted n-tap sits at the left end (demo technology, limit 20 um, invented).
KFACTORY_ROW = '''"""A kfactory row: P+ devices as an array in one n-well, one n-tap at its left end."""
import kfactory as kf

kcl = kf.kcl
NWELL, ACTIVE, NPLUS, PPLUS, CONTACT = (kcl.layer(1, 0), kcl.layer(2, 0), kcl.layer(4, 0), kcl.layer(5, 0),
                                        kcl.layer(6, 0))


def box(cell, layer, x0, y0, x1, y1):
    cell.shapes(layer).insert(kf.kdb.DBox(x0, y0, x1, y1))


def p_device():
    cell = kcl.kcell("PDEV")
    box(cell, PPLUS, 0, 0, 2, 2)
    box(cell, ACTIVE, 0, 0, 2, 2)  # the P+ device
    return cell


top = kcl.kcell("ROW")
box(top, NWELL, -6, -3, 70, 5)
box(top, NPLUS, -4, 0, -2, 2)
box(top, ACTIVE, -4, 0, -2, 2)
box(top, CONTACT, -3.2, 0.8, -2.8, 1.2)
row = top.create_inst(p_device(), a=kf.kdb.Vector(10000, 0), b=kf.kdb.Vector(0, 10000), na=6, nb=1)
top.write("kf_row.gds")
'''


def test_a_kfactory_script_with_a_helper_and_an_array(tmp_path):
    # Hand: member k spans x 10k..10k+2; its far edge is 10k + 2 - (-2) = 10k + 4 from the
    # tap's edge: 4, 14, 24, 34, 44, 54 um, so members 2-5 fail at 20 um. Each finding is on
    # the helper's line that drew the active, with the module line that called it and the
    # array member as the placement.
    (tmp_path / "kf_row.py").write_text(KFACTORY_ROW)
    result = subprocess.run([sys.executable, "-m", "latchwatch", "check", "--tech", "demo", "--python", PDK_PYTHON,
                             "--timeout", "120", "--format", "json", "kf_row.py"],
                            cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert result.returncode == 1, result.stderr
    report = json.loads(result.stdout)
    lines = KFACTORY_ROW.splitlines()
    drew = lines.index("    box(cell, ACTIVE, 0, 0, 2, 2)  # the P+ device") + 1
    placed = next(i for i, line in enumerate(lines, 1) if line.startswith("row = top.create_inst("))
    found = sorted(report["findings"], key=lambda f: f["value"])
    assert [f["value"] for f in found] == [24.0, 34.0, 44.0, 54.0]
    assert {f["line"] for f in found} == {drew}
    assert [p["instance"] for f in found for p in f["placements"]] == ["PDEV[2,0]", "PDEV[3,0]", "PDEV[4,0]",
                                                                        "PDEV[5,0]"]
    assert {p["line"] for f in found for p in f["placements"]} == {placed}
    assert report["runs"][0]["tops"][0]["cell"] == "ROW"
