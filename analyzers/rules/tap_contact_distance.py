"""tap-contact-distance: a contacted tap that reaches too far beyond its contacts."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.extraction.layers import layer_shapes
from latchwatch.analyzers.extraction.tapdistance import TapIndex, farthest_from_taps
from latchwatch.analyzers.layout import geometry as g
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc

MESSAGE = "{kind} reaches {value:.2f} um beyond its nearest contact (limit {limit:.2f} um)"


def check(ctx):
    """Findings for contacted taps with a point farther than the limit from every contact inside them."""
    limit = ctx.tech.rules.get("tap-contact-distance", {}).get("limit")
    if limit is None:
        return
    ex = ctx.extraction
    _, contact_shape = layer_shapes(ex.flat, ctx.tech, "contact")  # in the order of ex.contacts
    for kind, taps, contacted in (("n-tap", ex.ntap, ex.ntap_contacted), ("p-tap", ex.ptap, ex.ptap_contacted)):
        # A contact lands inside its tap, so no point of the tap is farther from it than
        # the tap's bounding-box diagonal: taps whose diagonal is within the limit pass.
        bounds = shapely.bounds(taps.geoms)
        diagonal = np.hypot(bounds[:, 2] - bounds[:, 0], bounds[:, 3] - bounds[:, 1])
        rows = np.flatnonzero(contacted & (diagonal > limit))
        if len(rows) == 0:
            continue
        # Each contact counts for the taps it overlaps, by the part inside each: the
        # distance is along the tap from where the contact lands on it.
        tap_of, contact_of = g.overlap_pairs(taps.geoms[rows], ex.contacts)
        landed = shapely.intersection(ex.contacts[contact_of], taps.geoms[rows][tap_of])
        found = farthest_from_taps(taps.geoms[rows], np.arange(len(rows)), TapIndex(landed, tap_of),
                                   np.full(len(rows), float(limit)), exact=ctx.options.exact_devices)
        over = np.flatnonzero(~found.within_limit)
        # One finding per drawn shape: its worst piece.
        order = over[np.lexsort((-found.value[over], taps.shape[rows[over]]))]
        first = np.r_[True, taps.shape[rows[order]][1:] != taps.shape[rows[order]][:-1]] if len(order) else []
        for k in order[first]:
            i = int(rows[k])
            nearest = landed[found.tap[k]]
            contact_xy = shapely.get_coordinates(shapely.shortest_line(nearest, shapely.points(found.point[k])))[0]
            yield ctx.piece_finding(
                RULE, taps, i, MESSAGE.format(kind=kind, value=found.value[k], limit=limit),
                location=found.point[k], bbox=bounds[i], value=found.value[k], limit=float(limit), unit="um",
                related=(ctx.related_shape(int(contact_shape[contact_of[found.tap[k]]]), "nearest contact",
                                           contact_xy),),
            )


RULE = Rule(
    id="tap-contact-distance",
    severity=Severity.ERROR,
    summary="A point of a contacted tap lies farther than the limit from the nearest contact inside it.",
    doc=RuleDoc(
        flags=(
            "Every contacted n-tap or p-tap (one diffusion however many shapes drew it) with a point farther "
            "than [rules.tap-contact-distance] limit from the nearest contact that lands on it, measured to 1 "
            "nm. The rule is off unless the technology sets the limit; the sg13g2 preset sets 6.00 um (its "
            "layout rules' LU.c, LU.c1, LU.d and LU.d1: the extension of a tie, abutted or standalone, beyond "
            "its contact)."
        ),
        why=(
            "Only the contacted part of a tap is tied to the supply through metal. The rest is diffusion, "
            "whose sheet resistance adds to the shunt between the well or substrate and its supply: a tap "
            "that runs far past its only contact is, at its far end, little better than no tap, and the "
            "parasitic bipolar beside that end turns on at a smaller stray current."
        ),
        example=(
            "box(cell, ACTIVE, 0, 0, 12, 1)\n"
            "box(cell, PPLUS, 0, 0, 12, 1)       # a p-tap 12 um long\n"
            "box(cell, CONTACT, 0.3, 0.3, 0.7, 0.7)  # one contact at its left end: 11.3 um to the right end"
        ),
        fix=(
            "Add contacts along the tap so that no point of it is farther than the limit from one (a contact "
            "every twice the limit, and one near each end), or shorten the tap."
        ),
    ),
    check=check,
)
