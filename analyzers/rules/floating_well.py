"""floating-well: an n-well that holds a device diffusion but has no contacted tap."""

from __future__ import annotations

import numpy as np
import shapely

from ..findings import Severity
from .base import Rule, RuleDoc

MESSAGE = "n-well holds {n} P+ {noun} but no contacted n-tap{extra}"


def check(ctx):
    if ctx.flat is None:
        return
    ex = ctx.extraction
    if len(ex.wells) == 0:
        return
    devices = np.bincount(ex.pdiff.body, minlength=len(ex.wells)) if len(ex.pdiff) else np.zeros(len(ex.wells), int)
    tied = np.zeros(len(ex.wells), dtype=bool)
    tied[ex.ntap.body[ex.ntap_contacted]] = True
    uncontacted = np.bincount(ex.ntap.body[~ex.ntap_contacted], minlength=len(ex.wells)) if len(ex.ntap) else np.zeros(len(ex.wells), int)
    for w in np.flatnonzero((devices > 0) & ~tied):
        n = int(devices[w])
        extra = f"; its {uncontacted[w]} n-tap{'s' if uncontacted[w] > 1 else ''} enclose no contact" if uncontacted[w] else ""
        first_device = int(ex.pdiff.shape[np.flatnonzero(ex.pdiff.body == w)[0]])
        well_shape = int(ex.well_shapes[w][0])
        yield ctx.shape_finding(
            RULE, well_shape,
            MESSAGE.format(n=n, noun="diffusion" if n == 1 else "diffusions", extra=extra),
            location=shapely.get_coordinates(shapely.point_on_surface(ex.wells[w]))[0],
            bbox=shapely.bounds(ex.wells[w]), value=None,
            related=(ctx.related_shape(first_device, "P+ diffusion in this well"),),
            figures={"devices": n},
        )


RULE = Rule(
    id="floating-well",
    severity=Severity.ERROR,
    summary="A well holds a device diffusion but no contacted tap.",
    doc=RuleDoc(
        flags=(
            "Each merged n-well region that holds at least one P+ device diffusion but no n-tap that encloses "
            "a contact. Its devices get no tap-distance finding: the well has no tap to measure to. A well "
            "with no device in it is not flagged (it injects nothing)."
        ),
        why=(
            "An untied n-well floats: its potential is set by leakage and coupling, and its resistance to the "
            "supply is effectively unbounded. The base of the parasitic vertical PNP is then free to move, so "
            "the smallest disturbance (a supply step, a drain swinging past the rail) can forward-bias the "
            "P+ junction and start the PNPN loop."
        ),
        example=(
            "box(cell, NWELL, 0, 0, 10, 10)\n"
            "box(cell, PPLUS, 2, 2, 8, 4)\n"
            "box(cell, ACTIVE, 2, 2, 8, 4)   # P+ device, but no n-tap anywhere in the well"
        ),
        fix="Draw an n-tap (N+ diffusion in the well) with a contact, and connect it to the supply.",
    ),
    check=check,
)
