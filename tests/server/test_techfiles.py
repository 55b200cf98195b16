"""Technology files: presets, TOML errors, extends, and the tech commands
(server/config/techfiles.py)."""

import io
import re
from importlib import resources
from pathlib import Path

import pytest

from latchwatch.analyzers.technology.model import TechnologyError
from latchwatch.server.config.techfiles import (
    builtin_names,
    describe_technology,
    load_technology,
    tech_check_command,
    tech_list_command,
    tech_show_command,
)

PRESETS = ("demo", "gf180mcu", "sg13g2", "sky130")


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


def load_error(ref, base_dir=None) -> TechnologyError:
    with pytest.raises(TechnologyError) as info:
        load_technology(ref, base_dir)
    return info.value


def test_builtin_names():
    assert builtin_names() == sorted(PRESETS)


@pytest.mark.parametrize("name", PRESETS)
def test_each_preset_loads(name):
    tech = load_technology(name)
    assert tech.name == name
    assert tech.source == f"built-in {name}"
    assert tech.description


def test_demo_preset_is_the_examples_technology():
    # The demo technology is invented; these are its defining values, not published ones.
    tech = load_technology("demo")
    assert dict(tech.layers) == {
        "nwell": (1, 0), "active": (2, 0), "poly": (3, 0), "nplus": (4, 0), "pplus": (5, 0),
        "contact": (6, 0), "metal1": (7, 0), "via1": (8, 0), "metal2": (9, 0),
        "deep_nwell": (10, 0), "pwell": (11, 0), "io_marker": (12, 0)}
    assert dict(tech.labels) == {"metal1": ((7, 5),), "metal2": ((9, 5),)}
    assert tech.connectivity == (("active", "contact", "metal1"), ("poly", "contact", "metal1"),
                                 ("metal1", "via1", "metal2"))
    assert (tech.power, tech.ground, tech.pads) == (("VDD*",), ("VSS*", "GND"), ("PAD*",))
    assert tech.tap_distance_limit("n") == tech.tap_distance_limit("p") == 20.0
    assert dict(tech.rules["io-guard-ring"]) == {"min_width": 2.0, "max_gap": 15.0,
                                                 "double": False}
    assert tech.rules["io-spacing"]["min"] == 15.0
    e = tech.electrical
    assert (e.vbe_on, e.nwell_sheet, e.psub_sheet, e.injection_current) == (
        0.7, 1000.0, 2000.0, 0.1)


def test_sg13g2_published_values():
    tech = load_technology("sg13g2")
    # SG13G2_os_layout_rules.pdf Rev 0.4, LU.a: P+ Activ in NWell to an nSD-NWell tie, 20.00 um.
    assert tech.tap_distance_limit("p") == 20.0
    # SG13G2_os_layout_rules.pdf Rev 0.4, LU.b: N+ Activ in PWell to a pSD-PWell tie, 20.00 um.
    assert tech.tap_distance_limit("n") == 20.0
    assert not tech.has_spacing_table()
    # SG13G2_os_layout_rules.pdf Rev 0.4, layer table.
    assert dict(tech.layers) == {
        "active": (1, 0), "poly": (5, 0), "contact": (6, 0),
        "pplus": (14, 0), "metal1": (8, 0), "via1": (19, 0), "metal2": (10, 0),
        "nwell": (31, 0), "pwell": (46, 0)}
    # N+ is Activ outside pSD: PyPI ihp-gdsfactory 2.0.0, ihp/cells/fet_transistors.py draws
    # nmos without nSD (pmos with pSD), ihp/cells/passives.py ntap1 with nSD outside pSD.
    assert tech.to_mapping()["layers"]["nplus"] == "active not pplus"
    assert dict(tech.labels) == {"metal1": ((8, 25),), "metal2": ((10, 25),)}
    # SG13G2_os_layout_rules.pdf Rev 0.4, 7.2.1: double guard rings for output buffers.
    assert tech.rules["io-guard-ring"]["double"] is True
    assert "min_width" not in tech.rules["io-guard-ring"]
    # SG13G2_os_process_spec.pdf Rev 1.2, 2.13: typical substrate resistivity 50 ohm cm.
    assert tech.electrical.psub_resistivity == 50.0
    assert tech.electrical.nwell_sheet is None and tech.electrical.psub_sheet is None


def test_gf180mcu_published_values():
    tech = load_technology("gf180mcu")
    # gf180mcu design manual 14_COMP33_2.csv, DF.14 (3.3 V): substrate tap to N+, 20 um.
    assert tech.tap_distance_limit("n") == 20.0
    # gf180mcu design manual 14_COMP33_1.csv, DF.13 (3.3 V): Nwell tap to P+, 20 um.
    assert tech.tap_distance_limit("p") == 20.0
    assert tech.has_spacing_table()
    # gf180mcu design manual 06_Drawn_layer10.csv.
    assert dict(tech.layers) == {
        "active": (22, 0), "nwell": (21, 0), "deep_nwell": (12, 0), "pwell": (204, 0),
        "poly": (30, 0), "nplus": (32, 0), "pplus": (31, 0), "contact": (33, 0),
        "metal1": (34, 0), "via1": (35, 0), "metal2": (36, 0), "io_marker": (137, 5)}
    assert tech.layer("tap") is None  # the manual has no separate tap layer
    assert dict(tech.labels) == {"active": ((22, 10),), "poly": ((30, 10),), "metal1": ((34, 10),),
                                 "metal2": ((36, 10),)}
    # gf180mcu design manual IO.1 / IO.3: ring within 15 um; IO.2 / IO.4: width >= 2 um.
    assert tech.rules["io-guard-ring"]["max_gap"] == 15.0
    assert tech.rules["io-guard-ring"]["min_width"] == 2.0


# gf180mcu design manual section 14.3 (55_Latch-up_152.csv), LU.3 / LU.4 LV column
# (50 / 30 / 15 um by x), combined with DF.13 / DF.14 (20 um at 3.3 V): the stricter
# of the two at each breakpoint.
@pytest.mark.parametrize("spacing, expected", [
    (0.99, 15.0),  # x < 1.0: LU.3/LU.4 15, DF.13/DF.14 20 -> 15
    (1.0, 20.0),   # 1.0 <= x < 2.0: LU.3/LU.4 30, DF.13/DF.14 20 -> 20
    (1.99, 20.0),  # 1.0 <= x < 2.0: as above
    (2.0, 20.0),   # x >= 2.0: LU.3/LU.4 50, DF.13/DF.14 20 -> 20
])
@pytest.mark.parametrize("kind", ["n", "p"])
def test_gf180mcu_by_spacing_breakpoints(kind, spacing, expected):
    assert load_technology("gf180mcu").tap_distance_limit(kind, spacing) == expected


def test_sky130_published_values():
    tech = load_technology("sky130")
    # skywater-pdk docs/rules, layers/table-c4b-layer-description.csv: the areaid.ld 81:14
    # description implies a 6 um diffusion-to-tap distance outside marked areas.
    assert tech.tap_distance_limit("n") == tech.tap_distance_limit("p") == 6.0
    # skywater-pdk docs/rules gds_layers.csv: diff, tap, licon1, li1, mcon, met1, via, met2.
    assert tech.layer("active") == (65, 20) and tech.layer("tap") == (65, 44)
    assert tech.layer("contact") == (66, 44)
    assert [tech.layer(r) for r in ("metal1", "via1", "metal2", "via2", "metal3")] == [
        (67, 20), (67, 44), (68, 20), (68, 44), (69, 20)]
    assert [tech.layer(r) for r in ("nwell", "deep_nwell", "poly", "nplus", "pplus")] == [
        (64, 20), (64, 18), (66, 20), (93, 44), (94, 20)]
    # gds_layers.csv: li1 / met1 / met2 label purposes 67/5, 68/5, 69/5 and pin purposes
    # 67/16, 68/16, 69/16 ("Text and data").
    assert dict(tech.labels) == {"metal1": ((67, 5), (67, 16)), "metal2": ((68, 5), (68, 16)),
                                 "metal3": ((69, 5), (69, 16))}
    # skywater-pdk docs/rules: 81:6 marks pad diffusion for latch-up.
    assert tech.layer("io_marker") == (81, 6)
    assert ("tap", "contact", "metal1") in tech.connectivity
    # skywater-pdk rcx/resistance-values.tsv, nominal sheet resistances.
    e = tech.electrical
    assert (e.nwell_sheet, e.pwell_sheet, e.deep_nwell_sheet) == (1700.0, 3050.0, 2200.0)
    assert e.psub_sheet is None
    assert "io-guard-ring" not in tech.rules  # no published ring values


@pytest.mark.parametrize("name", ["gf180mcu", "sg13g2", "sky130"])
def test_published_preset_values_carry_a_citation(name):
    # Every value in the layer, label, rule and electrical tables of a published preset
    # has a comment on its line or on the lines just above it.
    text = (resources.files("latchwatch.server.config") / "technologies" / f"{name}.toml").read_text()
    section, comment_above = "", False
    for line in text.splitlines():
        stripped = line.strip()
        if stripped.startswith("["):
            section = stripped.split("]")[0].strip("[")
            comment_above = "#" in stripped
        elif stripped.startswith("#"):
            comment_above = True
        elif re.match(r"[\w-]+\s*=", stripped) or stripped.startswith("{"):
            if section.split(".")[0] in ("layers", "labels", "rules", "electrical"):
                assert "#" in stripped or comment_above, f"{name}.toml: {line!r}"
        elif not stripped:
            comment_above = False


def test_toml_syntax_error_names_file_line_and_column(tmp_path):
    path = write(tmp_path, "bad.toml", 'name = "x"\n\n[layers\nnwell = [1, 0]\n')
    err = load_error(str(path))
    assert (err.file, err.line) == (str(path), 3)
    assert err.column is not None
    assert str(err).startswith(f"{path}:3:{err.column}: expected valid TOML, got a syntax error")


def test_toml_error_at_end_of_document_points_at_last_line(tmp_path):
    path = write(tmp_path, "open.toml", 'name = "x"\nlimit = [1,\n')
    err = load_error(str(path))
    assert err.line == 2 and err.expected == "valid TOML"


def test_file_not_utf8(tmp_path):
    path = tmp_path / "latin.toml"
    path.write_bytes(b'name = "\xe9"\n')
    err = load_error(str(path))
    assert err.file == str(path) and "UTF-8" in err.expected


def test_missing_file(tmp_path):
    err = load_error("nothing-here.toml", tmp_path)
    assert err.file == str(tmp_path / "nothing-here.toml")
    assert "no such file" in str(err)
    assert "demo" in err.expected


def test_misspelt_builtin_name():
    err = load_error("sky13")
    assert err.suggestion == "sky130" and "did you mean 'sky130'" in str(err)


def test_validation_errors_name_the_file(tmp_path):
    path = write(tmp_path, "t.toml", 'extends = "demo"\n[rules.tap-distance]\nlimit = "20"\n')
    err = load_error(str(path))
    assert str(err) == (f"{path}: rules.tap-distance.limit: expected a positive number, "
                        "got '20'")


def test_missing_required_layer_from_file(tmp_path):
    path = write(tmp_path, "t.toml", 'name = "t"\n[layers]\nnwell = [1, 0]\n')
    err = load_error("t.toml", tmp_path)
    assert err.file == str(path) and err.key == "layers.active"


def test_extends_override_of_one_key_keeps_the_rest(tmp_path):
    write(tmp_path, "mine.toml", 'extends = "demo"\n[rules.tap-distance]\nlimit = 12.5\n')
    tech = load_technology("mine.toml", tmp_path)
    demo = load_technology("demo")
    assert tech.source == str(tmp_path / "mine.toml")
    assert tech.tap_distance_limit("n") == 12.5
    assert tech.name == demo.name and tech.layers == demo.layers
    assert tech.connectivity == demo.connectivity and tech.labels == demo.labels
    assert tech.rules["io-guard-ring"] == demo.rules["io-guard-ring"]
    assert tech.electrical == demo.electrical


def test_extends_path_is_relative_to_the_extending_file(tmp_path):
    write(tmp_path, "base/core.toml", 'extends = "sg13g2"\nname = "core"\n')
    write(tmp_path, "proj/chip.toml", 'extends = "../base/core.toml"\n'
                                      '[electrical]\nnwell_sheet = 900.0\n')
    tech = load_technology(str(tmp_path / "proj" / "chip.toml"))
    assert tech.name == "core"
    assert tech.layer("nwell") == (31, 0)
    assert tech.electrical.nwell_sheet == 900.0


def test_bad_extends_names_the_extending_file(tmp_path):
    path = write(tmp_path, "t.toml", 'extends = "dmo"\n')
    err = load_error(str(path))
    assert (err.file, err.key, err.got) == (str(path), "extends", "dmo")
    assert "built-in technology" in err.expected and err.suggestion == "demo"
    path = write(tmp_path, "u.toml", "extends = 3\n")
    err = load_error(str(path))
    assert err.key == "extends" and err.got == 3


def test_error_inside_extended_file_names_that_file(tmp_path):
    base = write(tmp_path, "base.toml", 'extends = "demo"\n[layers]\nmetal3 = [1]\n')
    write(tmp_path, "top.toml", 'extends = "base.toml"\n')
    err = load_error("top.toml", tmp_path)
    assert err.file == str(base) and err.key == "layers.metal3"


def test_extends_cycle(tmp_path):
    a = write(tmp_path, "a.toml", 'extends = "b.toml"\n')
    b = write(tmp_path, "b.toml", 'extends = "./a.toml"\n')
    err = load_error(str(a))
    assert err.key == "extends" and err.file == str(b)
    assert "without a cycle" in err.expected
    assert f"{a} -> {b} -> {tmp_path / './a.toml'}" in str(err)


def test_file_extending_itself(tmp_path):
    path = write(tmp_path, "self.toml", 'extends = "self.toml"\n')
    err = load_error(str(path))
    assert err.key == "extends" and err.file == str(path)


def test_builtin_name_wins_over_a_file_of_that_name(tmp_path):
    write(tmp_path, "demo", "not toml at all [")
    assert load_technology("demo", tmp_path).source == "built-in demo"


def test_describe_technology_lists_everything():
    text = describe_technology(load_technology("gf180mcu"))
    assert text.startswith("gf180mcu: ")
    assert "  io_marker   137/5" in text
    assert "  active - contact - metal1" in text
    assert ">= 1.00 um: 20.00 um" in text and ">= 0.00 um: 15.00 um" in text
    assert "nwell_sheet        not set" in text
    assert "vbe_on             0.7 V (the default)" in text


def test_tech_list_command():
    out = io.StringIO()
    assert tech_list_command(out) == 0
    lines = out.getvalue().splitlines()
    assert [line.split()[0] for line in lines] == sorted(PRESETS)
    assert "invented" in lines[0]


def test_tech_show_command():
    out, err = io.StringIO(), io.StringIO()
    assert tech_show_command("sky130", out, err) == 0
    assert "  tap         65/44" in out.getvalue() and err.getvalue() == ""
    out, err = io.StringIO(), io.StringIO()
    assert tech_show_command("nonesuch", out, err) == 2
    assert out.getvalue() == "" and "nonesuch" in err.getvalue()


def test_tech_check_command(tmp_path):
    good = write(tmp_path, "good.toml", 'extends = "demo"\nname = "good"\n')
    out, err = io.StringIO(), io.StringIO()
    assert tech_check_command(str(good), out, err) == 0
    assert out.getvalue() == f"{good}: ok: technology 'good', 12 layers, 4 rule tables\n"
    assert err.getvalue() == ""
    bad = write(tmp_path, "bad.toml", 'extends = "demo"\n[layers]\nnwel = [1, 0]\n')
    out, err = io.StringIO(), io.StringIO()
    assert tech_check_command(str(bad), out, err) == 2
    assert out.getvalue() == ""
    assert err.getvalue().startswith(f"{bad}: layers.nwel: expected a layer role")
    assert err.getvalue().rstrip().endswith("did you mean 'nwell'?")


def test_tech_show_gives_every_electrical_key_its_own_unit():
    """core_current is a current (A), not a sheet resistance; every key has one unit."""
    import io

    from latchwatch.analyzers.technology.model import ELECTRICAL_KEYS, ELECTRICAL_UNITS

    assert set(ELECTRICAL_UNITS) == set(ELECTRICAL_KEYS)
    out = io.StringIO()
    tech_show_command("demo", out)
    shown = {line.split()[0]: line for line in out.getvalue().splitlines() if line.startswith("  ") and
             line.split()[0] in ELECTRICAL_KEYS}
    assert "0.0001 A" in shown["core_current"] and "ohm/sq" not in shown["core_current"]
    assert "1e+03 ohm/sq" in shown["nwell_sheet"]
