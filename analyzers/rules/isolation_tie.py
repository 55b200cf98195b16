"""isolation-tie: a deep n-well not tied through a contacted n-tap in an n-well touching
it, or an isolated p-well with no contacted p-tap (isolation in analyzers/extraction/extract.py)."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.extraction.connectivity import meeting_pairs
from latchwatch.analyzers.extraction.extract import is_pwell_body, pwell_index
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc

MESSAGE_NO_WELL = "deep n-well has no tie: no n-well touches it"
MESSAGE_UNTIED = "deep n-well has no tie: the {n} n-well{s} touching it hold{verb} no contacted n-tap"
MESSAGE_PWELL = "isolated p-well has no contacted p-tap{extra}"


def _where(region):
    return shapely.get_coordinates(shapely.point_on_surface(region))[0]


def check(ctx):
    """Findings for deep n-wells and isolated p-wells without a contacted tie."""
    ex = ctx.extraction
    if len(ex.deep_nwells) == 0:
        return
    tied_well = np.zeros(len(ex.wells), dtype=bool)
    tied_well[ex.ntap.body[ex.ntap_contacted]] = True
    w, d = meeting_pairs(ex.wells, ex.deep_nwells)
    tied = np.zeros(len(ex.deep_nwells), dtype=bool)
    tied[d[tied_well[w]]] = True
    for k in np.flatnonzero(~tied):
        touching = w[d == k]
        if len(touching) == 0:
            message, related = MESSAGE_NO_WELL, ()
        else:
            n = len(touching)
            message = MESSAGE_UNTIED.format(n=n, s="s" if n > 1 else "", verb="" if n > 1 else "s")
            related = (ctx.related_shape(int(ex.well_shapes[touching[0]][0]), "n-well touching it"),)
        yield ctx.shape_finding(RULE, int(ex.deep_nwell_shapes[k][0]), message, location=_where(ex.deep_nwells[k]),
                                bbox=shapely.bounds(ex.deep_nwells[k]), related=related)
    if len(ex.pwells) == 0:
        return
    in_p = is_pwell_body(ex.ptap.body)
    taps = pwell_index(ex.ptap.body[in_p])
    tied_p = np.zeros(len(ex.pwells), dtype=bool)
    tied_p[taps[ex.ptap_contacted[in_p]]] = True
    bare = np.bincount(taps[~ex.ptap_contacted[in_p]], minlength=len(ex.pwells))
    # A p-well with N+ devices and no tie is a floating-well finding, with its devices.
    devices = np.zeros(len(ex.pwells), dtype=bool)
    devices[pwell_index(ex.ndiff.body[is_pwell_body(ex.ndiff.body)])] = True
    # A p-well that is only the inside of an n-well ring and holds nothing needs no tie;
    # one drawn on the pwell layer, or holding taps, does.
    pwell_layer = ctx.tech.layer("pwell")
    derived = pwell_layer is None and "pwell" in ctx.tech.derived  # its shapes are all the layout's p-wells
    drawn = np.array([derived or pwell_layer is not None and (int(ctx.flat.layer[s[0]]), int(ctx.flat.datatype[s[0]]))
                      == tuple(pwell_layer) for s in ex.pwell_shapes], dtype=bool)
    for k in np.flatnonzero(~tied_p & ~devices & (drawn | (bare > 0))):
        extra = f"; its {bare[k]} p-tap{'s' if bare[k] > 1 else ''} enclose no contact" if bare[k] else ""
        yield ctx.shape_finding(RULE, int(ex.pwell_shapes[k][0]), MESSAGE_PWELL.format(extra=extra),
                                location=_where(ex.pwells[k]), bbox=shapely.bounds(ex.pwells[k]))


RULE = Rule(
    id="isolation-tie",
    severity=Severity.ERROR,
    summary="A deep n-well, or a p-well isolated by it, has no contacted tie.",
    doc=RuleDoc(
        flags=(
            "With a deep_nwell layer: every merged deep n-well region that no n-well with a contacted n-tap "
            "touches (the deep n-well is tied through the n-wells that meet it), and every p-well isolated "
            "over a deep n-well that has no contacted p-tap of its own. Isolated p-wells are the parts of "
            "drawn pwell shapes inside a deep n-well or, where the layout draws no pwell, the parts of a "
            "deep n-well not covered by n-well; such an undrawn p-well is flagged only when it holds a tap "
            "(one with no contact), since an empty one injects nothing. An isolated p-well that holds N+ "
            "devices and no tie is reported by floating-well instead, together with its devices. The N+ devices of an isolated "
            "p-well are measured by tap-distance against that p-well's own p-taps, never the substrate's."
        ),
        why=(
            "A deep n-well breaks the PNPN path between the devices above it and the substrate only if it "
            "sits at a fixed potential: a floating deep n-well is itself the base of a parasitic bipolar "
            "between the isolated p-well and the substrate, and couples to both. Likewise the p-well it "
            "isolates is cut off from the substrate's taps: without its own contacted tie its potential, and "
            "the base of every lateral NPN in it, floats."
        ),
        example=(
            "box(cell, DEEP_NWELL, 0, 0, 40, 40)\n"
            "box(cell, NWELL, -1, -1, 41, 3)   # part of the n-well ring round the deep n-well\n"
            "# ... but no n-tap with a contact anywhere in that ring"
        ),
        fix=(
            "Draw a contacted n-tap in the n-well ring that meets the deep n-well and connect it to the "
            "supply; give every isolated p-well a contacted p-tap connected to its ground."
        ),
    ),
    check=check,
)
