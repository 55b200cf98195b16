"""The I/O rules on built layouts: io-guard-ring, io-spacing, tap-supply, and the
published GF180MCU I/O values (gf180mcu-pdk design manual, section 14.3)."""

import pytest

from latchwatch.analyzers.check import check_outcome
from latchwatch.analyzers.context import CheckOptions
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.analyzers.technology.model import technology_from_mapping
from latchwatch.server.config.techfiles import load_technology

from builders import ACTIVE, CONTACT, METAL1, NPLUS, NWELL, POLY, PPLUS, CellBuilder, layout, outcome

M1_LABEL, IO_MARKER = (7, 5), (12, 0)
# GF180MCU drawn layers (design manual, tables_clear/06_Drawn_layer10.csv) and the
# pad marker Latchup_MK 137/5 (section 14.3, IO rules).
GF = dict(active=(22, 0), nwell=(21, 0), pplus=(31, 0), nplus=(32, 0), contact=(33, 0), marker=(137, 5))
DEMO = dict(active=ACTIVE, nwell=NWELL, pplus=PPLUS, nplus=NPLUS, contact=CONTACT, marker=IO_MARKER)


@pytest.fixture(scope="module")
def gf180():
    return load_technology("gf180mcu")


@pytest.fixture(scope="module")
def gf180_p_ring_only(gf180):
    """GF180MCU without IO.1's second (Nwell) ring: the P+ ring's own limits alone."""
    data = gf180.to_mapping()
    data["rules"]["io-guard-ring"]["double"] = False
    return technology_from_mapping(data, "gf180mcu, P+ ring only")


@pytest.fixture(scope="module")
def demo():
    return load_technology("demo")


def findings(cell, tech, *rules):
    result = check_outcome(outcome(layout(cell)), tech, CheckOptions(), rules=tuple(RULES_BY_ID[r] for r in rules))
    return result.findings


def ring(cell, L, implant, x0, y0, x1, y1, w, contact=True, skip=()):
    """A square tap ring of width w with outer edge (x0, y0)-(x1, y1); ``skip`` leaves
    sides out ("bottom", "top", "left", "right")."""
    sides = {"bottom": (x0, y0, x1, y0 + w), "top": (x0, y1 - w, x1, y1),
             "left": (x0, y0, x0 + w, y1), "right": (x1 - w, y0, x1, y1)}
    for name, box in sides.items():
        if name not in skip:
            cell.rect(L["active"], *box).rect(L[implant], *box)
    if contact:
        cell.rect(L["contact"], x0 + 0.5, y0 + 0.5, x0 + 0.9, y0 + 0.9)
    return cell


def pad_nmos(L, x0=0.0, y0=0.0, w=10.0, h=4.0):
    """A pad-connected N+ diffusion (marked) of w x h at (x0, y0)."""
    c = CellBuilder("T")
    c.rect(L["active"], x0, y0, x0 + w, y0 + h).rect(L["nplus"], x0, y0, x0 + w, y0 + h)
    c.rect(L["marker"], x0, y0, x0 + w, y0 + h)
    return c


def pad_pmos_in_well(L, space=15.0, w=2.0):
    """A pad-connected P+ diffusion (0, 0)-(10, 4) in an n-well with an N+ ring ``space``
    away and ``w`` wide inside the well."""
    c = CellBuilder("T").rect(L["nwell"], -space - w - 1, -space - w - 1, 10 + space + w + 1, 4 + space + w + 1)
    c.rect(L["active"], 0, 0, 10, 4).rect(L["pplus"], 0, 0, 10, 4).rect(L["marker"], 0, 0, 10, 4)
    return ring(c, L, "nplus", -space - w, -space - w, 10 + space + w, 4 + space + w, w)


# --- GF180MCU IO.1 - IO.4 ----------------------------------------------------------------

def test_gf180_ring_at_15_um_and_2_um_wide_passes(gf180_p_ring_only):
    # GF180MCU design manual, 56_IO_Latch-up1_156.csv IO.1: ring no more than 15 um away;
    # IO.2: ring width >= 2 um. Exactly at both limits: no finding.
    c = ring(pad_nmos(GF), GF, "pplus", -17, -17, 27, 21, 2.0)
    assert findings(c, gf180_p_ring_only, "io-guard-ring") == []


def test_gf180_ring_one_hundredth_too_far_fails(gf180_p_ring_only):
    # GF180MCU IO.1 (56_IO_Latch-up1_156.csv): 15 um; the right side 15.01 um away fails.
    c = ring(pad_nmos(GF), GF, "pplus", -17, -17, 27.01, 21, 2.0)
    [f] = findings(c, gf180_p_ring_only, "io-guard-ring")
    assert f.value == pytest.approx(15.01, abs=1e-3) and f.limit == 15.0
    assert "up to 15.01 um from its P+ guard ring" in f.message
    assert f.location[0] == pytest.approx(10.0)  # on the diffusion's right edge


def test_gf180_ring_one_hundredth_too_narrow_fails(gf180_p_ring_only):
    # GF180MCU IO.2 (56_IO_Latch-up1_156.csv): width >= 2 um; a 1.99 um top side fails.
    c = ring(pad_nmos(GF), GF, "pplus", -17, -17, 27, 21, 2.0, skip=("top",))
    c.rect(GF["active"], -17, 19, 27, 20.99).rect(GF["pplus"], -17, 19, 27, 20.99)
    [f] = findings(c, gf180_p_ring_only, "io-guard-ring")
    assert f.value == pytest.approx(1.99, abs=1e-3) and f.limit == 2.0
    assert "1.99 um wide" in f.message and 19 <= f.location[1] <= 20.99


def nwell_ring(cell, L, x0, y0, x1, y1, w):
    """An N+ tap ring of width w with outer edge (x0, y0)-(x1, y1) in an n-well frame 0.5 um wider all round."""
    for box in ((x0 - 0.5, y0 - 0.5, x1 + 0.5, y0 + w + 0.5), (x0 - 0.5, y1 - w - 0.5, x1 + 0.5, y1 + 0.5),
                (x0 - 0.5, y0 - 0.5, x0 + w + 0.5, y1 + 0.5), (x1 - w - 0.5, y0 - 0.5, x1 + 0.5, y1 + 0.5)):
        cell.rect(L["nwell"], *box)
    return ring(cell, L, "nplus", x0, y0, x1, y1, w)


def test_gf180_pad_nmos_needs_its_nwell_ring_within_15_um(gf180):
    # GF180MCU 56_IO_Latch-up1_156.csv IO.1: N+ tied to a pad surrounded by a substrate tap
    # and an Nwell guard ring no more than 15 um away; IO.2: width >= 2 um. A P+ ring 3 um
    # away, and the Nwell ring's inner edge exactly 15 um away: no finding.
    c = ring(pad_nmos(GF), GF, "pplus", -5, -5, 15, 9, 2.0)
    [f] = findings(c, gf180, "io-guard-ring")
    assert f.message == ("no N+ guard ring surrounds the P+ guard ring of a pad-connected N+ diffusion "
                         "(double rings required)")
    assert findings(nwell_ring(c, GF, -17, -17, 27, 21, 2.0), gf180, "io-guard-ring") == []
    far = nwell_ring(ring(pad_nmos(GF), GF, "pplus", -5, -5, 15, 9, 2.0), GF, -17, -17, 27.01, 21, 2.0)
    [f] = findings(far, gf180, "io-guard-ring")
    assert f.value == pytest.approx(15.01, abs=1e-3) and f.limit == 15.0
    assert "up to 15.01 um from its outer N+ guard ring" in f.message


def test_gf180_pmos_needs_an_nwell_tap_ring(gf180):
    # GF180MCU 56_IO_Latch-up2_158.csv IO.3 / IO.4: the ring of a pad-connected P+ in an
    # n-well within 15 um and >= 2 um wide (here the N+ tap ring inside its well).
    assert findings(pad_pmos_in_well(GF, 15.0, 2.0), gf180, "io-guard-ring") == []
    [f] = findings(pad_pmos_in_well(GF, 15.01, 2.0), gf180, "io-guard-ring")
    assert f.value == pytest.approx(15.01, abs=1e-3)
    [f] = findings(pad_pmos_in_well(GF, 15.0, 1.99), gf180, "io-guard-ring")
    assert f.value == pytest.approx(1.99, abs=1e-3)


# --- what the messages say -------------------------------------------------------------------

def test_open_ring_names_the_gap(demo):
    c = pad_nmos(DEMO)
    ring(c, DEMO, "pplus", -4, -4, 14, 8, 2, skip=("left",))
    c.rect(ACTIVE, -4, -2, -2, 1).rect(PPLUS, -4, -2, -2, 1)   # the left side, with a gap at y = 1..2
    c.rect(ACTIVE, -4, 2, -2, 6).rect(PPLUS, -4, 2, -2, 6)
    [f] = findings(c, demo, "io-guard-ring")
    assert "open P+ guard ring" in f.message and "gap of 1.00 um at (-3.00, 1.50)" in f.message
    assert f.location == pytest.approx((-3.0, 1.5), abs=0.01)
    assert f.value == pytest.approx(1.0, abs=1e-3)
    assert f.related[0].message == "P+ ring beside the gap"


def test_wrong_ring_type_is_named(demo):
    # An n-well ring with an n-tap ring round a pad-connected N+: the minority-carrier
    # ring alone, without the P+ ring it needs.
    c = pad_nmos(DEMO)
    for box in ((-6, -6, 16, -3), (-6, 7, 16, 10), (-6, -6, -3, 10), (13, -6, 16, 10)):
        c.rect(NWELL, *box)
    ring(c, DEMO, "nplus", -5.5, -5.5, 15.5, 9.5, 2)
    [f] = findings(c, demo, "io-guard-ring")
    assert "surrounded only by an N+ ring (n-tap), not the P+ guard ring (p-tap)" in f.message


def test_ring_without_contact(demo):
    c = ring(pad_nmos(DEMO), DEMO, "pplus", -4, -4, 14, 8, 2, contact=False)
    [f] = findings(c, demo, "io-guard-ring")
    assert f.message == "P+ guard ring around a pad-connected N+ diffusion encloses no contact"


def test_no_ring_at_all(demo):
    [f] = findings(pad_nmos(DEMO), demo, "io-guard-ring")
    assert f.message.startswith("pad-connected N+ diffusion has no P+ guard ring")


def test_double_rings(demo):
    data = demo.to_mapping()
    data["rules"]["io-guard-ring"]["double"] = True
    double = technology_from_mapping(data, "demo with double rings")
    c = ring(pad_nmos(DEMO), DEMO, "pplus", -4, -4, 14, 8, 2)
    [f] = findings(c, double, "io-guard-ring")
    assert "no N+ guard ring surrounds the P+ guard ring" in f.message
    for box in ((-9, -9, 19, -5), (-9, 9, 19, 13), (-9, -9, -5, 13), (15, -9, 19, 13)):
        c.rect(NWELL, *box)
    ring(c, DEMO, "nplus", -8.5, -8.5, 18.5, 12.5, 2)
    assert findings(c, double, "io-guard-ring") == []


@pytest.mark.parametrize("kind, outer_needed", [("ndiff", True), ("pdiff", False)])
def test_double_rings_for_one_device_kind(demo, kind, outer_needed):
    data = demo.to_mapping()
    data["rules"]["io-guard-ring"]["double"] = kind
    tech = technology_from_mapping(data, f"demo with double rings for {kind}")
    single = ring(pad_nmos(DEMO), DEMO, "pplus", -4, -4, 14, 8, 2)  # one P+ ring round a pad N+
    assert len(findings(single, tech, "io-guard-ring")) == (1 if outer_needed else 0)


def test_pad_connected_through_a_labelled_net(demo):
    """No marker: the drain reaches a PAD label through a contact and metal1."""
    c = CellBuilder("T").rect(ACTIVE, 0, 0, 10, 4).rect(NPLUS, 0, 0, 10, 4).rect(POLY, 4.8, -1, 5.2, 5)
    c.rect(CONTACT, 7, 1.8, 7.4, 2.2).rect(METAL1, 6.5, 1, 30, 3)
    c.label("PAD_SDO", M1_LABEL, 29, 2)
    [f] = findings(c, demo, "io-guard-ring")
    assert "pad-connected N+ transistor diffusion" in f.message
    c.labels = [("SDO_INT", M1_LABEL, (29, 2), -1)]
    assert findings(c, demo, "io-guard-ring") == []


# --- io-spacing ---------------------------------------------------------------------------

def _pmos_well(c, x0):
    """An n-well from x0 with a P+ device 2 um inside it."""
    c.rect(NWELL, x0, -5, x0 + 12, 9).rect(ACTIVE, x0 + 2, 0, x0 + 6, 4).rect(PPLUS, x0 + 2, 0, x0 + 6, 4)
    return c


def test_io_spacing_at_the_limit_and_below(demo):
    # demo.toml [rules.io-spacing] min = 15 (invented): an n-well holding a P+ device
    # 15.00 um from the pad-connected N+ passes, 14.99 um fails.
    assert findings(_pmos_well(pad_nmos(DEMO), 25.0), demo, "io-spacing") == []
    [f] = findings(_pmos_well(pad_nmos(DEMO), 24.99), demo, "io-spacing")
    assert f.value == pytest.approx(14.99, abs=1e-9) and f.limit == 15.0
    assert "from the edge of an n-well holding P+ devices" in f.message
    # Nearer still, the P+ diffusion itself is within the limit: it is named first.
    [f] = findings(_pmos_well(pad_nmos(DEMO), 15.0), demo, "io-spacing")
    assert "17.00" not in f.message and "is 7.00 um from a P+ device diffusion" in f.message
    assert "n-well holding P+ devices is 5.00 um away" in f.message


def test_guard_ring_wells_do_not_count_for_io_spacing(demo):
    c = pad_nmos(DEMO).rect(NWELL, 13, -5, 16, 9)   # an n-well strip with no P+ device, 3 um away
    assert findings(c, demo, "io-spacing") == []


def test_pad_pmos_near_an_nmos(demo):
    c = pad_pmos_in_well(DEMO, 2.0, 2.0)
    c.rect(ACTIVE, 20, 0, 24, 4).rect(NPLUS, 20, 0, 24, 4)   # N+ device 10 um from the P+
    [f] = findings(c, demo, "io-spacing")
    assert f.value == pytest.approx(10.0) and "from an N+ device diffusion" in f.message


# --- tap-supply -----------------------------------------------------------------------------

def _tap(c, implant, x, label=None, in_well=False):
    if in_well:
        c.rect(NWELL, x - 1, -1, x + 3, 3)
    c.rect(ACTIVE, x, 0, x + 2, 2).rect(implant, x, 0, x + 2, 2).rect(CONTACT, x + 0.8, 0.8, x + 1.2, 1.2)
    c.rect(METAL1, x, 0, x + 2, 2)
    if label:
        c.label(label, M1_LABEL, x + 1, 1)
    return c


def test_taps_on_the_wrong_supply(demo):
    c = _tap(CellBuilder("T"), NPLUS, 0, "VSS", in_well=True)
    _tap(c, PPLUS, 10, "VDD")
    _tap(c, PPLUS, 20, "GND")     # right
    _tap(c, NPLUS, 30, "VDD_IO", in_well=True)   # right
    found = findings(c, demo, "tap-supply")
    assert sorted(f.message for f in found) == [
        "n-tap is on net VSS, which is not a power net (VDD*)",
        "p-tap is on net VDD, which is not a ground net (VSS*, GND)",
    ]
    assert all(f.severity == Severity.WARNING for f in found)


def test_unnamed_tap_is_information_when_supplies_are_named(demo):
    c = _tap(CellBuilder("T"), PPLUS, 0, "VSS")
    _tap(c, PPLUS, 10)   # its metal carries no label
    [f] = findings(c, demo, "tap-supply")
    assert f.severity == Severity.INFO and "no label" in f.message and "(VSS)" in f.message
    assert f.bbox == (10.0, 0.0, 12.0, 2.0)


def test_no_labels_no_tap_supply(demo):
    c = _tap(_tap(CellBuilder("T"), PPLUS, 0), NPLUS, 10, in_well=True)
    assert findings(c, demo, "tap-supply") == []


def test_uncontacted_tap_is_left_to_its_own_rule(demo):
    c = _tap(CellBuilder("T"), PPLUS, 0, "VSS")
    c.rect(ACTIVE, 10, 0, 12, 2).rect(PPLUS, 10, 0, 12, 2)
    assert findings(c, demo, "tap-supply") == []
    assert [f.rule for f in findings(c, demo, "tap-supply", "uncontacted-tap")] == ["uncontacted-tap"]


def test_every_rule_here_is_quiet_on_a_clean_pad_driver(demo):
    """A pad NMOS in a contacted P+ ring tied to VSS: nothing to report."""
    c = ring(pad_nmos(DEMO), DEMO, "pplus", -4, -4, 14, 8, 2)
    c.rect(METAL1, -4, -4, 14, -2).label("VSS", M1_LABEL, 0, -3)
    assert findings(c, demo, "io-guard-ring", "io-spacing", "tap-supply", "tap-distance") == []
