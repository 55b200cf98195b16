"""The shunt estimate on layouts (analyzers/electrical/shunt.py), the shunt-resistance rule, the
electrical technology keys it reads, and its figures in the devices table and hover."""

import copy
import dataclasses
import re
import sys
import threading

import numpy as np
import pytest

from latchwatch.analyzers import parallel
from latchwatch.analyzers.context import CheckContext, CheckOptions
from latchwatch.analyzers.electrical import shunt
from latchwatch.analyzers.electrical.mobility import sheet_resistance
from latchwatch.analyzers.electrical.shunt import shunt_estimates, si
from latchwatch.analyzers.electrical.window_memo import SOLVED_WINDOWS
from latchwatch.analyzers.extraction.devices import device_table
from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.rules.shunt_resistance import RULE
from latchwatch.analyzers.technology.model import TechnologyError, technology_from_mapping
from latchwatch.server.config.techfiles import load_technology
from latchwatch.server.lsp import convert as lsp_convert

from builders import ACTIVE, CONTACT, NPLUS, NWELL, PPLUS, CellBuilder, GdstkAdder, layout, outcome
from locations import BENCH

sys.path.insert(0, str(BENCH))
import gen_row  # noqa: E402  (the benchmark's row generator draws the row layouts here too)

IO_MARKER = (12, 0)  # demo technology


@pytest.fixture(scope="module")
def demo():
    return load_technology("demo")


def tech_with(demo, **electrical):
    data = copy.deepcopy(demo.to_mapping())
    for key, value in electrical.items():
        if value is None:
            data["electrical"].pop(key, None)
        else:
            data["electrical"][key] = value
    return technology_from_mapping(data, "test.toml")


def context(cell, tech):
    captured = layout(cell)
    return CheckContext(outcome(captured), tech, CheckOptions(), flatten(captured, 0))


def n_tap(cell, x0, y0, x1, y1):
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    return cell.rect(ACTIVE, x0, y0, x1, y1).rect(NPLUS, x0, y0, x1, y1).rect(CONTACT, cx - 0.2, cy - 0.2, cx + 0.2, cy + 0.2)


def p_tap(cell, x0, y0, x1, y1):
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    return cell.rect(ACTIVE, x0, y0, x1, y1).rect(PPLUS, x0, y0, x1, y1).rect(CONTACT, cx - 0.2, cy - 0.2, cx + 0.2, cy + 0.2)


def well_strip(device_x0, device_x1, device_y=(0.0, 5.0), marker=False):
    """A 60 x 5 n-well with a full-width n-tap at x = 0..1.5 and a P+ device."""
    c = CellBuilder("TOP").rect(NWELL, 0, 0, 60, 5)
    n_tap(c, 0, 0, 1.5, 5)
    c.rect(ACTIVE, device_x0, device_y[0], device_x1, device_y[1]).rect(PPLUS, device_x0, device_y[0], device_x1, device_y[1])
    if marker:
        c.rect(IO_MARKER, device_x0 - 1, -1, device_x1 + 1, 6)
    return c


def test_strip_well_through_the_pipeline(demo):
    ctx = context(well_strip(55, 58), demo)
    [finding] = list(RULE.check(ctx))
    # R = Rs L / W (REFERENCE-VALUES.md, Physics) between the tap edge at 1.5 and the device
    # edge at 55, both spanning the 5 um well: 1000 * 53.5 / 5 = 10.7 kohm, within 2%.
    assert finding.value == pytest.approx(10700, rel=0.02)
    assert finding.limit == pytest.approx(0.7 / 1e-4) and finding.unit == "ohm"
    assert finding.rule == "shunt-resistance" and finding.severity.label == "warning"
    # Three significant figures with SI prefixes (docs/performance.md), labelled an estimate (docs/caution.md).
    assert re.search(r"resistance to its taps 10\.[67] kohm \(sheet model\)", finding.message)
    assert re.search(r"so 6[56]\.\d uA through it forward-biases the junction", finding.message)
    assert "below the 100 uA a core device must withstand" in finding.message
    assert finding.figures["basis"] == "estimate from a sheet model"
    assert finding.figures["trigger_current_a"] == pytest.approx(0.7 / finding.value)
    assert finding.related[0].message == "nearest n-well tap"


def test_near_tap_passes_and_the_table_has_the_figures(demo):
    ctx = context(well_strip(10, 13), demo)
    assert list(RULE.check(ctx)) == []
    [row] = device_table(ctx)
    # Strip again: (10 - 1.5) / 5 squares.
    assert row.shunt_ohm == pytest.approx(1000 * 8.5 / 5, rel=0.02)
    assert row.trigger_current_a == pytest.approx(0.7 / row.shunt_ohm, rel=1e-5)


def test_pad_connected_devices_are_left_to_injection_bias(demo):
    # A pad-connected device far above vbe_on / injection_current (7 ohm) gets no
    # shunt-resistance finding: injection-bias follows its injected current instead; its
    # devices row keeps the shunt figure.
    ctx = context(well_strip(10, 13, marker=True), demo)
    assert list(RULE.check(ctx)) == []
    [row] = device_table(ctx)
    assert row.shunt_ohm > 7.0 and row.injection is not None


def test_core_current_key_moves_the_limit(demo):
    assert list(RULE.check(context(well_strip(10, 13), tech_with(demo, core_current=1e-3)))) != []
    assert list(RULE.check(context(well_strip(55, 58), tech_with(demo, core_current=1e-5)))) == []


def test_documented_default_core_current_passes_a_device_20um_down_a_5um_well(demo):
    # The rule documentation's reason for the 100 uA default: a 2 um device 20 um from its
    # tap in a 5 um wide 1 kohm/sq well has R of about 4 kohm, and passes.
    c = CellBuilder("TOP").rect(NWELL, 0, 0, 40, 5)
    n_tap(c, 0, 0, 1.5, 5)
    c.rect(ACTIVE, 21.5, 1.5, 23.5, 3.5).rect(PPLUS, 21.5, 1.5, 23.5, 3.5)
    ctx = context(c, demo)
    assert list(RULE.check(ctx)) == []
    assert 3500 < shunt_estimates(ctx, exact=True)["p"].ohm[0] < 5000


def test_no_sheet_value_no_estimate(demo):
    ctx = context(well_strip(55, 58), tech_with(demo, nwell_sheet=None, psub_sheet=None))
    assert list(RULE.check(ctx)) == []
    [row] = device_table(ctx)
    assert row.shunt_ohm is None and row.trigger_current_a is None


def test_sheet_from_doping_and_depth(demo):
    doped = tech_with(demo, nwell_sheet=None, nwell_doping=1e17, nwell_depth=2.0)
    given = tech_with(demo, nwell_sheet=sheet_resistance(1e17, 2.0, "n"))
    r_doped = shunt_estimates(context(well_strip(20, 23), doped), exact=True)["p"].ohm[0]
    r_given = shunt_estimates(context(well_strip(20, 23), given), exact=True)["p"].ohm[0]
    assert r_doped == pytest.approx(r_given, rel=1e-9)


def test_floating_well_gets_no_shunt_finding(demo):
    c = CellBuilder("TOP").rect(NWELL, 0, 0, 20, 5)
    c.rect(ACTIVE, 5, 1, 8, 4).rect(PPLUS, 5, 1, 8, 4)
    ctx = context(c, demo)
    assert list(RULE.check(ctx)) == []
    assert device_table(ctx)[0].shunt_ohm is None


def test_substrate_island_inside_a_well_ring_has_no_path(demo):
    # The substrate sheet has the wells cut out: an island fenced by an n-well ring with no
    # p-tap of its own reaches no tap (the rule documentation states this assumption).
    c = CellBuilder("TOP")
    for box in ((0, 0, 20, 4), (0, 16, 20, 20), (0, 4, 4, 16), (16, 4, 20, 16)):
        c.rect(NWELL, *box)
    n_tap(c, 1, 1, 3, 3)
    c.rect(ACTIVE, 9, 9, 11, 11).rect(NPLUS, 9, 9, 11, 11)
    p_tap(c, 25, 9, 27, 11)
    ctx = context(c, demo)
    [finding] = list(RULE.check(ctx))
    assert "no path through the substrate sheet" in finding.message and finding.value is None
    assert device_table(ctx)[0].shunt_ohm is None


def row_context(tech, rows=3, groups=4):
    c = CellBuilder("ROWS")
    for row in range(rows):
        gen_row.draw_row(GdstkAdder(c), row, groups)
    return context(c, tech)


def test_windows_agree_with_whole_bodies_and_repeat_cells_are_solved_once(demo, monkeypatch):
    whole = shunt_estimates(row_context(demo), exact=True)
    SOLVED_WINDOWS.clear()  # windows an earlier test solved would not be solved again
    solves = []
    real_solve = shunt.solve
    monkeypatch.setattr(shunt, "solve", lambda problem: solves.append(1) or real_solve(problem))
    monkeypatch.setattr(shunt, "WHOLE_BODY_DEVICES", 0)
    windowed = shunt_estimates(row_context(demo), exact=True)
    for kind in ("p", "n"):
        ratio = windowed[kind].ohm / whole[kind].ohm
        # Cutting the sheet at the window can only raise R; the two grids differ by a few %.
        assert ratio.min() > 0.96 and ratio.max() < 1.06, (kind, ratio.min(), ratio.max())
    assert 0 < len(solves) < len(whole["p"].ohm) + len(whole["n"].ohm)


def test_a_second_check_takes_its_windows_from_the_memo_and_a_new_grid_does_not(demo, monkeypatch):
    monkeypatch.setattr(shunt, "WHOLE_BODY_DEVICES", 0)
    SOLVED_WINDOWS.clear()
    cold = shunt_estimates(row_context(demo), exact=True)
    solves = []
    real_solve = shunt.solve
    monkeypatch.setattr(shunt, "solve", lambda problem: solves.append(1) or real_solve(problem))
    warm = shunt_estimates(row_context(demo), exact=True)
    assert solves == []
    for kind in ("p", "n"):
        assert np.array_equal(warm[kind].ohm, cold[kind].ohm, equal_nan=True)
    finer = tech_with(demo, sheet_grid=0.5)  # the default grid is adaptive (None)
    shunt_estimates(row_context(finer), exact=True)
    assert solves  # the grid step is part of a window's key


def test_both_kinds_side_by_side_give_what_one_after_the_other_gives(demo, monkeypatch):
    monkeypatch.setattr(shunt, "WHOLE_BODY_DEVICES", 0)
    SOLVED_WINDOWS.clear()
    serial = shunt_estimates(row_context(demo), exact=True)
    monkeypatch.setattr(shunt, "PARALLEL_DEVICES", 0)
    monkeypatch.setattr(parallel, "usable_cpus", lambda: 2)
    SOLVED_WINDOWS.clear()
    threads = []
    real = shunt._estimate_kind
    monkeypatch.setattr(shunt, "_estimate_kind", lambda *a, **k: threads.append(threading.current_thread().name)
                        or real(*a, **k))
    side_by_side = shunt_estimates(row_context(demo), exact=True)
    assert len(threads) == 2 and all(name.startswith("latchwatch-shunt") for name in threads)
    for kind in ("p", "n"):
        assert np.array_equal(side_by_side[kind].ohm, serial[kind].ohm, equal_nan=True)


def test_window_keys_see_translation_and_nothing_else():
    import shapely
    device = np.array([shapely.box(0, 0, 2, 2), shapely.box(100, 50, 102, 52), shapely.box(200, 0, 202, 2.5)],
                      dtype=object)
    boxes = np.array([[-5, -5, 7, 7], [95, 45, 107, 57], [195, -5, 207, 7]], float)
    taps = np.array([shapely.box(4, 0, 5, 1), shapely.box(104, 50, 105, 51), shapely.box(204, 0, 205, 1)], dtype=object)
    contents = shunt._WindowPieces(np.arange(3), np.full(3, 2), taps)
    keys = shunt.window_keys(device, boxes, shapely.bounds(device)[:, :2], contents)
    assert (keys[0] == keys[1]).all() and not (keys[0] == keys[2]).all()
    # The same size and contents, the window shifted against its device (clipped on the
    # other side): a substrate window's region is the window, so the key must differ.
    shifted = boxes[:2] + np.array([[0, 0, 0, 0], [2, 0, 2, 0]], float)
    pair = shunt.window_keys(device[:2], shifted, shapely.bounds(device[:2])[:, :2],
                             shunt._WindowPieces(np.arange(2), np.full(2, 2), taps[:2]))
    assert not (pair[0] == pair[1]).all()


@pytest.mark.parametrize("key, value, named, expected", [
    ("nwell_doping", 1e17, "electrical.nwell_depth", "depth in um"),
    ("nwell_depth", 2.0, "electrical.nwell_doping", "beside electrical.nwell_depth"),
    ("psub_depth", 10.0, "electrical.psub_doping", "psub_resistivity"),
    ("pwell_doping", 1e25, "electrical.pwell_doping", "Masetti"),
    ("core_current", -1.0, "electrical.core_current", "positive number"),
])
def test_electrical_key_errors_name_the_key(demo, key, value, named, expected):
    with pytest.raises(TechnologyError) as info:
        tech_with(demo, **{key: value})
    assert info.value.file == "test.toml" and info.value.key == named and expected in str(info.value)


def test_unknown_electrical_key_suggests_the_known_one(demo):
    with pytest.raises(TechnologyError, match="did you mean 'core_current'"):
        tech_with(demo, core_curent=1e-3)


def test_sheet_lookup_order(demo):
    e = tech_with(demo, psub_sheet=None, psub_resistivity=10.0, psub_depth=20.0).electrical
    assert e.sheet("psub") == pytest.approx(10.0 / 20e-4)  # rho / t, ohm cm over cm
    e = tech_with(demo, nwell_doping=1e17, nwell_depth=2.0).electrical
    assert e.sheet("nwell") == 1000.0  # a given sheet value wins over doping
    assert tech_with(demo, sheet_grid=0.25).electrical.sheet_grid == 0.25


def test_si_figures():
    assert [si(23500, "ohm"), si(2.98e-5, "A"), si(0.1, "A"), si(999.96, "ohm"), si(1.2, "V"), si(0, "A")] == [
        "23.5 kohm", "29.8 uA", "100 mA", "1.00 kohm", "1.20 V", "0 A"]


def test_hover_shows_the_estimates(demo):
    ctx = context(well_strip(55, 58), demo)
    rows = [dataclasses.replace(d, file="/proj/cell.py", line=7) for d in device_table(ctx)]
    text = lsp_convert.hover_markdown("/proj/cell.py", 7, rows, [], lambda kind: 20.0)
    assert "shunt resistance to the taps (estimate from a sheet model): up to 10." in text
    assert re.search(r"forward-biases the junction: down to 6[56]\.\d uA", text)


def scattered_context(tech, seed=5):
    """Devices and taps at random spots in one n-well and in the substrate beside it."""
    rng = np.random.default_rng(seed)
    c = CellBuilder("TOP").rect(NWELL, 0, 0, 60, 12)
    for x, y in rng.uniform([1, 1], [56, 9], (6, 2)):
        n_tap(c, x, y, x + 1, y + 1.5)
    for x, y in rng.uniform([1, 1], [55, 8], (12, 2)):
        c.rect(ACTIVE, x, y, x + 2, y + 2.5).rect(PPLUS, x, y, x + 2, y + 2.5)
    for x, y in rng.uniform([1, 16], [56, 40], (5, 2)):
        p_tap(c, x, y, x + 1.5, y + 1)
    for x, y in rng.uniform([1, 16], [55, 38], (12, 2)):
        c.rect(ACTIVE, x, y, x + 3, y + 2).rect(NPLUS, x, y, x + 3, y + 2)
    return context(c, tech)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_channel_bound_is_above_the_estimate(demo, seed):
    # Thomson's principle makes the channel flow's resistance an upper bound on the true R;
    # the estimate lies within its documented 6% above the true R, so never above bound * 1.06.
    ctx = scattered_context(demo, seed)
    est = shunt_estimates(ctx, exact=True)
    regions = shunt.body_regions(ctx.extraction, "p"), shunt.body_regions(ctx.extraction, "n")
    for (kind, pieces), region in zip((("p", ctx.extraction.pdiff), ("n", ctx.extraction.ndiff)), regions, strict=False):
        bound = shunt.channel_bound(pieces, est[kind].taps, est[kind].sheet, region)
        finite = np.isfinite(bound)
        assert finite.any()
        assert np.all(est[kind].ohm[finite] <= bound[finite] * 1.06), kind


@pytest.mark.parametrize("core_current", [1e-4, 3e-4, 1e-3])
def test_pruning_keeps_the_findings(demo, core_current):
    tech = tech_with(demo, core_current=core_current)
    exact = CheckContext(outcome(None), tech, CheckOptions(exact_devices=True), scattered_context(tech).flat)
    pruned = CheckContext(outcome(None), tech, CheckOptions(exact_devices=False), exact.flat)
    assert [f.message for f in RULE.check(pruned)] == [f.message for f in RULE.check(exact)]
    skipped = sum(np.isnan(e.ohm).sum() for e in shunt_estimates(pruned).values())
    assert skipped > 0 or core_current > 1e-4


def test_merged_shunt_diagnostic_lists_the_other_figures_with_prefixes(demo):
    # Three diffusions drawn on one line, at three distances down the strip well.
    from latchwatch.analyzers.model.findings import Frame

    c = CellBuilder("TOP").rect(NWELL, 0, 0, 80, 5)
    n_tap(c, 0, 0, 1.5, 5)
    for x in (40, 55, 70):
        c.rect(ACTIVE, x, 0, x + 3, 5, stack=0).rect(PPLUS, x, 0, x + 3, 5)
    captured = layout(c, frames=[Frame("/proj/cell.py", 4, "<module>")], stacks=[(0,)], source="/proj/cell.py")
    ctx = CheckContext(outcome(captured, script="/proj/cell.py"), demo, CheckOptions(project_root="/proj"),
                       flatten(captured, 0))
    findings = list(RULE.check(ctx))
    assert len(findings) == 3 and {f.line for f in findings} == {4}
    by_file = lsp_convert.diagnostics_by_file(findings, device_table(ctx), "/proj/cell.py",
                                              lambda file, line: "box(cell, ACTIVE, x, 0, x + 3, 5)")
    (diagnostic,) = by_file["/proj/cell.py"]
    # Strip estimates (R = Rs L / W): 13.7, 10.7 and 7.70 kohm; the worst first.
    assert re.search(r"worst: P\+ diffusion: estimated n-well resistance to its taps 13\.\d kohm", diagnostic.message)
    assert re.search(r"others: 10\.\d kohm, 7\.\d\d kohm$", diagnostic.message)


def test_layouts_without_devices_or_shapes(demo):
    for cell in (CellBuilder("EMPTY"), n_tap(CellBuilder("TAPS").rect(NWELL, 0, 0, 5, 5), 1, 1, 3, 3)):
        ctx = context(cell, demo)
        assert list(RULE.check(ctx)) == [] and device_table(ctx) == []
