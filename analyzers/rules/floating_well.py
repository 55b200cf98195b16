"""floating-well: an n-well, or a p-well isolated by a deep n-well, that holds a device
diffusion but has no contacted tap."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.extraction.extract import is_pwell_body, pwell_index
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc

MESSAGE = "n-well holds {n} P+ {noun} but no contacted n-tap{extra}"
MESSAGE_PWELL = "isolated p-well holds {n} N+ {noun} but no contacted p-tap{extra}"


def _untied(n_regions, device_body, tap_body, tap_contacted):
    """(devices per region, uncontacted taps per region, regions with devices and no contacted tap)."""
    devices = np.bincount(device_body, minlength=n_regions)
    tied = np.zeros(n_regions, dtype=bool)
    tied[tap_body[tap_contacted]] = True
    uncontacted = np.bincount(tap_body[~tap_contacted], minlength=n_regions)
    return devices, uncontacted, np.flatnonzero((devices > 0) & ~tied)


def _finding(ctx, template, kind_tap, region, region_shape, first_device, n, n_bare, device_text):
    extra = f"; its {n_bare} {kind_tap}{'s' if n_bare > 1 else ''} enclose no contact" if n_bare else ""
    return ctx.shape_finding(
        RULE, region_shape,
        template.format(n=n, noun="diffusion" if n == 1 else "diffusions", extra=extra),
        location=shapely.get_coordinates(shapely.point_on_surface(region))[0],
        bbox=shapely.bounds(region), value=None,
        related=(ctx.related_shape(first_device, device_text),),
        figures={"devices": n},
    )


def check(ctx):
    """Findings for wells and isolated p-wells that hold device diffusions but no contacted tap."""
    ex = ctx.extraction
    if len(ex.wells):
        devices, bare, untied = _untied(len(ex.wells), ex.pdiff.body, ex.ntap.body, ex.ntap_contacted)
        for w in untied:
            first = int(ex.pdiff.shape[np.flatnonzero(ex.pdiff.body == w)[0]])
            yield _finding(ctx, MESSAGE, "n-tap", ex.wells[w], int(ex.well_shapes[w][0]), first,
                           int(devices[w]), int(bare[w]), "P+ diffusion in this well")
    if len(ex.pwells):
        in_n = is_pwell_body(ex.ndiff.body)
        in_p = is_pwell_body(ex.ptap.body)
        devices, bare, untied = _untied(
            len(ex.pwells), pwell_index(ex.ndiff.body[in_n]), pwell_index(ex.ptap.body[in_p]),
            ex.ptap_contacted[in_p])
        for k in untied:
            members = np.flatnonzero(in_n)[pwell_index(ex.ndiff.body[in_n]) == k]
            first = int(ex.ndiff.shape[members[0]])
            yield _finding(ctx, MESSAGE_PWELL, "p-tap", ex.pwells[k], int(ex.pwell_shapes[k][0]), first,
                           int(devices[k]), int(bare[k]), "N+ diffusion in this p-well")


RULE = Rule(
    id="floating-well",
    severity=Severity.ERROR,
    summary="A well (or isolated p-well) holds a device diffusion but no contacted tap.",
    doc=RuleDoc(
        flags=(
            "Each merged n-well region that holds at least one P+ device diffusion but no n-tap that encloses "
            "a contact, and each p-well isolated by a deep n-well that holds an N+ device diffusion but no "
            "contacted p-tap of its own (the substrate's taps do not reach through the isolation). Their "
            "devices get no tap-distance finding: the well has no tap to measure to. A well with no device in "
            "it is not flagged here (it injects nothing); an empty isolated p-well without a tie is an "
            "isolation-tie finding."
        ),
        why=(
            "An untied n-well floats: its potential is set by leakage and coupling, and its resistance to the "
            "supply is effectively unbounded. The base of the parasitic vertical PNP is then free to move, so "
            "the smallest disturbance (a supply step, a drain swinging past the rail) can forward-bias the "
            "P+ junction and start the PNPN loop. An isolated p-well without its own tie is the same defect "
            "one level down: the base of the lateral NPN under its N+ devices floats."
        ),
        example=(
            "box(cell, NWELL, 0, 0, 10, 10)\n"
            "box(cell, PPLUS, 2, 2, 8, 4)\n"
            "box(cell, ACTIVE, 2, 2, 8, 4)   # P+ device, but no n-tap anywhere in the well"
        ),
        fix=(
            "Draw an n-tap (N+ diffusion in the well) with a contact, and connect it to the supply; in an "
            "isolated p-well draw a contacted p-tap and connect it to its ground."
        ),
    ),
    check=check,
)
