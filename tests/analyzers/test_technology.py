"""Validation and lookups of the technology model (analyzers/technology/model.py)."""

import copy

import pytest

from latchwatch.analyzers.technology.model import Electrical, TechnologyError, technology_from_mapping
from latchwatch.analyzers.technology.rule_tables import SpacingLimit

SOURCE = "tech.toml"


def minimal(**extra):
    data = {
        "name": "t",
        "layers": {"nwell": [1, 0], "active": [2, 0], "poly": [3, 0], "nplus": [4, 0],
                   "pplus": [5, 0], "contact": [6, 0], "metal1": [7, 0]},
    }
    data.update(extra)
    return data


def error_for(data, base=None) -> TechnologyError:
    with pytest.raises(TechnologyError) as info:
        technology_from_mapping(data, SOURCE, base)
    return info.value


def test_minimal_mapping_gives_defaults():
    tech = technology_from_mapping(minimal(), SOURCE)
    assert tech.source == SOURCE
    assert tech.layer("poly") == (3, 0)
    assert tech.layer("metal2") is None
    assert tech.labels == {} and tech.connectivity == ()
    assert tech.power == tech.ground == tech.pads == ()
    assert tech.electrical == Electrical()
    assert tech.electrical.vbe_on == 0.7 and tech.electrical.nwell_sheet is None
    assert tech.tap_distance_limit("n") is None
    assert not tech.has_spacing_table()


def test_every_documented_key_is_accepted():
    data = minimal(
        description="all keys",
        labels={"metal1": [7, 5], "poly": [3, 5]},
        connectivity={"stack": [["active", "contact", "metal1"], ["metal1", "via1", "metal2"],
                                ["metal2", "via2", "metal3"], ["tap", "contact", "metal1"]]},
        nets={"power": ["VDD*"], "ground": ["VSS*", "GND"], "pads": ["PAD*"]},
        rules={"tap-distance": {"limit": 20, "limit_n": 18.0, "limit_p": 19.0,
                                "by_spacing": [{"min_spacing": 0.0, "limit": 15.0}]},
               "io-guard-ring": {"min_width": 2.0, "max_gap": 15.0, "double": True},
               "io-spacing": {"min": 15.0}},
        electrical={"vbe_on": 0.6, "nwell_sheet": 1000.0, "psub_sheet": 2000,
                    "injection_current": 0.1, "pwell_sheet": 3000.0,
                    "deep_nwell_sheet": 2200.0, "psub_resistivity": 50.0},
    )
    data["layers"].update({"via1": [8, 0], "metal2": [9, 0], "via2": [13, 0],
                           "metal3": [14, 0], "deep_nwell": [10, 0], "pwell": [11, 0],
                           "io_marker": [12, 0], "tap": [15, 0]})
    tech = technology_from_mapping(data, SOURCE)
    assert tech.layer("metal3") == (14, 0)
    assert tech.connectivity[2] == ("metal2", "via2", "metal3")
    assert tech.pads == ("PAD*",)
    assert tech.rules["tap-distance"]["limit"] == 20.0
    assert isinstance(tech.rules["tap-distance"]["limit"], float)
    assert tech.rules["io-guard-ring"]["double"] is True
    assert tech.rules["io-spacing"]["min"] == 15.0
    assert tech.electrical.psub_sheet == 2000.0 and tech.electrical.vbe_on == 0.6
    # Rebuilding from its own mapping gives the same technology.
    rebuilt = technology_from_mapping(tech.to_mapping(), SOURCE)
    assert rebuilt == tech and hash(rebuilt) == hash(tech)
    assert len({tech, rebuilt}) == 1  # usable as a cache key


def test_plain_limits_by_kind():
    tech = technology_from_mapping(
        minimal(rules={"tap-distance": {"limit": 20.0, "limit_p": 25.0}}), SOURCE)
    assert tech.tap_distance_limit("p") == 25.0
    assert tech.tap_distance_limit("n") == 20.0
    assert tech.tap_distance_limit("n", spacing=3.0) == 20.0
    with pytest.raises(ValueError):
        tech.tap_distance_limit("x")


# The row values are the GF180MCU design manual's section 14.3 LV column (50 / 30 / 15
# um, LU.3 / LU.4), used here unmerged to exercise the first-match lookup.
GF180_LV_ROWS = [{"min_spacing": 2.0, "limit": 50.0}, {"min_spacing": 1.0, "limit": 30.0},
                 {"min_spacing": 0.0, "limit": 15.0}]


@pytest.mark.parametrize("spacing, expected", [
    (0.0, 15.0), (0.99, 15.0), (1.0, 30.0), (1.99, 30.0), (2.0, 50.0), (40.0, 50.0)])
def test_by_spacing_first_row_reached_wins(spacing, expected):
    tech = technology_from_mapping(
        minimal(rules={"tap-distance": {"limit": 20.0, "by_spacing": GF180_LV_ROWS}}), SOURCE)
    assert tech.has_spacing_table()
    assert tech.tap_distance_limit("n", spacing) == expected
    assert tech.tap_distance_limit("p", spacing) == expected


def test_by_spacing_rows_are_sorted_widest_first():
    rows = list(reversed(GF180_LV_ROWS))
    tech = technology_from_mapping(minimal(rules={"tap-distance": {"by_spacing": rows}}), SOURCE)
    assert tech.rules["tap-distance"]["by_spacing"] == (
        SpacingLimit(2.0, 50.0), SpacingLimit(1.0, 30.0), SpacingLimit(0.0, 15.0))
    assert tech.tap_distance_limit("p", 1.5) == 30.0


def test_table_without_plain_limit_covers_unknown_and_small_spacing():
    rows = [{"min_spacing": 2.0, "limit": 50.0}, {"min_spacing": 1.0, "limit": 30.0}]
    tech = technology_from_mapping(minimal(rules={"tap-distance": {"by_spacing": rows}}), SOURCE)
    assert tech.tap_distance_limit("n", None) == 50.0  # no opposite well in range: widest row
    assert tech.tap_distance_limit("n", 0.5) == 30.0   # below every row: strictest limit


def test_table_with_plain_limit_uses_it_when_spacing_unknown_or_below_rows():
    rows = [{"min_spacing": 1.0, "limit": 30.0}]
    tech = technology_from_mapping(
        minimal(rules={"tap-distance": {"limit_n": 12.0, "by_spacing": rows}}), SOURCE)
    assert tech.tap_distance_limit("n", None) == 12.0
    assert tech.tap_distance_limit("n", 0.5) == 12.0
    assert tech.tap_distance_limit("n", 1.0) == 30.0


def test_error_text_has_file_key_expected_and_got():
    data = minimal()
    data["layers"]["poly"] = [3]
    err = error_for(data)
    assert (err.file, err.key, err.got) == (SOURCE, "layers.poly", [3])
    assert str(err) == f"{SOURCE}: layers.poly: expected {err.expected}, got [3]"
    assert "two non-negative integers" in err.expected


def test_missing_required_layer():
    data = minimal()
    del data["layers"]["contact"]
    err = error_for(data)
    assert err.key == "layers.contact"
    assert str(err).startswith(f"{SOURCE}: layers.contact: expected ")
    assert "required" in str(err) and "got nothing" in str(err)


def test_missing_layers_table_and_name():
    assert error_for({"name": "t"}).key == "layers"
    data = minimal()
    del data["name"]
    err = error_for(data)
    assert err.key == "name" and "got nothing" in str(err)


@pytest.mark.parametrize("value", [[1, -1], [1, 0, 0], [True, 0], [1.0, 0], 7])
def test_layer_pair_types(value):
    data = minimal()
    data["layers"]["nwell"] = value
    err = error_for(data)
    assert err.key == "layers.nwell" and err.got == value
    assert f"got {value!r}" in str(err)


@pytest.mark.parametrize("key, value", [
    ("limit", 0), ("limit", -1.0), ("limit", "20"), ("limit", True), ("limit_p", float("inf"))])
def test_limits_must_be_positive_numbers(key, value):
    err = error_for(minimal(rules={"tap-distance": {key: value}}))
    assert err.key == f"rules.tap-distance.{key}"
    assert "expected a positive number" in str(err)


def test_by_spacing_row_errors_name_the_row():
    rows = [{"min_spacing": 2.0, "limit": 50.0}, {"min_spacing": -1.0, "limit": 15.0}]
    err = error_for(minimal(rules={"tap-distance": {"by_spacing": rows}}))
    assert err.key == "rules.tap-distance.by_spacing[1].min_spacing"
    assert "non-negative number" in err.expected
    rows = [{"min_spacing": 2.0}]
    assert error_for(minimal(rules={"tap-distance": {"by_spacing": rows}})).key == (
        "rules.tap-distance.by_spacing[0].limit")
    rows = [{"min_spacing": 1.0, "limit": 5.0}, {"min_spacing": 1.0, "limit": 6.0}]
    err = error_for(minimal(rules={"tap-distance": {"by_spacing": rows}}))
    assert err.key == "rules.tap-distance.by_spacing[1].min_spacing"


def test_double_is_a_boolean_or_a_device_kind():
    err = error_for(minimal(rules={"io-guard-ring": {"double": "yes"}}))
    assert err.key == "rules.io-guard-ring.double" and err.expected == 'true, false, "ndiff" or "pdiff"'
    for value in (True, False, "ndiff", "pdiff"):
        tech = technology_from_mapping(minimal(rules={"io-guard-ring": {"double": value}}), "t")
        assert tech.rules["io-guard-ring"]["double"] == value


@pytest.mark.parametrize("data, key, suggestion", [
    (minimal(layer={}), "layer", "layers"),
    (minimal(rules={"tap-distanse": {"limit": 1.0}}), "rules.tap-distanse", "tap-distance"),
    (minimal(rules={"tap-distance": {"limt": 1.0}}), "rules.tap-distance.limt", "limit"),
    (minimal(electrical={"vbe": 0.7}), "electrical.vbe", "vbe_on"),
    (minimal(nets={"pad": ["P*"]}), "nets.pad", "pads"),
    (minimal(connectivity={"stacks": []}), "connectivity.stacks", "stack"),
])
def test_unknown_keys_get_a_did_you_mean(data, key, suggestion):
    err = error_for(data)
    assert err.key == key
    assert str(err).startswith(f"{SOURCE}: {key}: expected one of ")
    assert str(err).endswith(f"; did you mean {suggestion!r}?")


def test_unknown_layer_role_suggests_known_role():
    data = minimal()
    data["layers"]["nwel"] = [20, 0]
    err = error_for(data)
    assert err.key == "layers.nwel" and err.suggestion == "nwell"
    assert "metalN or viaN" in err.expected


def test_two_roles_on_one_layer_pair():
    data = minimal()
    data["layers"]["pplus"] = [4, 0]
    err = error_for(data)
    assert err.key == "layers.pplus" and "layers.nplus" in err.expected


def test_connectivity_must_name_declared_layers():
    data = minimal(connectivity={"stack": [["active", "contact", "metal1"],
                                           ["metal1", "via1", "metal2"]]})
    err = error_for(data)
    assert err.key == "connectivity.stack[1][1]" and err.got == "via1"
    assert "declared in [layers]" in err.expected and "cut role" in err.expected


def test_connectivity_did_you_mean_and_role_kinds():
    err = error_for(minimal(connectivity={"stack": [["active", "contact", "metl1"]]}))
    assert err.key == "connectivity.stack[0][2]" and err.suggestion == "metal1"
    err = error_for(minimal(connectivity={"stack": [["active", "poly", "metal1"]]}))
    assert err.key == "connectivity.stack[0][1]" and "contact or viaN" in err.expected
    err = error_for(minimal(connectivity={"stack": [["nwell", "contact", "metal1"]]}))
    assert err.key == "connectivity.stack[0][0]" and "conductor role" in err.expected
    err = error_for(minimal(connectivity={"stack": [["active", "contact"]]}))
    assert err.key == "connectivity.stack[0]" and "triple" in err.expected


def test_label_roles_must_be_declared_conductors():
    err = error_for(minimal(labels={"metal2": [9, 5]}))
    assert err.key == "labels.metal2" and "declared in [layers]" in err.expected
    err = error_for(minimal(labels={"nplus": [4, 5]}))
    assert err.key == "labels.nplus" and "conductor role" in err.expected
    err = error_for(minimal(labels={"metal1": [7]}))
    assert err.key == "labels.metal1"


def test_net_patterns_must_be_strings():
    err = error_for(minimal(nets={"power": "VDD"}))
    assert err.key == "nets.power" and "list" in err.expected
    err = error_for(minimal(nets={"ground": ["VSS", 3]}))
    assert err.key == "nets.ground[1]"


def test_electrical_values_positive():
    err = error_for(minimal(electrical={"nwell_sheet": -5.0}))
    assert err.key == "electrical.nwell_sheet" and err.got == -5.0


def test_extends_needs_a_resolved_base():
    err = error_for(minimal(extends="demo"))
    assert err.key == "extends" and err.got == "demo"
    err = error_for(minimal(extends=3), base=technology_from_mapping(minimal(), "base.toml"))
    assert err.key == "extends"


def base_technology():
    data = minimal(
        description="base",
        labels={"metal1": [7, 5]},
        connectivity={"stack": [["active", "contact", "metal1"]]},
        nets={"power": ["VDD"], "ground": ["VSS"]},
        rules={"tap-distance": {"limit": 20.0, "by_spacing": GF180_LV_ROWS},
               "io-guard-ring": {"min_width": 2.0, "max_gap": 15.0}},
        electrical={"nwell_sheet": 1000.0},
    )
    return technology_from_mapping(data, "base.toml")


def test_override_of_one_key_keeps_the_rest():
    base = base_technology()
    tech = technology_from_mapping({"rules": {"tap-distance": {"limit": 12.0}}}, "child.toml", base)
    assert tech.source == "child.toml"
    assert tech.rules["tap-distance"]["limit"] == 12.0
    assert tech.rules["tap-distance"]["by_spacing"] == base.rules["tap-distance"]["by_spacing"]
    assert tech.rules["io-guard-ring"] == base.rules["io-guard-ring"]
    for field in ("name", "description", "layers", "labels", "connectivity", "power",
                  "ground", "electrical"):
        assert getattr(tech, field) == getattr(base, field), field


def test_override_merges_tables_and_replaces_lists():
    base = base_technology()
    override = {"name": "child", "layers": {"metal1": [17, 0], "metal2": [18, 0]},
                "nets": {"power": ["VCC"]}, "electrical": {"psub_sheet": 5.0},
                "rules": {"tap-distance": {"by_spacing": []}}}
    before = copy.deepcopy(override)
    tech = technology_from_mapping(override, "child.toml", base)
    assert override == before  # the caller's mapping is not changed
    assert tech.name == "child"
    assert tech.layer("metal1") == (17, 0) and tech.layer("metal2") == (18, 0)
    assert tech.layer("nwell") == (1, 0)
    assert tech.power == ("VCC",) and tech.ground == ("VSS",)
    assert tech.electrical.nwell_sheet == 1000.0 and tech.electrical.psub_sheet == 5.0
    assert not tech.has_spacing_table()
    assert tech.tap_distance_limit("n", 0.5) == 20.0


def test_override_errors_name_the_overriding_file():
    err = error_for({"rules": {"tap-distance": {"limit": -1.0}}}, base=base_technology())
    assert err.file == SOURCE and err.key == "rules.tap-distance.limit"


def test_a_conductor_may_have_several_text_layers():
    # SKY130 (skywater-pdk docs/rules gds_layers.csv) gives li1 a label purpose 67/5 and a
    # pin purpose 67/16 that both carry text; a role takes one pair or a list of pairs.
    tech = technology_from_mapping(minimal(labels={"metal1": [[7, 5], [7, 16]], "poly": [3, 5]}), SOURCE)
    assert tech.labels["metal1"] == ((7, 5), (7, 16)) and tech.labels["poly"] == ((3, 5),)
    assert technology_from_mapping(tech.to_mapping(), SOURCE) == tech
    err = error_for(minimal(labels={"metal1": [[7, 5], [7]]}))
    assert err.key == "labels.metal1[1]"


def test_place_dependent_tap_distance_keys_round_trip():
    data = minimal(rules={"tap-distance": {"limit": 20.0, "spacing_within": 50.0,
                                           "by_spacing": [{"min_spacing": 0.0, "limit": 15.0}],
                                           "near_pad_p": {"within": 15.0, "limit": 2.0},
                                           "near_pad_n": {"within": 10.0, "limit": 5.0},
                                           "relaxed": {"limit": 15.0, "pad_clearance": 50.0}},
                          "tap-contact-distance": {"limit": 6.0}})
    data["layers"]["low_tap_density"] = [81, 14]
    tech = technology_from_mapping(data, SOURCE)
    table = tech.rules["tap-distance"]
    assert table["near_pad_p"].within == 15.0 and table["near_pad_n"].limit == 5.0
    assert table["relaxed"].pad_clearance == 50.0
    assert technology_from_mapping(tech.to_mapping(), SOURCE) == tech


def test_place_dependent_key_errors_name_the_key():
    err = error_for(minimal(rules={"tap-distance": {"near_pad_p": {"within": 15.0}}}))
    assert err.key == "rules.tap-distance.near_pad_p.limit"
    err = error_for(minimal(rules={"tap-distance": {"near_pad_n": {"within": -1.0, "limit": 5.0}}}))
    assert err.key == "rules.tap-distance.near_pad_n.within"
    err = error_for(minimal(rules={"tap-distance": {"near_pad_n": {"within": 1.0, "limit": 5.0, "far": 2}}}))
    assert err.key == "rules.tap-distance.near_pad_n.far"
    # The relaxed area is the low_tap_density layer: without it the key means nothing.
    err = error_for(minimal(rules={"tap-distance": {"relaxed": {"limit": 15.0, "pad_clearance": 50.0}}}))
    assert err.key == "rules.tap-distance.relaxed" and "low_tap_density" in err.expected
