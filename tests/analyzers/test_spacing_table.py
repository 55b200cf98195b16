"""Spacing-dependent tap-distance limits at the published GF180MCU latch-up table's
breakpoints (gf180mcu-pdk design manual, section 14.3, tables_clear/55_Latch-up_152.csv)."""

import pytest

from latchwatch.analyzers.check import check_outcome
from latchwatch.analyzers.context import CheckOptions
from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.server.config.techfiles import load_technology

from builders import CellBuilder, layout, outcome

# GF180MCU drawn layers (design manual, tables_clear/06_Drawn_layer10.csv).
COMP, NWELL, PPLUS, NPLUS, CONTACT = (22, 0), (21, 0), (31, 0), (32, 0), (33, 0)

# The raw table, LV column: x >= 2.0: 50 um; 1.0 <= x < 2.0: 30 um; x < 1.0: 15 um
# (DM 14.3, 55_Latch-up_152.csv, LU.3 substrate tap to N+ outside Nwell, LU.4 Nwell tap
# to P+ inside Nwell). The gf180mcu preset clips it with DF.13/DF.14; this file does not.
RAW_TABLE = """
extends = "gf180mcu"
name = "gf180mcu-raw-lu-table"
[rules.tap-distance]
by_spacing = [
    {min_spacing = 2.0, limit = 50.0},
    {min_spacing = 1.0, limit = 30.0},
    {min_spacing = 0.0, limit = 15.0},
]
"""
EXPECTED = {0.99: 15.0, 1.0: 30.0, 1.99: 30.0, 2.0: 50.0}  # DM 14.3 LU.3 / LU.4, LV column


@pytest.fixture(scope="module")
def raw(tmp_path_factory):
    path = tmp_path_factory.mktemp("tech") / "gf180_raw.toml"
    path.write_text(RAW_TABLE, encoding="utf-8")
    return load_technology(str(path))


@pytest.mark.parametrize("kind", ["n", "p"])
@pytest.mark.parametrize("spacing, limit", sorted(EXPECTED.items()))
def test_table_lookup_at_the_breakpoints(raw, kind, spacing, limit):
    assert raw.tap_distance_limit(kind, spacing) == limit


def nplus_beside_a_well(spacing, tap_distance):
    """N+ (0, 0)-(2, 2) outside an n-well whose edge is ``spacing`` to its right, and a
    contacted substrate tap whose right edge is ``tap_distance`` - 2 to its left, so the
    device's farthest point (its right edge) is ``tap_distance`` from the tap."""
    c = CellBuilder("T").rect(COMP, 0, 0, 2, 2).rect(NPLUS, 0, 0, 2, 2)
    c.rect(NWELL, 2 + spacing, -60, 2 + spacing + 10, 60)
    x = -(tap_distance - 2)
    c.rect(COMP, x - 1, 0, x, 2).rect(PPLUS, x - 1, 0, x, 2).rect(CONTACT, x - 0.7, 0.8, x - 0.3, 1.2)
    return c


def pplus_in_a_well(spacing, tap_distance, inside=3.0):
    """P+ (0, 0)-(2, 2) ``inside`` um from the right edge of its n-well, a contacted n-tap
    ``tap_distance`` from the device's right edge, and an N+ diffusion (with its own
    contacted p-tap) ``spacing`` outside that well edge: LU.4 measures the spacing from
    the N+ outside to the n-well, not from the P+ to its own well's edge."""
    x = -(tap_distance - 2)
    edge = 2 + inside
    c = CellBuilder("T").rect(NWELL, x - 60, -60, edge, 62)
    c.rect(COMP, 0, 0, 2, 2).rect(PPLUS, 0, 0, 2, 2)
    c.rect(COMP, x - 1, 0, x, 2).rect(NPLUS, x - 1, 0, x, 2).rect(CONTACT, x - 0.7, 0.8, x - 0.3, 1.2)
    if spacing is not None:
        n0 = edge + spacing
        c.rect(COMP, n0, 0, n0 + 2, 2).rect(NPLUS, n0, 0, n0 + 2, 2)
        c.rect(COMP, n0 + 2, 0, n0 + 3, 2).rect(PPLUS, n0 + 2, 0, n0 + 3, 2)
        c.rect(CONTACT, n0 + 2.3, 0.8, n0 + 2.7, 1.2)
    return c


def tap_distance_findings(cell, tech, kind=None):
    found = check_outcome(outcome(layout(cell)), tech, CheckOptions(), rules=(RULES_BY_ID["tap-distance"],)).findings
    return [f for f in found if kind is None or f.device_kind == kind]


@pytest.mark.parametrize("build, kind", [(nplus_beside_a_well, "ndiff"), (pplus_in_a_well, "pdiff")])
@pytest.mark.parametrize("spacing, limit", sorted(EXPECTED.items()))
def test_layouts_at_the_breakpoints(raw, build, kind, spacing, limit):
    # A diffusion exactly at the row's limit passes, 0.01 um beyond fails, and the limit
    # applied is the row of the spacing.
    assert tap_distance_findings(build(spacing, limit), raw, kind) == []
    [f] = tap_distance_findings(build(spacing, limit + 0.01), raw, kind)
    assert f.limit == limit
    assert f.value == pytest.approx(limit + 0.01, abs=2e-3)
    assert f"spacing of {spacing:.2f} um" in f.message
    assert f.figures["spacing_um"] == pytest.approx(spacing)


@pytest.fixture(scope="module")
def gf180():
    return load_technology("gf180mcu")


def test_pplus_near_its_well_edge_with_no_nplus_in_range_is_held_to_df13(gf180):
    # DM 14.3 LU.4 counts N+ outside the n-well within 50 um of the P+; with none, the
    # plain DF.13 limit applies (20 um at 3.3 V, 14_COMP33_1.csv), however close the
    # P+ sits to its own well's edge (0.5 um here).
    cell = pplus_in_a_well(None, 19.5, inside=0.5)
    assert tap_distance_findings(cell, gf180) == []
    [f] = tap_distance_findings(pplus_in_a_well(None, 20.01, inside=0.5), gf180)
    assert f.limit == 20.0 and f.figures["spacing_um"] is None


def test_pplus_inside_its_well_with_nplus_just_outside_takes_the_15_um_row(gf180):
    # DM 14.3 LU.4: N+ 0.5 um outside the n-well, within 50 um of the P+ (3 um inside the
    # well): y < 1.0, so 15 um (LV column). The P+ at 19.03 um fails.
    [f] = tap_distance_findings(pplus_in_a_well(0.5, 19.03), gf180, "pdiff")
    assert f.limit == 15.0
    assert f.value == pytest.approx(19.03, abs=2e-3)
    assert f.figures["spacing_um"] == pytest.approx(0.5)


def test_nplus_beyond_the_range_does_not_count(gf180):
    # The same N+ 0.5 um outside the well but more than 50 um from the P+ (the well is
    # 60 um wide): LU.4 looks only within 50 um, so DF.13's 20 um applies.
    cell = pplus_in_a_well(0.5, 19.03, inside=55.0)
    assert tap_distance_findings(cell, gf180, "pdiff") == []
