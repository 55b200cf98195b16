"""no-geometry: the run yielded no shape on the technology's layers, and the finding says why.

A warning, so that a gate does not pass a layout nobody checked: the script imported a
layout library latchwatch has no capture for, or drew only on layers the technology
does not name, or imported a layout library and drew nothing. A script that imports no
layout library and draws nothing (a helper module) gets an info.
"""

from __future__ import annotations

import numpy as np

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope
from latchwatch.analyzers.technology.derived import pairs as named_pairs

# The layout libraries whose shapes the child captures: gdstk, KLayout's database (under
# either name), and the frameworks built on them (gdsfactory 7 on gdstk, 8 and later on
# kfactory and klayout).
CAPTURED_LIBRARIES = frozenset({"gdstk", "klayout", "pya", "gdsfactory", "kfactory"})
MESSAGE = "script ran but drew no shapes on the layers of technology {tech}"
MESSAGE_UNCAPTURED = ("no capture for library {libraries}: the script imported a layout library latchwatch does not "
                      "capture, and nothing was captured, so nothing was checked")
MESSAGE_OTHER_LAYERS = ("shapes only on layers the technology {tech} does not name: {layers}; nothing was checked "
                        "(wrong layer numbers, or the wrong technology)")
LAYERS_SHOWN = 8  # layer/datatype pairs listed before "and N more"


def _pair_keys(layer, datatype) -> np.ndarray:
    """One int64 per (layer, datatype) pair, ordered as the pairs: 1-D keys sort far faster than rows."""
    return (np.asarray(layer, dtype=np.int64) << 32) | (np.asarray(datatype, dtype=np.int64) & 0xFFFFFFFF)


def _pairs_of_keys(keys: np.ndarray) -> np.ndarray:
    return np.stack([keys >> 32, (keys & 0xFFFFFFFF).astype(np.int32).astype(np.int64)], axis=1)


def drawn_pairs(layout) -> np.ndarray:
    """The distinct (layer, datatype) pairs of every polygon of every cell, sorted, as an (n, 2) array."""
    parts = [np.unique(_pair_keys(cell.poly_layer, cell.poly_datatype)) for cell in layout.cells if cell.polygon_count]
    return _pairs_of_keys(np.unique(np.concatenate(parts))) if parts else np.zeros((0, 2), dtype=np.int64)


def draws_any(layout, pairs) -> bool:
    """Whether some polygon of some cell is on one of ``pairs``, without listing what was drawn."""
    known = np.unique(_pair_keys(*np.array(sorted(pairs), dtype=np.int64).reshape(-1, 2).T))
    return any(np.isin(_pair_keys(cell.poly_layer, cell.poly_datatype), known).any()
               for cell in layout.cells if cell.polygon_count)


def layer_list(pairs: np.ndarray, shown: int = LAYERS_SHOWN) -> str:
    """``1/0, 5/0`` for the first ``shown`` pairs, then ``and N more``."""
    text = ", ".join(f"{layer}/{datatype}" for layer, datatype in pairs[:shown].tolist())
    return text + (f" and {len(pairs) - shown} more" if len(pairs) > shown else "")


def check(ctx):
    """One finding when a run that succeeded drew nothing on the technology's layers, saying why."""
    layout = ctx.outcome.layout
    if ctx.outcome.status != "ok" or layout is None:
        return
    known = {tuple(v) for v in ctx.tech.layers.values()}
    for expr in ctx.tech.derived.values():  # L/D layers a derived role names directly
        known |= named_pairs(expr)
    if known and draws_any(layout, known):
        return
    drawn = drawn_pairs(layout)
    uncaptured = [name for name in layout.imports if name not in CAPTURED_LIBRARIES]
    if uncaptured and not len(drawn):
        yield ctx.run_finding(RULE, MESSAGE_UNCAPTURED.format(libraries=", ".join(uncaptured)))
    elif len(drawn):
        yield ctx.run_finding(RULE, MESSAGE_OTHER_LAYERS.format(tech=ctx.tech.name, layers=layer_list(drawn)))
    elif layout.imports:
        yield ctx.run_finding(RULE, MESSAGE.format(tech=ctx.tech.name))
    else:  # no layout library, no shape: a helper module, not a layout that went missing
        yield ctx.run_finding(RULE, MESSAGE.format(tech=ctx.tech.name)).with_severity(Severity.INFO)


RULE = Rule(
    id="no-geometry",
    severity=Severity.WARNING,
    summary="The run produced no shapes on the technology's layers; the finding says why.",
    doc=RuleDoc(
        flags=(
            "A script that completed (or a layout file read) with no polygon on any layer the technology declares, "
            "with the reason: the script imported a layout library latchwatch has no capture for (phidl, gdspy, "
            "nazca, ...); or it drew only on other layer numbers (listed, the first 8); or it imported a layout "
            "library and drew nothing. Nothing was checked. A warning, so a gate does not pass it; an info when "
            "the script imports no layout library and draws nothing (a helper module)."
        ),
        why=(
            "Silence from a checker should mean the layout is clean, not that there was no layout. Layer "
            "numbers that do not match the technology file, or a library whose shapes are not captured, would "
            "hide every latch-up finding."
        ),
        example="cell.add(gdstk.rectangle((0, 0), (1, 1), layer=99))   # not a layer of the technology",
        fix=("Draw on the technology's layer numbers (latchwatch tech show NAME) or pass the right --tech; for a "
             "library without capture, write the layout to GDS and check that file."),
    ),
    check=check,
    scope=Scope.RUN,
)
