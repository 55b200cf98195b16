"""Per-device figures shared by the tap-distance rule and the ``--devices`` table."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import shapely

from latchwatch.analyzers.electrical.shunt import shunt_estimates
from latchwatch.analyzers.electrical.trigger import injections
from latchwatch.analyzers.extraction.extract import (
    SUBSTRATE,
    Pieces,
    is_pwell_body,
    pwell_index,
    spacing_to_opposite_well,
)
from latchwatch.analyzers.extraction.layers import layer_shapes
from latchwatch.analyzers.extraction.nets import device_net_names, pad_connected
from latchwatch.analyzers.extraction.tapdistance import FarthestPoints, TapIndex, farthest_from_taps
from latchwatch.analyzers.layout import geometry as g
from latchwatch.analyzers.model.findings import Device
from latchwatch.analyzers.technology.rule_tables import (
    DEFAULT_SPACING_WITHIN,
    RELAXED_MARKER,
    NearPadLimit,
    RelaxedArea,
)

KINDS = ("p", "n")  # P+ in an n-well, N+ in the p-body
DEVICE_KIND = {"p": "pdiff", "n": "ndiff"}  # the name of each kind in findings and device rows
# What set a piece's tap-distance limit: limit / limit_n / limit_p, a by_spacing row, the
# relaxed marked area, or near_pad_n / near_pad_p.
LIMIT_BASES = ("plain", "spacing", "relaxed", "near_pad")


@dataclass
class KindResult:
    """Tap distances of one kind of device diffusion (P+ or N+), with the limits they were held to."""
    kind: str
    pieces: Pieces
    taps: Pieces  # contacted taps of the matching type
    gated: np.ndarray
    limit: np.ndarray  # per piece, nan when the technology sets none
    basis: np.ndarray  # per piece, the index in LIMIT_BASES of what set its limit
    spacing: np.ndarray
    result: FarthestPoints


def body_name(kind: str, body: int) -> str:
    """The name of a body in the devices table: psub, nwell#k or pwell#k."""
    if body == SUBSTRATE:
        return "psub"
    return f"pwell#{pwell_index(body) + 1}" if is_pwell_body(body) else f"nwell#{body + 1}"


def tap_distances(ctx, kind: str, exact: bool) -> KindResult:
    """Distance from each device diffusion of ``kind`` to the nearest contacted tap of its body."""
    ex, tech = ctx.extraction, ctx.tech
    pieces = ex.pdiff if kind == "p" else ex.ndiff
    gated = ex.pdiff_gated if kind == "p" else ex.ndiff_gated
    taps = ex.ntap.select(ex.ntap_contacted) if kind == "p" else ex.ptap.select(ex.ptap_contacted)
    spacing = np.full(len(pieces), np.nan)
    if tech.has_spacing_table():
        within = tech.rules["tap-distance"].get("spacing_within", DEFAULT_SPACING_WITHIN)
        spacing = spacing_to_opposite_well(ex, kind, within)
    limits, basis = _limits(ctx, kind, pieces, spacing)
    index = TapIndex(taps.geoms, taps.body)
    result = farthest_from_taps(pieces.geoms, pieces.body, index, limits, exact=exact)
    return KindResult(kind, pieces, taps, gated, limits, basis, spacing, result)


def _limits(ctx, kind: str, pieces: Pieces, spacing: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per piece, the tap distance it is held to and why (LIMIT_BASES): the plain or
    spacing-table limit, the relaxed limit of a marked low-tap-density area far from pads,
    or the stricter limit near a pad-connected diffusion of the other kind."""
    ex, tech = ctx.extraction, ctx.tech
    table = tech.rules.get("tap-distance", {})

    def limit_at(s: float) -> float:
        value = tech.tap_distance_limit(kind, None if not np.isfinite(s) else float(s))
        return np.nan if value is None else value

    # Without a spacing table every piece has the same limit (spacing is all nan).
    limits = np.array([limit_at(s) for s in spacing] if tech.has_spacing_table()
                      else [limit_at(np.nan)] * len(pieces), dtype=float)
    basis = np.where(np.isfinite(spacing), LIMIT_BASES.index("spacing"), LIMIT_BASES.index("plain"))
    relaxed: RelaxedArea | None = table.get("relaxed")
    near: NearPadLimit | None = table.get(f"near_pad_{kind}")
    if (relaxed is None and near is None) or len(pieces) == 0:
        return limits, basis
    pads = pad_connected(ctx)
    pad_geoms = {k: (ex.ndiff if k == "n" else ex.pdiff).geoms[pads[k]] for k in KINDS}
    if relaxed is not None:
        marker, _ = layer_shapes(ex.flat, tech, RELAXED_MARKER)
        inside = (shapely.covered_by(pieces.geoms, shapely.union_all(marker)) if len(marker)
                  else np.zeros(len(pieces), dtype=bool))
        near_pads = g.within_distance_any(pieces.geoms, np.concatenate(list(pad_geoms.values())),
                                          relaxed.pad_clearance)
        take = inside & ~near_pads
        limits[take], basis[take] = relaxed.limit, LIMIT_BASES.index("relaxed")
    if near is not None:
        other = "n" if kind == "p" else "p"
        take = g.within_distance_any(pieces.geoms, pad_geoms[other], near.within) & ~(limits <= near.limit)
        limits[take], basis[take] = near.limit, LIMIT_BASES.index("near_pad")
    return limits, basis


def device_table(ctx) -> list[Device]:
    """One Device row per device diffusion of the flattened top cell, with its tap distance and shunt figures."""
    rows = []
    for kind in KINDS:
        r = ctx.memo(("tap-distance", True), lambda: {k: tap_distances(ctx, k, True) for k in KINDS})[kind]
        bounds = shapely.bounds(r.pieces.geoms)
        net_names = device_net_names(ctx, kind)
        shunt = shunt_estimates(ctx, exact=True)[kind]
        injected = injections(ctx)[kind]
        ohm, trigger = _finite(shunt.ohm), _finite(shunt.trigger)
        located = ctx.provenance.locate_shapes(r.pieces.shape)
        values, bodies = r.result.value.tolist(), r.pieces.body.tolist()
        for i, (loc, box, value) in enumerate(zip(located, bounds.tolist(), values, strict=True)):
            rows.append(Device(
                kind=DEVICE_KIND[kind], cell=loc["cell"],
                bbox=tuple(round(v, 6) for v in box), file=loc["file"], line=loc["line"],
                body=body_name(kind, bodies[i]),
                tap_distance_um=None if not math.isfinite(value) else round(value, 6),
                net=net_names[i], shunt_ohm=ohm[i], trigger_current_a=trigger[i], corner=ctx.outcome.corner,
                injection=injected[i].record() if i in injected else None,
            ))
    return rows


def _finite(values: np.ndarray) -> list[float | None]:
    """Figures for the table: None where unknown (no sheet value) or unbounded (no tap)."""
    return [float(f"{v:.6g}") if np.isfinite(v) else None for v in values]
