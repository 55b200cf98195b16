"""Deep n-well isolation: ties (isolation-tie), isolated p-wells as bodies of their own
(tap-distance, floating-well, the devices table)."""

import pytest

from latchwatch.analyzers.check import check_outcome
from latchwatch.analyzers.context import CheckOptions
from latchwatch.analyzers.extraction.extract import SUBSTRATE, extract, pwell_body
from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.server.config.techfiles import load_technology

from builders import ACTIVE, CONTACT, NPLUS, NWELL, PPLUS, CellBuilder, layout, outcome

DEEP_NWELL, PWELL = (10, 0), (11, 0)  # demo.toml


@pytest.fixture(scope="module")
def demo():
    return load_technology("demo")


def run(cell, tech, *rules, devices=False):
    chosen = tuple(RULES_BY_ID[r] for r in rules)
    return check_outcome(outcome(layout(cell)), tech, CheckOptions(), rules=chosen, want_devices=devices)


def isolated_block(tie_contacted=True, ptap_at=None):
    """A 40 x 40 deep n-well under an n-well ring 3 um wide (the usual isolation), an n-tap
    in the ring, and an N+ device at (10, 18)-(12, 22) in the p-well the ring encloses."""
    c = CellBuilder("T").rect(DEEP_NWELL, 0, 0, 40, 40)
    for box in ((-1, -1, 41, 2), (-1, 38, 41, 41), (-1, -1, 2, 41), (38, -1, 41, 41)):
        c.rect(NWELL, *box)
    c.rect(ACTIVE, 0, 0, 1, 1).rect(NPLUS, 0, 0, 1, 1)          # n-tap in the ring
    if tie_contacted:
        c.rect(CONTACT, 0.3, 0.3, 0.7, 0.7)
    c.rect(ACTIVE, 10, 18, 12, 22).rect(NPLUS, 10, 18, 12, 22)   # N+ device in the isolated p-well
    if ptap_at is not None:
        x = ptap_at
        c.rect(ACTIVE, x, 18, x + 1, 22).rect(PPLUS, x, 18, x + 1, 22).rect(CONTACT, x + 0.3, 19.8, x + 0.7, 20.2)
    # A substrate tap just outside the ring, 4 um from the device's body edge.
    c.rect(ACTIVE, -4, 18, -3, 22).rect(PPLUS, -4, 18, -3, 22).rect(CONTACT, -3.7, 19.8, -3.3, 20.2)
    return c


def test_isolated_pwell_is_a_body_of_its_own(demo):
    ex = extract(flatten(layout(isolated_block(ptap_at=35)), 0), demo)
    assert len(ex.deep_nwells) == 1 and len(ex.pwells) == 1
    assert ex.ndiff.body.tolist() == [pwell_body(0)]
    assert sorted(ex.ptap.body.tolist()) == sorted([pwell_body(0), SUBSTRATE])


def test_isolated_nplus_is_measured_to_its_own_ptap_not_the_substrates(demo):
    # Device x = 10..12, p-well tap x = 35..36, same y span: the farthest point is on the
    # device's left edge, 35 - 10 = 25 um away. The substrate tap (x = -4..-3) would give
    # 15 um, but it lies on the other side of the isolation and does not count.
    result = run(isolated_block(ptap_at=35), demo, "tap-distance", devices=True)
    [f] = result.findings
    assert f.value == pytest.approx(25.0, abs=2e-3)
    assert "nearest p-well tap" in f.message
    [device] = result.devices
    assert device.body == "pwell#1" and device.tap_distance_um == pytest.approx(25.0, abs=2e-3)


def test_tied_block_is_clean(demo):
    result = run(isolated_block(ptap_at=14), demo, "isolation-tie", "floating-well", "tap-distance")
    assert result.findings == []


def test_untied_deep_nwell(demo):
    [f] = run(isolated_block(tie_contacted=False, ptap_at=14), demo, "isolation-tie").findings
    assert f.message == "deep n-well has no tie: the 1 n-well touching it holds no contacted n-tap"
    assert f.bbox == (0.0, 0.0, 40.0, 40.0)
    alone = CellBuilder("T").rect(DEEP_NWELL, 0, 0, 10, 10)
    [f] = run(alone, demo, "isolation-tie").findings
    assert f.message == "deep n-well has no tie: no n-well touches it"


def test_isolated_pwell_with_devices_and_no_tap_floats(demo):
    found = run(isolated_block(), demo, "isolation-tie", "floating-well", "tap-distance").findings
    assert [f.rule for f in found] == ["floating-well"]
    assert found[0].message == "isolated p-well holds 1 N+ diffusion but no contacted p-tap"


def test_empty_drawn_pwell_without_tie(demo):
    c = CellBuilder("T").rect(DEEP_NWELL, 0, 0, 40, 40)
    c.rect(NWELL, -1, -1, 41, 2).rect(ACTIVE, 0, 0, 1, 1).rect(NPLUS, 0, 0, 1, 1).rect(CONTACT, 0.3, 0.3, 0.7, 0.7)
    c.rect(PWELL, 5, 5, 35, 35)
    c.rect(ACTIVE, 10, 10, 11, 11).rect(PPLUS, 10, 10, 11, 11)   # a p-tap with no contact
    [f] = run(c, demo, "isolation-tie").findings
    assert f.message == "isolated p-well has no contacted p-tap; its 1 p-tap enclose no contact"
    assert f.bbox == (5.0, 5.0, 35.0, 35.0)


def test_drawn_pwell_outside_a_deep_nwell_is_just_substrate(demo):
    c = CellBuilder("T").rect(PWELL, 0, 0, 10, 10).rect(ACTIVE, 2, 2, 4, 4).rect(NPLUS, 2, 2, 4, 4)
    ex = extract(flatten(layout(c), 0), demo)
    assert len(ex.pwells) == 0 and ex.ndiff.body.tolist() == [SUBSTRATE]
