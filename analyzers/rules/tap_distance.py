"""tap-distance: a device diffusion too far from the taps of its body."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.extraction.devices import DEVICE_KIND, KINDS, LIMIT_BASES, tap_distances
from latchwatch.analyzers.extraction.extract import SUBSTRATE, is_pwell_body
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc

NAMES = {"p": ("P+", "n-well tap"), "n": ("N+", "substrate tap")}
MESSAGE = "{what} is {value:.2f} um from the nearest {tap} (limit {limit:.2f} um{where})"
# How the message says what set the limit, by LIMIT_BASES entry.
WHERE = {
    "plain": "",
    "spacing": " for a well-to-diffusion spacing of {spacing:.2f} um",
    "relaxed": " in the low-tap-density area",
    "near_pad": " within {within:.2f} um of pad-connected {other}",
}
MESSAGE_NO_TAP = "{what} has no contacted {tap} in its body (limit {limit:.2f} um)"


def describe(kind: str, gated: bool) -> str:
    """How a message names a diffusion: P+ or N+, transistor diffusion when poly crosses it."""
    return f"{NAMES[kind][0]} {'transistor diffusion' if gated else 'diffusion'}"


def check(ctx):
    """Findings for device diffusions with a point farther than the limit from the nearest contacted tap."""
    exact = ctx.options.exact_devices
    results = ctx.memo(("tap-distance", exact), lambda: {k: tap_distances(ctx, k, exact) for k in KINDS})
    for kind in KINDS:
        r = results[kind]
        res = r.result
        # A floating n-well or isolated p-well gets its own finding (floating-well); its
        # devices get none here. Only the substrate is reported here as having no tap.
        candidates = np.flatnonzero(~res.within_limit & ~np.isnan(r.limit))
        candidates = candidates[np.isfinite(res.value[candidates]) | (r.pieces.body[candidates] == SUBSTRATE)]
        # One finding per drawn shape: its worst piece.
        order = candidates[np.lexsort((-np.nan_to_num(res.value[candidates], posinf=1e300), r.pieces.shape[candidates]))]
        first = np.r_[True, r.pieces.shape[order][1:] != r.pieces.shape[order][:-1]] if len(order) else []
        bounds = shapely.bounds(r.pieces.geoms)
        for i in order[first]:
            tap_name = NAMES[kind][1]
            if is_pwell_body(r.pieces.body[i]):
                tap_name = "p-well tap"
            what = describe(kind, bool(r.gated[i]))
            limit = float(r.limit[i])
            if not np.isfinite(res.value[i]):
                yield ctx.piece_finding(RULE, r.pieces, i, MESSAGE_NO_TAP.format(what=what, tap=tap_name, limit=limit),
                                        bbox=bounds[i], limit=limit, unit="um", device_kind=DEVICE_KIND[kind])
                continue
            basis = LIMIT_BASES[int(r.basis[i])]
            other = "n" if kind == "p" else "p"
            near = ctx.tech.rules.get("tap-distance", {}).get(f"near_pad_{kind}")
            where = WHERE[basis].format(spacing=r.spacing[i], other=NAMES[other][0],
                                        within=near.within if near is not None else 0.0)
            tap_shape = int(r.taps.shape[res.tap[i]])
            tap_xy = shapely.get_coordinates(
                shapely.shortest_line(r.taps.geoms[res.tap[i]], shapely.points(res.point[i]))
            )[0]
            yield ctx.piece_finding(
                RULE, r.pieces, i,
                MESSAGE.format(what=what, value=res.value[i], tap=tap_name, limit=limit, where=where),
                location=res.point[i], bbox=bounds[i], value=res.value[i], limit=limit, unit="um",
                related=(ctx.related_shape(tap_shape, f"nearest {tap_name}", tap_xy),),
                figures={"spacing_um": None if not np.isfinite(r.spacing[i]) else round(float(r.spacing[i]), 6),
                         "limit_basis": basis},
                device_kind=DEVICE_KIND[kind],
            )


RULE = Rule(
    id="tap-distance",
    severity=Severity.ERROR,
    summary="A point of a device diffusion lies farther than the limit from the nearest contacted tap of its body.",
    doc=RuleDoc(
        flags=(
            "Every P+ device diffusion in an n-well, and every N+ device diffusion in the p-body, whose "
            "farthest point lies farther than the technology's limit from the nearest contacted tap of the "
            "same body (the same n-well for P+, the substrate's p-taps for N+, or for N+ in a p-well isolated "
            "by a deep n-well that p-well's own p-taps). The limit is "
            "[rules.tap-distance] limit, limit_p / limit_n, or a by_spacing row chosen by the smallest "
            "well-to-diffusion spacing within spacing_within of the device; near_pad_p / near_pad_n tighten "
            "it near pad-connected diffusion of the other type, and relaxed loosens it in a marked "
            "low-tap-density area far from pads (docs/technology.md says how each applies; the finding's "
            "limit_basis names which did). The distance is the maximum over the whole diffusion, "
            "computed to 1 nm (a branch and bound on the distance function); the message names the farthest "
            "point and the related location the nearest tap."
        ),
        why=(
            "A P+ diffusion in an n-well, the n-well, the p-substrate and an N+ diffusion form a PNPN "
            "thyristor. The well resistance from a P+ diffusion to its n-well tap, and the substrate "
            "resistance from an N+ diffusion to its p-tap, shunt the base-emitter junctions of the parasitic "
            "bipolars. The farther the tap, the larger the shunt resistance, and the smaller the stray current "
            "that lifts a base by a junction turn-on voltage (about 0.6-0.7 V) and lets the pair regenerate "
            "into a supply-to-ground short."
        ),
        example=(
            "box(cell, PPLUS, 0, 0, 30, 4)\n"
            "box(cell, ACTIVE, 0, 0, 30, 4)        # P+ diffusion 30 um long\n"
            "box(cell, NPLUS, -3, 0, -1, 4)        # the only n-tap is at its left end\n"
            "box(cell, ACTIVE, -3, 0, -1, 4)\n"
            "box(cell, CONTACT, -2.5, 1.5, -1.5, 2.5)"
        ),
        fix=(
            "Add contacted taps so that no point of the diffusion is farther than the limit: a tap at each end "
            "of a long diffusion, a tap row every few cells in a standard-cell row, or butted taps beside the "
            "source. Splitting a long diffusion with taps between the fingers also works."
        ),
    ),
    check=check,
)
