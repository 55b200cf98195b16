"""Layouts drawn the way PDK cells and layout tools draw them, through `latchwatch check`:
rings as keyhole polygons (gdstk.boolean), one diffusion drawn in several shapes.
Expected figures are worked out by hand from the geometry in each script."""

from __future__ import annotations

import json
import subprocess
import sys

PRELUDE = '''import gdstk
NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0)
lib = gdstk.Library()
cell = lib.new_cell("TOP")


def box(layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def polygons(shapes, *layers):
    for layer in layers:
        for shape in shapes:
            cell.add(gdstk.Polygon(shape.points, layer=layer[0], datatype=layer[1]))
'''

# A 40 um n-tap ring, 2 um wide, made by gdstk.boolean (one keyhole polygon), contacted
# along its bottom side, round a 4 um P+ device at the centre of a 44 um n-well.
KEYHOLE_RING = PRELUDE + '''
box(NWELL, -2, -2, 42, 42)
ring = gdstk.boolean(gdstk.rectangle((0, 0), (40, 40)), gdstk.rectangle((2, 2), (38, 38)), "not")
polygons(ring, ACTIVE, NPLUS)
for x in range(1, 40, 4):
    box(CONTACT, x - 0.2, 0.8, x + 0.2, 1.2)
box(PPLUS, 18, 18, 22, 22)
box(ACTIVE, 18, 18, 22, 22)
'''

# The same ring drawn as two contacted halves, and as four abutting sides.
HALVES_RING = KEYHOLE_RING.replace(
    'ring = gdstk.boolean(gdstk.rectangle((0, 0), (40, 40)), gdstk.rectangle((2, 2), (38, 38)), "not")',
    'ring = gdstk.boolean(gdstk.rectangle((0, 0), (40, 40)), gdstk.rectangle((2, 2), (38, 38)), "not")\n'
    'ring = [*gdstk.boolean(ring, gdstk.rectangle((-1, -1), (20, 41)), "and"),\n'
    '        *gdstk.boolean(ring, gdstk.rectangle((20, -1), (41, 41)), "and")]\n'
    'box(CONTACT, 19.8, 38.8, 20.2, 39.2)  # a contact on the upper half too')

# An n-tap strip drawn as two abutting rectangles with one contact at its far left, and a
# P+ transistor diffusion drawn as five abutting pieces 4 um above the strip's right half.
PIECES = PRELUDE + '''
box(NWELL, -2, -2, 42, 12)
box(NPLUS, 0, 0, 20, 2)
box(ACTIVE, 0, 0, 20, 2)
box(NPLUS, 20, 0, 40, 2)
box(ACTIVE, 20, 0, 40, 2)
box(CONTACT, 0.8, 0.8, 1.2, 1.2)
for k in range(5):
    box(PPLUS, 30 + 2 * k, 6, 32 + 2 * k, 10)
    box(ACTIVE, 30 + 2 * k, 6, 32 + 2 * k, 10)
box(POLY, 32.5, 5, 33.5, 11)
'''


def check(tmp_path, name, script):
    path = tmp_path / f"{name}.py"
    path.write_text(script)
    result = subprocess.run([sys.executable, "-m", "latchwatch", "check", "--tech", "demo", "--devices",
                             "--format", "json", path.name], cwd=tmp_path, capture_output=True, text=True,
                            timeout=120)
    assert result.returncode in (0, 1), result.stderr
    return json.loads(result.stdout)


def test_a_keyhole_ring_from_gdstk_boolean_is_a_closed_contacted_ring(tmp_path):
    report = check(tmp_path, "keyhole", KEYHOLE_RING)
    assert report["findings"] == []  # no invalid-geometry, no lost ring
    (device,) = report["devices"]
    # Hand: the device's farthest point from the ring is its centre (20, 20), 18 um from
    # the ring's inner edge at x = 2 (and y = 2, x = 38, y = 38).
    assert device["tap_distance_um"] == 18.0
    assert device["shunt_ohm"] is not None and device["shunt_ohm"] > 0


def test_a_ring_drawn_in_halves_is_the_same_ring(tmp_path):
    whole = check(tmp_path, "whole", KEYHOLE_RING)["devices"][0]
    halves_report = check(tmp_path, "halves", HALVES_RING)
    assert halves_report["findings"] == []
    halves = halves_report["devices"][0]
    assert halves["tap_distance_um"] == whole["tap_distance_um"]
    # The one extra contact adds no conductor: the ring is one tap either way.
    assert abs(halves["shunt_ohm"] - whole["shunt_ohm"]) <= 1e-6 * whole["shunt_ohm"]


def test_a_tap_and_a_device_drawn_in_pieces_are_one_tap_and_one_device(tmp_path):
    report = check(tmp_path, "pieces", PIECES)
    assert report["findings"] == []  # the strip's right half is not an uncontacted tap
    (device,) = report["devices"]
    # Hand: the device spans x 30..40, y 6..10; the strip (y 0..2) runs under all of it,
    # so its farthest point is on its top edge, 10 - 2 = 8 um from the strip.
    assert device["bbox"] == [30.0, 6.0, 40.0, 10.0]
    assert device["tap_distance_um"] == 8.0


ANNULUS = PRELUDE + '''
R1, R2 = 2.0, {r2}
box(NWELL, -R2 - 6, -R2 - 6, R2 + 6, R2 + 6)
polygons([gdstk.ellipse((0, 0), R2 + 2, inner_radius=R2, tolerance=1e-3)], ACTIVE, NPLUS)
polygons([gdstk.ellipse((0, 0), R1, tolerance=1e-3)], ACTIVE, PPLUS)
box(CONTACT, R2 + 0.8, -0.2, R2 + 1.2, 0.2)
'''


def test_the_annulus_end_to_end_matches_the_analytic_resistance(tmp_path):
    import math

    for r2 in (20.0, 80.0):  # r2 / r1 = 10 and 40
        report = check(tmp_path, f"annulus_{int(r2)}", ANNULUS.format(r2=r2))
        (device,) = report["devices"]
        # Analytic: R = Rs / (2 pi) ln(r2 / r1), Rs = 1000 ohm/sq (the demo's n-well sheet).
        analytic = 1000.0 / (2 * math.pi) * math.log(r2 / 2.0)
        assert abs(device["shunt_ohm"] / analytic - 1) <= 0.02, (r2, device["shunt_ohm"], analytic)


# SG13G2 drawn as the PDK's gdsfactory cells draw it (PyPI ihp-gdsfactory 2.0.0,
# ihp/cells/fet_transistors.py and passives.py): the nmos is Activ and GatPoly with no
# nSD, the pmos has pSD over its Activ inside NWell, the n-tap draws nSD, the p-tap pSD.
# Layers: SG13G2_os_layout_rules.pdf Rev 0.4, layer table.
SG13G2 = '''import gdstk
ACTIV, GATPOLY, CONT, NSD, PSD, NWELL = (1, 0), (5, 0), (6, 0), (7, 0), (14, 0), (31, 0)
lib = gdstk.Library()
cell = lib.new_cell("INV")


def box(layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def nmos(x, y):
    box(ACTIV, x, y, x + 2, y + 1)  # no nSD: N+ is Activ outside pSD
    box(GATPOLY, x + 0.9, y - 0.2, x + 1.1, y + 1.2)


box(NWELL, -1, 3, 4, 7)
box(PSD, -0.2, 4.8, 2.2, 6.2)
box(ACTIV, 0, 5, 2, 6)                  # pmos
box(GATPOLY, 0.9, 4.8, 1.1, 6.2)
box(NSD, 2.8, 4.8, 3.7, 6.2)
box(ACTIV, 3, 5, 3.5, 6)                # n-tap beside it
box(CONT, 3.1, 5.3, 3.4, 5.6)
box(PSD, 2.8, -0.2, 3.7, 1.2)
box(ACTIV, 3, 0, 3.5, 1)                # p-tap beside the nmos
box(CONT, 3.1, 0.3, 3.4, 0.6)
nmos({nmos_x}, 0)
'''


def sg13g2(tmp_path, name, nmos_x):
    path = tmp_path / f"{name}.py"
    path.write_text(SG13G2.format(nmos_x=nmos_x))
    result = subprocess.run([sys.executable, "-m", "latchwatch", "check", "--tech", "sg13g2", "--format", "json",
                             path.name], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert result.returncode in (0, 1), result.stderr
    return json.loads(result.stdout)["findings"]


def test_an_sg13g2_inverter_drawn_as_the_pdk_draws_it_has_no_findings(tmp_path):
    assert sg13g2(tmp_path, "inverter", 0) == []


def test_an_sg13g2_nmos_beyond_lu_b_from_its_tie_fails_at_the_line_that_drew_it(tmp_path):
    # The nmos from x = -25 to -23: its far edge is 3 - (-25) = 28 um from the p-tap's left
    # edge at x = 3, beyond LU.b (20.00 um, SG13G2_os_layout_rules.pdf Rev 0.4).
    (finding,) = sg13g2(tmp_path, "far_nmos", -25)
    assert finding["rule"] == "tap-distance" and finding["limit"] == 20.0
    assert finding["value"] == 28.0
    assert finding["line"] == SG13G2.splitlines().index('    box(ACTIV, x, y, x + 2, y + 1)  # no nSD: N+ is Activ outside pSD') + 1


# One P+ diffusion drawn by two lines (a PDK cell's source/drain and channel pieces), far
# from its tap: one finding, on the line that drew most of it, the other line related.
TWO_LINES = PRELUDE + '''
box(NWELL, -4, -2, 60, 8)
box(NPLUS, -3, 0, -1, 4)
box(ACTIVE, -3, 0, -1, 4)
box(CONTACT, -2.2, 1.8, -1.8, 2.2)
box(PPLUS, 40, 0, 56, 4)
box(ACTIVE, 40, 0, 50, 4)   # the larger piece
box(ACTIVE, 50, 0, 56, 4)   # the piece beyond it
'''


def test_a_diffusion_drawn_by_two_lines_is_one_finding_with_the_other_line_related(tmp_path):
    report = check(tmp_path, "two_lines", TWO_LINES)
    lines = TWO_LINES.splitlines()
    larger = lines.index("box(ACTIVE, 40, 0, 50, 4)   # the larger piece") + 1
    beyond = lines.index("box(ACTIVE, 50, 0, 56, 4)   # the piece beyond it") + 1
    (finding,) = [f for f in report["findings"] if f["rule"] == "tap-distance"]
    assert finding["line"] == larger
    assert finding["value"] == 57.0  # hand: the far edge x = 56 to the tap's edge x = -1
    assert [(r["line"], r["message"]) for r in finding["related"] if r["line"] == beyond] == [
        (beyond, "also drawn here (the same diffusion)")]


# GF180MCU LU.4 (gf180mcu-pdk design manual section 14.3, tables_clear/55_Latch-up_152.csv):
# the limit for P+ in an n-well follows the smallest n-well to N+ spacing within 50 um of
# the P+, not the P+'s own distance to its well edge. Layers: DM 06_Drawn_layer10.csv.
GF180 = '''import gdstk
COMP, NWELL, PPLUS, NPLUS, CONTACT = (22, 0), (21, 0), (31, 0), (32, 0), (33, 0)
lib = gdstk.Library()
cell = lib.new_cell("TOP")


def box(layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def tap(implant, x0, x1):
    box(COMP, x0, 0, x1, 2)
    box(implant, x0, 0, x1, 2)
    box(CONTACT, (x0 + x1) / 2 - 0.2, 0.8, (x0 + x1) / 2 + 0.2, 1.2)


edge = {edge}
box(NWELL, -80, -20, edge, 22)
box(PPLUS, 0, 0, 2, 2)
box(COMP, 0, 0, 2, 2)           # the P+ device
tap(NPLUS, -{gap} - 1, -{gap})  # its n-tap; the P+ right edge is {gap} + 2 from it
if {nplus}:
    box(NPLUS, edge + 0.5, 0, edge + 2.5, 2)
    box(COMP, edge + 0.5, 0, edge + 2.5, 2)  # N+ 0.5 um outside the well
    tap(PPLUS, edge + 2.5, edge + 3.5)
'''


def gf180(tmp_path, name, **values):
    path = tmp_path / f"{name}.py"
    path.write_text(GF180.format(**values))
    result = subprocess.run([sys.executable, "-m", "latchwatch", "check", "--tech", "gf180mcu", "--format", "json",
                             path.name], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert result.returncode in (0, 1), result.stderr
    return [f for f in json.loads(result.stdout)["findings"] if f["rule"] == "tap-distance"]


def test_gf180_pplus_near_its_well_edge_with_no_nplus_nearby_is_held_to_df13(tmp_path):
    # P+ 0.5 um from its well edge, 19.5 um from its tap, no N+ within 50 um: DF.13's 20 um
    # (14_COMP33_1.csv, 3.3 V) applies, so it passes.
    assert gf180(tmp_path, "edge", edge=2.5, gap=17.5, nplus=False) == []


def test_gf180_pplus_inside_its_well_with_nplus_just_outside_gets_15_um(tmp_path):
    # P+ 3 um inside the well, N+ 0.5 um outside it: y < 1.0, LU.4 c) LV 15 um. At 19.03 um
    # from its tap it fails, on the line that drew it.
    (finding,) = gf180(tmp_path, "inside", edge=5.0, gap=17.03, nplus=True)
    assert finding["limit"] == 15.0 and finding["value"] == 19.03
    assert finding["line"] == GF180.splitlines().index("box(COMP, 0, 0, 2, 2)           # the P+ device") + 1
