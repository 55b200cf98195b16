"""invalid-geometry: a self-intersecting or degenerate polygon (it was repaired)."""

from __future__ import annotations

import numpy as np

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc

MESSAGE = ("polygon on layer {layer}/{datatype} is invalid ({reason}); it was repaired before checking: "
           "area {drawn:.4g} as drawn, {repaired:.4g} after the repair")


def check(ctx):
    """Findings for polygons that flattening had to repair."""
    flat = ctx.flat
    if flat is None or len(flat.invalid) == 0:
        return
    # One finding per drawn polygon, not per placed copy of it.
    cell = flat.instances.cell[flat.instance[flat.invalid]].astype(np.int64)
    key = (cell << 32) | flat.source_polygon[flat.invalid]
    _, first = np.unique(key, return_index=True)
    for k in np.sort(first):
        shape = int(flat.invalid[k])
        yield ctx.shape_finding(
            RULE, shape,
            MESSAGE.format(layer=flat.layer[shape], datatype=flat.datatype[shape], reason=flat.invalid_reason[k],
                           drawn=flat.invalid_area[k, 0], repaired=flat.invalid_area[k, 1]),
            bbox=_bounds(flat, shape),
        )


def _bounds(flat, shape):
    import shapely

    b = shapely.bounds(flat.polygons_at(shape))
    return None if np.isnan(b).any() else b


RULE = Rule(
    id="invalid-geometry",
    severity=Severity.WARNING,
    summary="A polygon is self-intersecting or degenerate; it was repaired.",
    doc=RuleDoc(
        flags=(
            "A polygon whose outline crosses itself, or that has no area (collinear or repeated points). The "
            "checker repairs it (the GEOS make-valid operation, keeping polygonal parts; a zero-area polygon "
            "becomes empty) and goes on, so the other findings still come; this one says the geometry was not "
            "what was drawn, and gives the area before and after the repair. A keyhole outline (a ring drawn "
            "as one polygon that meets itself along a zero-width cut, as GDSII draws every hole) is not "
            "flagged: its repair is the polygon with a hole and keeps the drawn area."
        ),
        why=(
            "A self-intersecting outline means different things to different tools: a mask writer may fill it "
            "one way and a checker another. A tap or well that exists in one reading and not the other is "
            "exactly how a latch-up defence silently disappears."
        ),
        example="cell.add(gdstk.Polygon([(0, 0), (2, 2), (2, 0), (0, 2)], layer=2))   # a bow tie",
        fix="Draw the outline in one direction without crossings, or split it into separate polygons.",
    ),
    check=check,
)
