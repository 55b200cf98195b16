"""io-spacing: a pad-connected diffusion too close to a diffusion of the opposite type
(and a pad-connected N+ diffusion too close to an n-well that holds P+ devices)."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.extraction.nets import pad_connected
from latchwatch.analyzers.extraction.tapdistance import SLACK
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc
from latchwatch.analyzers.rules.tap_distance import describe

MESSAGE = "pad-connected {what} is {value:.2f} um from {target} (minimum {limit:.2f} um){extra}"
OPPOSITE = {"n": ("a P+ device diffusion", "nearest P+ device diffusion"),
            "p": ("an N+ device diffusion", "nearest N+ device diffusion")}
WELL = ("the edge of an n-well holding P+ devices", "nearest n-well holding P+ devices")


def _nearest(geoms: np.ndarray, targets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(distance, index) of the nearest target of each geometry (inf, -1 without targets)."""
    dist, index = np.full(len(geoms), np.inf), np.full(len(geoms), -1, np.int64)
    if len(targets) and len(geoms):
        (qi, ti), d = shapely.STRtree(targets).query_nearest(geoms, return_distance=True, all_matches=False)
        dist[qi], index[qi] = d, ti
    return dist, index


def check(ctx):
    """Findings for pad-connected diffusions closer than the minimum to the opposite device type."""
    minimum = ctx.tech.rules.get("io-spacing", {}).get("min")
    if minimum is None:
        return
    pads = pad_connected(ctx)
    ex = ctx.extraction
    for kind in ("n", "p"):
        devices = np.flatnonzero(pads[kind])
        if len(devices) == 0:
            continue
        pieces, others = (ex.ndiff, ex.pdiff) if kind == "n" else (ex.pdiff, ex.ndiff)
        gated = ex.ndiff_gated if kind == "n" else ex.pdiff_gated
        geoms = pieces.geoms[devices]
        d_opp, i_opp = _nearest(geoms, others.geoms)
        d_well, i_well = np.full(len(devices), np.inf), np.full(len(devices), -1, np.int64)
        if kind == "n" and len(ex.pdiff):
            # A well that is only a guard ring holds no P+ emitter: it forms no PNPN path.
            holding = np.unique(ex.pdiff.body)
            d_well, j = _nearest(geoms, ex.wells[holding])
            i_well = np.where(j >= 0, holding[np.maximum(j, 0)], -1)
        bounds = shapely.bounds(geoms)
        done = set()
        for n in np.argsort(np.minimum(d_opp, d_well), kind="stable"):
            shape = int(pieces.shape[devices[n]])
            if shape in done:
                continue
            if d_opp[n] < minimum - SLACK:
                value, (target, near_text), geom = d_opp[n], OPPOSITE[kind], others.geoms[i_opp[n]]
                target_shape = int(others.shape[i_opp[n]])
                extra = f"; {WELL[0]} is {d_well[n]:.2f} um away" if d_well[n] < d_opp[n] - SLACK else ""
            elif d_well[n] < minimum - SLACK:
                value, (target, near_text), geom = d_well[n], WELL, ex.wells[i_well[n]]
                target_shape, extra = int(ex.well_shapes[i_well[n]][0]), ""
            else:
                continue
            done.add(shape)
            line = shapely.get_coordinates(shapely.shortest_line(geoms[n], geom))
            what = describe(kind, bool(gated[devices[n]]))
            yield ctx.piece_finding(
                RULE, pieces, int(devices[n]), MESSAGE.format(what=what, value=value, target=target, limit=minimum, extra=extra),
                location=line[0], bbox=bounds[n], value=value, limit=minimum, unit="um",
                related=(ctx.related_shape(target_shape, near_text, line[1]),),
            )


RULE = Rule(
    id="io-spacing",
    severity=Severity.WARNING,
    summary="A pad-connected diffusion is closer than allowed to a diffusion of the opposite type.",
    doc=RuleDoc(
        flags=(
            "Every pad-connected device diffusion closer than [rules.io-spacing] min to the nearest device "
            "diffusion of the opposite type (P+ in an n-well for a pad-connected N+, N+ in the p-body for a "
            "pad-connected P+), and every pad-connected N+ diffusion closer than that to the edge of an "
            "n-well that holds a P+ device. Wells that hold no P+ device (an n-well guard ring, a deep "
            "n-well tie) are not counted: they form no PNPN path and are meant to be near. Taps are not "
            "counted either: the guard ring is meant to be close. Distances are exact (GEOS)."
        ),
        why=(
            "Current injected at a pad-connected N+ diffusion travels through the substrate as minority "
            "carriers; the nearer an n-well with a P+ emitter, the more of it reaches that well and the "
            "shorter the base of the lateral NPN, whose gain rises steeply as the base narrows. The same "
            "holds for holes injected by a pad-connected P+ into the substrate near N+ devices. Distance is "
            "what keeps the loop gain of the parasitic thyristor below one when the pin is driven past the "
            "rails."
        ),
        example=(
            "box(cell, NPLUS, 0, 0, 10, 4)\n"
            "box(cell, ACTIVE, 0, 0, 10, 4)          # output NMOS, drain on the pad\n"
            "box(cell, NWELL, 14, -4, 30, 8)         # the output PMOS's well, 4 um away (min 15)"
        ),
        fix=(
            "Move the opposite-type devices (and, for a pad-connected N+, the n-wells of P+ devices) at least "
            "the minimum away from the pad-connected diffusion; put the guard rings in the space between."
        ),
    ),
    check=check,
)
