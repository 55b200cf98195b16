"""uncontacted-tap: a tap diffusion with no contact in it."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc

MESSAGE = "{kind} encloses no contact; it is not counted as a tap"


def check(ctx):
    """Findings for tap diffusions that enclose no contact."""
    ex = ctx.extraction
    for kind, pieces, contacted in (("n-tap", ex.ntap, ex.ntap_contacted), ("p-tap", ex.ptap, ex.ptap_contacted)):
        bare = np.flatnonzero(~contacted)
        if len(bare) == 0:
            continue
        # One finding per drawn shape.
        _, first = np.unique(pieces.shape[bare], return_index=True)
        bounds = shapely.bounds(pieces.geoms)
        for i in bare[first]:
            yield ctx.piece_finding(
                RULE, pieces, i, MESSAGE.format(kind=kind),
                location=shapely.get_coordinates(shapely.point_on_surface(pieces.geoms[i]))[0],
                bbox=bounds[i],
            )


RULE = Rule(
    id="uncontacted-tap",
    severity=Severity.WARNING,
    summary="A tap diffusion encloses no contact; it is not counted as a tap.",
    doc=RuleDoc(
        flags=(
            "An n-tap (N+ diffusion in an n-well) or p-tap (P+ diffusion outside every n-well, or the tap layer "
            "where the technology has one) that no contact overlaps. Such a tap is ignored by tap-distance and "
            "floating-well, so this finding often explains theirs."
        ),
        why=(
            "A tap only ties its body when metal reaches it through a contact. Without one the diffusion is an "
            "island: the well or substrate under it still has no low-resistance path to its supply, and the "
            "shunt resistances of the parasitic bipolars stay as large as if the tap were not there."
        ),
        example=(
            "box(cell, NPLUS, 0, 0, 2, 2)\n"
            "box(cell, ACTIVE, 0, 0, 2, 2)   # an n-tap with no CONTACT shape on it"
        ),
        fix="Add at least one contact inside the tap (several along a long tap) and connect it to the supply.",
    ),
    check=check,
)
