"""Tap-distance limits that depend on where a diffusion lies: near a pad-connected
diffusion of the other type (GF180MCU IO.1(b), IO.3(b)) and inside a marked
low-tap-density area (SKY130 areaid.ld), each checked at the published value."""

import pytest

from latchwatch.analyzers.check import check_outcome
from latchwatch.analyzers.context import CheckOptions
from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.server.config.techfiles import load_technology

from builders import CellBuilder, layout, outcome

# GF180MCU drawn layers (design manual, tables_clear/06_Drawn_layer10.csv) and its
# Latchup_MK marker of pad-connected diffusion (DM 14.3, IO rules).
COMP, NWELL, PPLUS, NPLUS, CONTACT, LATCHUP_MK = (22, 0), (21, 0), (31, 0), (32, 0), (33, 0), (137, 5)
# SKY130 layers (skywater-pdk docs/rules gds_layers.csv).
DIFF, TAP, NSDM, PSDM, LICON1, AREAID_SF, AREAID_LD = (65, 20), (65, 44), (93, 44), (94, 20), (66, 44), (81, 6), (81, 14)


def findings(cell, tech, kind):
    found = check_outcome(outcome(layout(cell)), tech, CheckOptions(), rules=(RULES_BY_ID["tap-distance"],)).findings
    return [f for f in found if f.device_kind == kind]


@pytest.fixture(scope="module")
def gf180():
    return load_technology("gf180mcu")


@pytest.fixture(scope="module")
def sky130():
    return load_technology("sky130")


def gf_tap(c, x0, x1, y0, y1, implant):
    """A contacted GF180MCU tap (COMP, its implant, one contact in the middle)."""
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    return c.rect(COMP, x0, y0, x1, y1).rect(implant, x0, y0, x1, y1).rect(CONTACT, cx - 0.2, cy - 0.2, cx + 0.2, cy + 0.2)


def pmos_beside_a_pad_nplus(distance_to_pad, tap_gap):
    """A pad-connected N+ (0, 0)-(4, 4) under Latchup_MK with its own p-tap, an n-well
    from x = 8, and a P+ 1 um wide ``distance_to_pad`` um to the right of the pad N+ with
    a contacted n-tap ``tap_gap`` beyond it: the P+'s farthest point is 1 + tap_gap from
    the tap. The pad N+ is 4 um from the well, so the spacing table gives 20 um."""
    c = CellBuilder("T").rect(COMP, 0, 0, 4, 4).rect(NPLUS, 0, 0, 4, 4).rect(LATCHUP_MK, 0, 0, 4, 4)
    gf_tap(c, -2, -1, 0, 4, PPLUS)
    c.rect(NWELL, 8, -20, 80, 24)
    x = 4 + distance_to_pad
    c.rect(COMP, x, 0, x + 1, 2).rect(PPLUS, x, 0, x + 1, 2)
    gf_tap(c, x + 1 + tap_gap, x + 2 + tap_gap, 0, 2, NPLUS)
    return c


@pytest.mark.parametrize("tap_gap, fails", [(0.9, False), (2.0, True)])
def test_io1b_pplus_within_15_um_of_pad_nplus_is_held_to_2_um(gf180, tap_gap, fails):
    # DM 56_IO_Latch-up1_156.csv, IO.1(b): within 15 um of N+ connected to a pad, the
    # n-well tap is at most 2 um from P+ in the n-well. The P+ here is 6 um from the pad N+.
    found = findings(pmos_beside_a_pad_nplus(6.0, tap_gap), gf180, "pdiff")
    if not fails:
        assert found == []
        return
    [f] = found
    assert f.limit == 2.0 and f.value == pytest.approx(3.0, abs=2e-3)
    assert f.figures["limit_basis"] == "near_pad"
    assert "within 15.00 um of pad-connected N+" in f.message


def test_io1b_does_not_reach_beyond_15_um(gf180):
    # The same P+ and tap 30 um from the pad N+: the LU.4 / DF.13 limit (20 um) applies.
    assert findings(pmos_beside_a_pad_nplus(30.0, 2.0), gf180, "pdiff") == []


def nmos_beside_a_pad_pplus(distance_to_pad, tap_gap):
    """A pad-connected P+ (8, 8)-(12, 12) under Latchup_MK in an n-well (0, 0)-(20, 20)
    with its n-tap, and an N+ 1 um wide outside the well ``distance_to_pad`` um right of
    the pad P+, with a contacted p-tap ``tap_gap`` beyond it."""
    c = CellBuilder("T").rect(NWELL, 0, 0, 20, 20)
    c.rect(COMP, 8, 8, 12, 12).rect(PPLUS, 8, 8, 12, 12).rect(LATCHUP_MK, 8, 8, 12, 12)
    gf_tap(c, 2, 3, 8, 12, NPLUS)
    x = 12 + distance_to_pad
    c.rect(COMP, x, 8, x + 1, 10).rect(NPLUS, x, 8, x + 1, 10)
    gf_tap(c, x + 1 + tap_gap, x + 2 + tap_gap, 8, 10, PPLUS)
    return c


@pytest.mark.parametrize("tap_gap, fails", [(3.9, False), (5.0, True)])
def test_io3b_nplus_within_10_um_of_pad_pplus_is_held_to_5_um(gf180, tap_gap, fails):
    # DM 56_IO_Latch-up2_158.csv, IO.3(b): within 10 um of P+ connected to a pad, the
    # substrate tap is at most 5 um from N+ outside the n-well. The N+ is 9 um from it.
    found = findings(nmos_beside_a_pad_pplus(9.0, tap_gap), gf180, "ndiff")
    if not fails:
        assert found == []
        return
    [f] = found
    assert f.limit == 5.0 and f.value == pytest.approx(6.0, abs=2e-3)
    assert "within 10.00 um of pad-connected P+" in f.message


def test_io3b_does_not_reach_beyond_10_um(gf180):
    # 18 um from the pad P+, 10 um from the well: the plain DF.14 limit (20 um).
    assert findings(nmos_beside_a_pad_pplus(18.0, 5.0), gf180, "ndiff") == []


def sky_nmos(tap_distance, marked, pad_at=None):
    """A SKY130 N+ (diff and nsdm) 2 um wide with a contacted p-tap (tap and psdm) whose
    near edge is ``tap_distance`` - 2 from it, so the farthest point is ``tap_distance``;
    optionally under areaid.ld, and with a pad-marked N+ (areaid.sf) ``pad_at`` um left."""
    c = CellBuilder("T").rect(DIFF, 0, 0, 2, 2).rect(NSDM, 0, 0, 2, 2)
    x = 2 + tap_distance - 2
    c.rect(TAP, x, 0, x + 1, 2).rect(PSDM, x, 0, x + 1, 2).rect(LICON1, x + 0.3, 0.8, x + 0.6, 1.1)
    if marked:
        c.rect(AREAID_LD, -5, -5, x + 5, 7)
    if pad_at is not None:
        p = -pad_at - 2
        c.rect(DIFF, p, 0, p + 2, 2).rect(NSDM, p, 0, p + 2, 2).rect(AREAID_SF, p, 0, p + 2, 2)
        c.rect(TAP, p - 2, 0, p - 1, 2).rect(PSDM, p - 2, 0, p - 1, 2).rect(LICON1, p - 1.7, 0.8, p - 1.4, 1.1)
    return c


def test_sky130_unmarked_diffusion_is_held_to_6_um(sky130):
    # skywater-pdk docs/rules, table-c4b (areaid.ld description): 6 um tap to diffusion.
    assert findings(sky_nmos(6.0, marked=False), sky130, "ndiff") == []
    [f] = findings(sky_nmos(10.0, marked=False), sky130, "ndiff")
    assert f.limit == 6.0 and f.figures["limit_basis"] == "plain"


def test_sky130_low_tap_density_area_relaxes_to_15_um(sky130):
    # gds_layers.csv: areaid.ld 81:14 "Low tap density (15um between taps) area".
    assert findings(sky_nmos(10.0, marked=True), sky130, "ndiff") == []
    [f] = findings(sky_nmos(16.0, marked=True), sky130, "ndiff")
    assert f.limit == 15.0 and f.figures["limit_basis"] == "relaxed"
    assert "in the low-tap-density area" in f.message


def test_sky130_low_tap_density_area_near_a_pad_keeps_6_um(sky130):
    # table-c4b: the relaxation requires >50 um from sigPadDiff (areaid.sf 81:6); a pad
    # diffusion 30 um away keeps the marked N+ at 6 um. 60 um away it is relaxed again.
    [f] = findings(sky_nmos(10.0, marked=True, pad_at=30.0), sky130, "ndiff")
    assert f.limit == 6.0
    assert findings(sky_nmos(10.0, marked=True, pad_at=60.0), sky130, "ndiff") == []


def sky_ntap_with_li1_label(text, texttype):
    """A SKY130 n-tap (tap and nsdm in nwell) contacted through licon1 to li1, with a text
    ``text`` on li1's label (67/5) or pin (67/16) purpose over the li1."""
    c = CellBuilder("T").rect((64, 20), -2, -2, 6, 4).rect(TAP, 0, 0, 2, 2).rect(NSDM, 0, 0, 2, 2)
    c.rect(LICON1, 0.8, 0.8, 1.1, 1.1).rect((67, 20), 0.5, 0.5, 1.5, 1.5)
    return c.label(text, (67, texttype), 1.0, 1.0)


@pytest.mark.parametrize("texttype", [5, 16])
def test_sky130_li1_label_and_pin_text_name_the_net(sky130, texttype):
    # gds_layers.csv: li1 label 67/5 and li1 pin 67/16 both carry text. The preset names
    # no supply patterns (the documentation publishes none), so tap-supply reports the
    # n-tap's net by the name it read; a text on a purpose the preset does not read
    # (67/99) names nothing and gives no finding.
    def supply_findings(t):
        cell = sky_ntap_with_li1_label("VDD", t)
        return check_outcome(outcome(layout(cell)), sky130, CheckOptions(), rules=(RULES_BY_ID["tap-supply"],)).findings
    [f] = supply_findings(texttype)
    assert "on net VDD" in f.message
    assert supply_findings(99) == []
