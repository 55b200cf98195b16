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


def pplus_in_a_well(spacing, tap_distance):
    """P+ (0, 0)-(2, 2) in an n-well whose right edge is ``spacing`` away (the others far),
    and a contacted n-tap ``tap_distance`` from the device's right edge."""
    x = -(tap_distance - 2)
    c = CellBuilder("T").rect(NWELL, x - 60, -60, 2 + spacing, 62)
    c.rect(COMP, 0, 0, 2, 2).rect(PPLUS, 0, 0, 2, 2)
    c.rect(COMP, x - 1, 0, x, 2).rect(NPLUS, x - 1, 0, x, 2).rect(CONTACT, x - 0.7, 0.8, x - 0.3, 1.2)
    return c


def tap_distance_findings(cell, tech):
    return check_outcome(outcome(layout(cell)), tech, CheckOptions(), rules=(RULES_BY_ID["tap-distance"],)).findings


@pytest.mark.parametrize("build", [nplus_beside_a_well, pplus_in_a_well])
@pytest.mark.parametrize("spacing, limit", sorted(EXPECTED.items()))
def test_layouts_at_the_breakpoints(raw, build, spacing, limit):
    # A diffusion exactly at the row's limit passes, 0.01 um beyond fails, and the limit
    # applied is the row of the spacing.
    assert tap_distance_findings(build(spacing, limit), raw) == []
    [f] = tap_distance_findings(build(spacing, limit + 0.01), raw)
    assert f.limit == limit
    assert f.value == pytest.approx(limit + 0.01, abs=2e-3)
    assert f"at {spacing:.2f} um from" in f.message
