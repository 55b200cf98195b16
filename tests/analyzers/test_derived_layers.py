"""Derived layers: roles given as boolean expressions over drawn layers
(analyzers/technology/derived.py, analyzers/extraction/layers.py), validated with errors
that name the key, and evaluated with each piece traced to the shape that drew it."""

from __future__ import annotations

import pytest
import shapely

from latchwatch.analyzers.extraction.extract import extract
from latchwatch.analyzers.extraction.layers import layer_shapes
from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.technology.model import TechnologyError, technology_from_mapping

from builders import ACTIVE, CONTACT, NWELL, POLY, PPLUS, CellBuilder, layout

SOURCE = "derived.toml"


def technology(**layers):
    base = {"nwell": [1, 0], "active": [2, 0], "poly": [3, 0], "pplus": [5, 0], "contact": [6, 0],
            "metal1": [7, 0], "nplus": "active not pplus"}
    base.update(layers)
    return technology_from_mapping({"name": "t", "layers": base}, SOURCE)


def error(**layers) -> TechnologyError:
    with pytest.raises(TechnologyError) as info:
        technology(**layers)
    return info.value


def test_a_role_may_be_drawn_or_derived_and_round_trips_through_the_file_keys():
    tech = technology()
    assert tech.layer("nplus") is None and tech.has_layer("nplus")
    assert tech.to_mapping()["layers"]["nplus"] == "active not pplus"
    again = technology_from_mapping(tech.to_mapping(), SOURCE)
    assert again.derived == tech.derived


@pytest.mark.parametrize("text, at, expected", [
    ("active not", 11, "a role, a L/D layer, grow(...), shrink(...) or '('"),
    ("active pplus", 8, "'and', 'or', 'not' or the end"),
    ("grow(active)", 12, "','"),
    ("grow(active, x)", 14, "a distance in um"),
    ("active # pplus", 8, "a role, a L/D layer"),
])
def test_expression_syntax_errors_name_the_key_and_the_character(text, at, expected):
    err = error(nplus=text)
    assert err.key == "layers.nplus" and err.got == text
    assert f"at character {at}" in str(err) and expected in str(err)


def test_an_unknown_role_in_an_expression_is_named_with_a_suggestion():
    err = error(nplus="active not plus")
    assert err.key == "layers.nplus" and err.got == "plus" and "pplus" in str(err)


def test_a_role_derived_from_itself_is_refused_with_the_cycle():
    err = error(nplus="active not tap", tap="nplus or pplus")
    assert err.key == "layers.nplus" and "nplus -> tap -> nplus" in str(err)


def test_not_and_and_or_grow_and_shrink_against_shapely():
    cell = (CellBuilder("TOP").rect(ACTIVE, 0, 0, 10, 2).rect(ACTIVE, 20, 0, 24, 2)
            .rect(PPLUS, 6, -1, 30, 3).rect(POLY, 2, -1, 3, 3).rect(POLY, 3, -1, 4, 3))
    flat = flatten(layout(cell), 0)
    tech = technology(tap="active and pplus", metal2="grow(poly, 0.5)", metal3="shrink(poly, 0.25)",
                      via1="active not pplus or poly")
    nplus, owner = layer_shapes(flat, tech, "nplus")
    # Reference: shapely's difference of the drawn active and implant.
    assert shapely.union_all(nplus).equals(shapely.box(0, 0, 6, 2))
    assert owner.tolist() == [0]  # traced to the first active rectangle
    tap, owner = layer_shapes(flat, tech, "tap")
    assert shapely.union_all(tap).equals(shapely.union_all([shapely.box(6, 0, 10, 2), shapely.box(20, 0, 24, 2)]))
    assert sorted(owner.tolist()) == [0, 1]
    grown, owner = layer_shapes(flat, tech, "metal2")
    assert shapely.union_all(grown).equals(shapely.box(1.5, -1.5, 4.5, 3.5)) and sorted(owner.tolist()) == [3, 4]
    # The two abutting poly rectangles shrink as one (a seam would open if shrunk one by one).
    shrunk, owner = layer_shapes(flat, tech, "metal3")
    assert len(shrunk) == 1 and shrunk[0].equals(shapely.box(2.25, -0.75, 3.75, 2.75))
    either, _ = layer_shapes(flat, tech, "via1")
    assert shapely.union_all(either).equals(shapely.union_all([shapely.box(0, 0, 6, 2), shapely.box(2, -1, 4, 3)]))


def test_an_nmos_drawn_without_an_n_implant_is_an_n_diffusion():
    # Active with no implant drawn, outside the n-well: with nplus = "active not pplus" it is
    # an N+ device diffusion; a P+ one inside the well stays P+.
    cell = (CellBuilder("TOP").rect(ACTIVE, 0, 0, 4, 2).rect(POLY, 1.5, -0.5, 2.5, 2.5)
            .rect(NWELL, 10, -2, 20, 4).rect(ACTIVE, 12, 0, 16, 2).rect(PPLUS, 11.8, -0.2, 16.2, 2.2)
            .rect(CONTACT, 12.3, 0.8, 12.7, 1.2))
    ex = extract(flatten(layout(cell), 0), technology())
    assert [g.bounds for g in ex.ndiff.geoms] == [(0.0, 0.0, 4.0, 2.0)] and ex.ndiff_gated.tolist() == [True]
    assert [g.bounds for g in ex.pdiff.geoms] == [(12.0, 0.0, 16.0, 2.0)]
