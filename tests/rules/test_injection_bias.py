"""injection-bias in-process (analyzers/rules/injection_bias.py): the figures it reports,
the temperature key, and the same figures in the JSON row, the text table and the hover."""

import copy
import dataclasses

import numpy as np
import pytest

from latchwatch.analyzers.context import CheckContext, CheckOptions
from latchwatch.analyzers.electrical.trigger import describe_injection, injections
from latchwatch.analyzers.extraction.devices import device_table
from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.rules.injection_bias import RULE
from latchwatch.analyzers.technology.model import technology_from_mapping
from latchwatch.server.config.techfiles import load_technology
from latchwatch.server.lsp.convert import hover_markdown
from latchwatch.server.report.as_json import device_to_dict
from latchwatch.server.report.as_text import device_lines

from builders import ACTIVE, CONTACT, NPLUS, NWELL, PPLUS, CellBuilder, layout, outcome

IO_MARKER = (12, 0)  # demo.toml


@pytest.fixture(scope="module")
def demo():
    return load_technology("demo")


def tech_with(demo, **electrical):
    data = copy.deepcopy(demo.to_mapping())
    data["electrical"].update(electrical)
    return technology_from_mapping(data, "test.toml")


def tap(cell, implant, x0, y0, x1, y1):
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    return cell.rect(ACTIVE, x0, y0, x1, y1).rect(implant, x0, y0, x1, y1).rect(CONTACT, cx - 0.2, cy - 0.2,
                                                                                 cx + 0.2, cy + 0.2)


def injector_beside_a_well(gap):
    """A pad-marked N+ diffusion (10 x 4) with a p-tap beside it, ``gap`` um below an
    n-well (10 x 20) whose P+ diffusion sits 14 um from the well's only tap."""
    c = CellBuilder("TOP")
    c.rect(ACTIVE, 0, 0, 10, 4).rect(NPLUS, 0, 0, 10, 4).rect(IO_MARKER, 0, 0, 10, 4)
    tap(c, PPLUS, 12, 1, 14, 3)
    top = 4 + gap
    c.rect(NWELL, 0, top, 10, top + 20)
    c.rect(ACTIVE, 2, top + 2, 8, top + 4).rect(PPLUS, 2, top + 2, 8, top + 4)
    tap(c, NPLUS, 4, top + 17, 6, top + 19)
    return c


def context(cell, tech, exact=False):
    captured = layout(cell)
    return CheckContext(outcome(captured), tech, CheckOptions(exact_devices=exact), flatten(captured, 0))


def test_a_close_well_collects_and_its_emitter_is_forward_biased(demo):
    ctx = context(injector_beside_a_well(6.0), demo)
    [finding] = list(RULE.check(ctx))
    inj = injections(ctx)["n"][0]
    assert finding.value == pytest.approx(inj.worst_bias_v, rel=1e-5) and finding.value > 0.7
    assert finding.limit == 0.7 and finding.unit == "V"
    [well] = [c for c in inj.collected if c.kind == "n-well"]
    assert f"({well.fraction:.3g})" in finding.message and "100 mA" in finding.message
    # Conservation: collectors and recombination take the whole current.
    assert sum(c.fraction for c in inj.collected) == pytest.approx(1.0, abs=1e-6)
    # The emitter under the bias is the P+ diffusion; the bias sits at its corner nearest the injector.
    x, y = inj.worst_at
    assert 2 <= x <= 8 and 12 <= y <= 14
    # Farther away, less reaches the well (the exp(-d / L) decay, with sinks in between).
    far = injections(context(injector_beside_a_well(30.0), demo))["n"][0]
    assert [c.fraction for c in far.collected if c.kind == "n-well"][0] < well.fraction


def test_temperature_lowers_vbe_on_and_raises_the_bias(demo):
    cool = injections(context(injector_beside_a_well(40.0), demo))["n"][0]
    hot = injections(context(injector_beside_a_well(40.0), tech_with(demo, temperature=125.0)))["n"][0]
    assert hot.vbe_on_v == pytest.approx(0.5) and cool.vbe_on_v == pytest.approx(0.7)
    # Sheets x1.326 (GF180MCU n-well TC), electron length x0.825: the bias rises by the
    # sheet factor at most (fewer carriers arrive).
    assert cool.worst_bias_v < hot.worst_bias_v < 1.326 * cool.worst_bias_v * 1.0001


def test_the_same_figures_in_json_text_and_hover(demo):
    ctx = context(injector_beside_a_well(6.0), demo, exact=True)
    rows = device_table(ctx)
    [injector] = [d for d in rows if d.injection is not None]
    record = injector.injection
    assert set(record) >= {"current_a", "collected", "worst_bias_v", "worst_at"}
    assert {"kind", "fraction", "current_a"} <= set(record["collected"][0])
    as_json = device_to_dict(injector)
    assert as_json["injection"]["worst_bias_v"] == record["worst_bias_v"]
    assert "injection" not in device_to_dict(next(d for d in rows if d.injection is None))
    line = describe_injection(record)
    assert line in "\n".join(device_lines(rows))
    # The builders' shapes have no source line: give the injector's row one.
    placed = dataclasses.replace(injector, file="/proj/pad.py", line=7)
    hover = hover_markdown("/proj/pad.py", 7, [placed], [], lambda kind: None)
    assert line in hover
    assert record["loop"]["assumptions"] and np.isfinite(record["loop"]["gain_product"])
