"""One diffusion drawn in pieces is one diffusion: a layout whose diffusion rectangles are
cut into abutting or overlapping pieces gives the findings and figures of the uncut one
(hypothesis searches the cuts; the uncut layout is the reference)."""

from __future__ import annotations

from dataclasses import replace

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from latchwatch.analyzers.check import DEFAULT_OPTIONS, check_outcome
from latchwatch.server.config.techfiles import load_technology

from builders import ACTIVE, CONTACT, NPLUS, NWELL, POLY, PPLUS, CellBuilder, layout, outcome

TECH = load_technology("demo")
OPTIONS = replace(DEFAULT_OPTIONS, exact_devices=True)

# (implant, x0, y0, x1, y1): an n-well row with a P+ transistor far down the well, its
# n-tap strip, an N+ transistor in the substrate and a p-tap strip; well and taps are
# placed so that tap-distance and shunt-resistance both fire on some diffusion.
DIFFUSIONS = [
    (PPLUS, 60.0, 1.5, 68.0, 3.5),  # P+ transistor, 48 um down a 5 um well from its tap
    (NPLUS, 0.0, 1.5, 12.0, 3.5),  # n-tap strip
    (NPLUS, 10.0, -14.0, 22.0, -10.0),  # N+ transistor
    (PPLUS, -20.0, -14.0, -8.0, -12.0),  # p-tap strip
]
CONTACTS = [(0.8, 2.3), (-19.2, -13.2)]
GATES = [(63.5, 0.5, 64.5, 4.5), (15.5, -15.0, 16.5, -9.0)]


def build(cuts: list[list[tuple[float, float]]]) -> CellBuilder:
    """The layout, each diffusion drawn as the x-intervals in ``cuts`` (active and implant alike)."""
    cell = CellBuilder("TOP").rect(NWELL, -2.0, 0.0, 70.0, 5.0)
    for (implant, x0, y0, x1, y1), pieces in zip(DIFFUSIONS, cuts, strict=True):
        for a, b in pieces:
            cell.rect(ACTIVE, x0 + a * (x1 - x0), y0, x0 + b * (x1 - x0), y1)
            cell.rect(implant, x0 + a * (x1 - x0), y0, x0 + b * (x1 - x0), y1)
    for x, y in CONTACTS:
        cell.rect(CONTACT, x, y, x + 0.4, y + 0.4)
    for gate in GATES:
        cell.rect(POLY, *gate)
    return cell


def comparable(result):
    """What must not depend on how a diffusion was cut: everything but the anchoring line."""
    findings = sorted((f.rule, f.message, f.value, f.limit, f.location, f.bbox) for f in result.findings)
    devices = sorted((d.kind, d.bbox, d.tap_distance_um, round(d.shunt_ohm, 6)) for d in result.devices)
    return findings, devices


def run(cell):
    return comparable(check_outcome(outcome(layout(cell)), TECH, OPTIONS, want_devices=True))


UNCUT = [[(0.0, 1.0)]] * len(DIFFUSIONS)


def test_the_reference_layout_has_the_findings_the_property_compares():
    findings, devices = run(build(UNCUT))
    assert {f[0] for f in findings} >= {"tap-distance", "shunt-resistance"}
    assert len(devices) == 2


@st.composite
def cuts_of_one(draw):
    """Cuts of [0, 1] into 1-4 pieces; each piece may overlap the next by up to 40% of a gap."""
    n = draw(st.integers(1, 4))
    points = sorted(draw(st.lists(st.integers(1, 99), min_size=n - 1, max_size=n - 1, unique=True)))
    edges = [0.0, *(p / 100 for p in points), 1.0]
    pieces = []
    for k in range(n):
        overlap = draw(st.sampled_from([0.0, 0.0, 0.01, 0.05]))
        pieces.append((edges[k], min(1.0, edges[k + 1] + overlap)))
    return pieces


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(cuts_of_one(), min_size=len(DIFFUSIONS), max_size=len(DIFFUSIONS)))
def test_cutting_diffusions_into_pieces_changes_no_finding_or_figure(cuts):
    assert run(build(cuts)) == REFERENCE


REFERENCE = run(build(UNCUT))
