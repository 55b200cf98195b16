"""Diffusion typing of docs/technology.md, with and without a separate tap layer."""

import numpy as np
import pytest

from latchwatch.analyzers.extraction.extract import SUBSTRATE, extract
from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.technology.model import technology_from_mapping
from latchwatch.server.config.techfiles import load_technology

from builders import ACTIVE, CONTACT, NPLUS, NWELL, POLY, PPLUS, CellBuilder, layout


@pytest.fixture
def demo():
    return load_technology("demo")


def _extract(cell, tech):
    return extract(flatten(layout(cell), 0), tech)


def test_four_kinds_without_tap_layer(demo):
    c = CellBuilder("T").rect(NWELL, 0, 0, 10, 10)
    c.rect(ACTIVE, 1, 1, 3, 3).rect(PPLUS, 1, 1, 3, 3)          # P+ device in the well
    c.rect(ACTIVE, 5, 1, 7, 3).rect(NPLUS, 5, 1, 7, 3)          # n-tap in the well
    c.rect(ACTIVE, 20, 1, 22, 3).rect(NPLUS, 20, 1, 22, 3)      # N+ device outside
    c.rect(ACTIVE, 25, 1, 27, 3).rect(PPLUS, 25, 1, 27, 3)      # p-tap outside
    ex = _extract(c, demo)
    assert [len(ex.pdiff), len(ex.ntap), len(ex.ndiff), len(ex.ptap)] == [1, 1, 1, 1]
    assert ex.pdiff.body.tolist() == [0] and ex.ndiff.body.tolist() == [SUBSTRATE]


def test_diffusion_crossing_the_well_edge_is_split(demo):
    c = CellBuilder("T").rect(NWELL, 0, 0, 10, 10).rect(ACTIVE, 8, 1, 14, 3).rect(PPLUS, 8, 1, 14, 3)
    ex = _extract(c, demo)
    assert ex.pdiff.geoms[0].area == pytest.approx(4.0)  # 8..10 inside
    assert ex.ptap.geoms[0].area == pytest.approx(8.0)  # 10..14 outside is a p-tap
    assert ex.pdiff.shape.tolist() == ex.ptap.shape.tolist()  # both cut from the same drawn shape


def test_butted_tap_and_abutting_wells_merge(demo):
    c = CellBuilder("T").rect(NWELL, 0, 0, 5, 10).rect(NWELL, 5, 0, 10, 10)
    c.rect(ACTIVE, 1, 1, 9, 3).rect(PPLUS, 1, 1, 6, 3).rect(NPLUS, 6, 1, 9, 3)
    ex = _extract(c, demo)
    assert len(ex.wells) == 1
    assert ex.pdiff.geoms[0].area == pytest.approx(10.0) and ex.ntap.geoms[0].area == pytest.approx(6.0)


def test_contacts_and_gates(demo):
    c = CellBuilder("T").rect(NWELL, 0, 0, 10, 10)
    c.rect(ACTIVE, 1, 1, 3, 3).rect(NPLUS, 1, 1, 3, 3).rect(CONTACT, 1.5, 1.5, 2, 2)   # contacted n-tap
    c.rect(ACTIVE, 5, 1, 7, 3).rect(NPLUS, 5, 1, 7, 3).rect(CONTACT, 7, 1, 8, 2)       # contact only touches
    c.rect(ACTIVE, 1, 5, 9, 7).rect(PPLUS, 1, 5, 9, 7).rect(POLY, 4, 4, 5, 8)          # a transistor
    ex = _extract(c, demo)
    order = np.argsort([g.bounds[0] for g in ex.ntap.geoms])
    assert ex.ntap_contacted[order].tolist() == [True, False]
    assert ex.pdiff_gated.tolist() == [True]


def test_separate_tap_layer():
    data = load_technology("demo").to_mapping()
    data["layers"]["tap"] = [13, 0]
    tech = technology_from_mapping(data, "test")
    c = CellBuilder("T").rect(NWELL, 0, 0, 10, 10)
    c.rect((13, 0), 1, 1, 3, 3).rect(NPLUS, 1, 1, 3, 3)      # n-tap on the tap layer
    c.rect(ACTIVE, 5, 1, 7, 3).rect(NPLUS, 5, 1, 7, 3)       # N+ on active in a well: not a tap
    c.rect(ACTIVE, 20, 1, 22, 3).rect(PPLUS, 20, 1, 22, 3)   # P+ active outside: not a tap either
    ex = _extract(c, tech)
    assert len(ex.ntap) == 1 and ex.ntap.geoms[0].bounds[0] == 1
    assert len(ex.ptap) == 0


def _same_pieces(a, b):
    assert len(a) == len(b)
    assert a.shape.tolist() == b.shape.tolist() and a.body.tolist() == b.body.tolist()
    assert all(x.equals_exact(y, 0.0) for x, y in zip(a.geoms, b.geoms, strict=True))


@pytest.mark.parametrize("tap_layer", [False, True])
def test_both_implants_side_by_side_give_what_one_after_the_other_gives(demo, monkeypatch, tap_layer):
    import threading

    from latchwatch.analyzers import parallel
    from latchwatch.analyzers.extraction import extract as extract_module

    tech = demo
    c = CellBuilder("T").rect(NWELL, 0, 0, 10, 10).rect((14, 0), -30, -30, 40, 40)
    if tap_layer:
        data = demo.to_mapping()
        data["layers"]["tap"] = [13, 0]
        data["layers"]["deep_nwell"] = [14, 0]
        tech = technology_from_mapping(data, "test")
        c.rect((13, 0), 1, 1, 3, 3).rect(NPLUS, 1, 1, 3, 3).rect((13, 0), 20, 1, 22, 3).rect(PPLUS, 20, 1, 22, 3)
    for x in (1, 5):  # N+ and P+ on active inside the well and outside it, two abutting pieces each
        for y0, implant in ((5, PPLUS), (0.5, NPLUS), (12, NPLUS), (-6, PPLUS)):
            c.rect(ACTIVE, x, y0, x + 4, y0 + 2).rect(implant, x, y0, x + 4, y0 + 2)
    c.rect(POLY, 2, -8, 2.5, 20).rect(CONTACT, 6, 5.5, 6.5, 6)
    serial = _extract(c, tech)
    monkeypatch.setattr(extract_module, "PARALLEL_SHAPES", 0)
    monkeypatch.setattr(parallel, "usable_cpus", lambda: 2)
    threads = []
    real = extract_module._implant_side
    monkeypatch.setattr(extract_module, "_implant_side",
                        lambda *a: threads.append(threading.current_thread().name) or real(*a))
    threaded = _extract(c, tech)
    assert len(threads) == 2 and all(name.startswith("latchwatch-extract") for name in threads)
    for kind in ("ntap", "ptap", "pdiff", "ndiff"):
        _same_pieces(getattr(serial, kind), getattr(threaded, kind))
    for flags in ("ntap_contacted", "ptap_contacted", "pdiff_gated", "ndiff_gated"):
        assert getattr(serial, flags).tolist() == getattr(threaded, flags).tolist()
    assert len(serial.pdiff) and len(serial.ndiff) and len(serial.ptap) and len(serial.ntap)
