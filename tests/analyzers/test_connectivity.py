"""Nets through the connectivity stack, label names, supply conflicts and pad-connected
devices (analyzers/extraction/connectivity.py, analyzers/extraction/nets.py)."""

import numpy as np
import pytest
import shapely

from latchwatch.analyzers.check import check_outcome
from latchwatch.analyzers.context import CheckContext, CheckOptions
from latchwatch.analyzers.extraction.connectivity import NDIFF, PDIFF, PTAP, join_nets, meeting_pairs
from latchwatch.analyzers.extraction.extract import extract
from latchwatch.analyzers.extraction.nets import layout_nets, matches, pad_connected
from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.technology.model import technology_from_mapping
from latchwatch.server.config.techfiles import load_technology

from builders import ACTIVE, CONTACT, METAL1, NPLUS, NWELL, POLY, PPLUS, CellBuilder, layout, outcome

M1_LABEL, VIA1, METAL2, M2_LABEL, IO_MARKER = (7, 5), (8, 0), (9, 0), (9, 5), (12, 0)
VIA2, METAL3, M3_LABEL = (20, 0), (21, 0), (21, 5)


@pytest.fixture(scope="module")
def demo():
    return load_technology("demo")


@pytest.fixture(scope="module")
def three_metals(demo):
    """The demo technology with a third metal level and labels on it."""
    data = demo.to_mapping()
    data["layers"].update(via2=list(VIA2), metal3=list(METAL3))
    data["labels"]["metal3"] = list(M3_LABEL)
    data["connectivity"]["stack"].append(["metal2", "via2", "metal3"])
    return technology_from_mapping(data, "three-metal test technology")


def _nets(cell, tech):
    ex = extract(flatten(layout(cell), 0), tech)
    return ex, layout_nets(ex, tech)


def inverter(cell, pad_label=None):
    """An inverter with its source rails labelled VDD and VSS; its output goes up to
    metal2 through via1, labelled ``pad_label`` there when given."""
    cell.rect(NWELL, 0, 5, 10, 10)
    cell.rect(ACTIVE, 1, 6, 4, 8).rect(PPLUS, 1, 6, 4, 8)
    cell.rect(ACTIVE, 1, 1, 4, 3).rect(NPLUS, 1, 1, 4, 3)
    cell.rect(POLY, 2, 0.6, 2.5, 9)  # the gate splits each diffusion into source and drain
    for y in (1.2, 6.2):
        cell.rect(CONTACT, 1.2, y, 1.6, y + 0.4).rect(CONTACT, 3.0, y, 3.4, y + 0.4)
    cell.rect(METAL1, 1, 0, 1.8, 1.8).rect(METAL1, 0, 0, 10, 0.5)      # NMOS source to the VSS rail
    cell.rect(METAL1, 1, 6, 1.8, 9.9).rect(METAL1, 0, 9.5, 10, 10)     # PMOS source to the VDD rail
    cell.rect(METAL1, 2.9, 1, 3.5, 7)                                   # both drains
    cell.rect(VIA1, 3.0, 4.0, 3.4, 4.4).rect(METAL2, 3.0, 4.0, 20, 4.4)
    cell.label("VDD", M1_LABEL, 5, 9.7).label("VSS", M1_LABEL, 5, 0.2)
    if pad_label:
        cell.label(pad_label, M2_LABEL, 19, 4.2)
    return cell


def test_source_and_drain_are_separate_nets_joined_through_metal(demo):
    ex, ln = _nets(inverter(CellBuilder("T"), "PAD1"), demo)
    n_piece, n_net = ln.net_of(NDIFF)
    p_piece, p_net = ln.net_of(PDIFF)
    # Each transistor diffusion is cut by its gate into two terminals.
    assert len(n_piece) == 2 and len(p_piece) == 2
    names = {ln.display_name(n) for n in np.concatenate([n_net, p_net])}
    assert names == {"VDD", "VSS", "PAD1"}
    # The two drains are one net, reached from metal2 through via1 and metal1.
    drains = [n for n in np.concatenate([n_net, p_net]) if ln.display_name(n) == "PAD1"]
    assert len(drains) == 2 and len(set(drains)) == 1
    assert ln.conflicts == []
    assert ln.power[np.unique(p_net)].tolist().count(True) == 1


def test_pad_connected_by_label_and_by_marker(demo):
    plain = inverter(CellBuilder("T"))
    ex, ln = _nets(plain, demo)
    ctx = CheckContext(outcome(layout(plain)), demo, CheckOptions(), ex.flat)
    assert not pad_connected(ctx)["n"].any() and not pad_connected(ctx)["p"].any()

    labelled = inverter(CellBuilder("T"), "PAD_OUT")
    ctx = CheckContext(outcome(layout(labelled)), demo, CheckOptions(), flatten(layout(labelled), 0))
    assert pad_connected(ctx)["n"].tolist() == [True] and pad_connected(ctx)["p"].tolist() == [True]

    marked = inverter(CellBuilder("T")).rect(IO_MARKER, 0.5, 0.5, 4.5, 3.5)   # over the NMOS only
    ctx = CheckContext(outcome(layout(marked)), demo, CheckOptions(), flatten(layout(marked), 0))
    assert pad_connected(ctx)["n"].tolist() == [True] and pad_connected(ctx)["p"].tolist() == [False]


def test_label_on_the_unconnected_output_does_not_name_a_supply(demo):
    cell = inverter(CellBuilder("T"), "OUT")
    cell.label("OUT", M1_LABEL, 3.2, 5.0)  # the same net, labelled on metal1 too
    ex, ln = _nets(cell, demo)
    out = [n for n, names in ln.names.items() if names == ("OUT",)]
    assert len(out) == 1 and not ln.power[out[0]] and not ln.ground[out[0]]


def test_two_supply_names_on_one_net_are_a_conflict(demo):
    cell = inverter(CellBuilder("T")).rect(METAL1, 9, 0, 9.5, 10)   # a strap joins the rails
    ex, ln = _nets(cell, demo)
    assert len(ln.conflicts) == 1
    net, first, second = ln.conflicts[0]
    assert {ex.flat.label_text[first], ex.flat.label_text[second]} == {"VDD", "VSS"}
    result = check_outcome(outcome(layout(cell)), demo, CheckOptions(), rules=_rules("tap-supply"))
    [short] = result.findings
    assert "two supplies are joined" in short.message
    assert short.location in ((5.0, 0.2), (5.0, 9.7))


def test_connectivity_through_three_metal_levels(three_metals):
    """A p-tap reaches a label two levels up: contact, metal1, via1, metal2, via2, metal3."""
    cell = CellBuilder("T")
    cell.rect(ACTIVE, 0, 0, 2, 2).rect(PPLUS, 0, 0, 2, 2).rect(CONTACT, 0.8, 0.8, 1.2, 1.2)
    cell.rect(METAL1, 0, 0, 2, 2).rect(VIA1, 1.5, 1.5, 1.9, 1.9)
    cell.rect(METAL2, 1.4, 1.4, 10, 2).rect(VIA2, 9.5, 1.5, 9.9, 1.9)
    cell.rect(METAL3, 9.4, 0, 10, 20).label("VSS", M3_LABEL, 9.7, 19.0)
    ex, ln = _nets(cell, three_metals)
    [piece], [net] = ln.net_of(PTAP)
    assert ln.names[int(net)] == ("VSS",) and ln.ground[net]
    # Take via2 away and the tap's net has no name.
    cell.polys = [p for p in cell.polys if p[0] != VIA2]
    ex, ln = _nets(cell, three_metals)
    [piece], [net] = ln.net_of(PTAP)
    assert int(net) not in ln.names


def test_a_via_that_only_touches_does_not_connect(three_metals):
    cell = CellBuilder("T").rect(METAL1, 0, 0, 2, 2).rect(VIA1, 2, 0.5, 2.4, 0.9).rect(METAL2, 2, 0, 4, 2)
    cell.label("A", M1_LABEL, 1, 1).label("B", M2_LABEL, 3, 1)
    ex, ln = _nets(cell, three_metals)
    assert sorted(ln.names.values()) == [("A",), ("B",)]


def test_butted_junction_is_not_a_wire_unless_a_contact_straddles_it(demo):
    cell = CellBuilder("T").rect(NWELL, 0, 0, 10, 10)
    cell.rect(ACTIVE, 1, 1, 9, 3).rect(PPLUS, 1, 1, 5, 3).rect(NPLUS, 5, 1, 9, 3)   # P+ device | n-tap
    cell.rect(CONTACT, 7, 1.5, 7.4, 1.9).rect(METAL1, 6.5, 1, 9, 3).label("VDD", M1_LABEL, 8, 2)
    ex, ln = _nets(cell, demo)
    [_], [p_net] = ln.net_of(PDIFF)
    assert int(p_net) not in ln.names
    cell.rect(CONTACT, 4.8, 1.5, 5.2, 1.9).rect(METAL1, 4.5, 1, 6.6, 3)  # a contact across the junction
    ex, ln = _nets(cell, demo)
    [_], [p_net] = ln.net_of(PDIFF)
    assert ln.names[int(p_net)] == ("VDD",)


def test_without_labels_no_graph_is_built(demo):
    cell = inverter(CellBuilder("T"))
    cell.labels = []
    ex, ln = _nets(cell, demo)
    assert ln.conn is None and ln.names == {}


def test_label_patterns_are_case_sensitive_globs(demo):
    assert matches("VDD_IO", demo.power) and matches("GND", demo.ground)
    assert not matches("vdd", demo.power) and not matches("GNDA", demo.ground)
    assert matches("PAD7", demo.pads)


def test_join_nets_agrees_with_shapely_unions_on_random_rectangles():
    """Reference: shapely's union of the shapes of one layer (touching joins), then cuts."""
    rng = np.random.default_rng(7)
    lo = rng.uniform(0, 40, size=(60, 2)).round(1)
    size = rng.uniform(0.5, 6, size=(60, 2)).round(1)
    m1 = shapely.box(lo[:, 0], lo[:, 1], lo[:, 0] + size[:, 0], lo[:, 1] + size[:, 1])
    labels = join_nets([m1], [])
    merged = shapely.get_parts(shapely.union_all(m1))
    # Two shapes share a net exactly when they lie in the same part of the union.
    part_of = np.array([int(np.flatnonzero(shapely.intersects(merged, s))[0]) for s in m1])
    same = labels[:, None] == labels[None, :]
    assert (same == (part_of[:, None] == part_of[None, :])).all()


def test_meeting_pairs_match_shapely_intersects():
    rng = np.random.default_rng(3)
    lo = rng.integers(0, 20, size=(40, 2)).astype(float)
    a = shapely.box(lo[:, 0], lo[:, 1], lo[:, 0] + 2, lo[:, 1] + 2)
    b = np.concatenate([a[:20], [shapely.Polygon([(0, 0), (5, 0), (0, 5)])]])
    i, j = meeting_pairs(a, b)
    got = set(zip(i.tolist(), j.tolist(), strict=False))
    want = {(x, y) for x in range(len(a)) for y in range(len(b)) if a[x].intersects(b[y])}
    assert got == want


def test_devices_table_names_the_nets(demo):
    cell = inverter(CellBuilder("T"), "PAD1")
    result = check_outcome(outcome(layout(cell)), demo, CheckOptions(), want_devices=True)
    nets = {d.kind: d.net for d in result.devices}
    assert nets == {"pdiff": "PAD1,VDD", "ndiff": "PAD1,VSS"}


def _rules(*ids):
    from latchwatch.analyzers.rules import RULES_BY_ID

    return tuple(RULES_BY_ID[i] for i in ids)
