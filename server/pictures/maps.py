"""Maps laid over a drawing, each an image over a box of the layout plus labels.

A map builder takes (check context, the top's findings, the layout's extent) and returns
MapImages; MAP_BUILDERS lists them in the order they are drawn. Today: the tap-distance
field over every body, and the sheet potential of each device the shunt estimate flagged.
A further estimate (an injection or carrier-transport map) is one more builder here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import shapely

from latchwatch.analyzers.electrical.potential import device_potential
from latchwatch.analyzers.extraction.extract import SUBSTRATE, pwell_body
from latchwatch.analyzers.extraction.tapdistance import TapIndex
from latchwatch.analyzers.model.findings import Finding

MAP_PIXELS = 480  # samples along the longer side of a map
POTENTIAL_MAPS = 6  # at most this many sheet potential maps per drawing
SHARE_SHOWN = 0.01  # taps collecting less than this fraction of the current get no label

# Our ramps: (position, (r, g, b)) stops, interpolated linearly.
DISTANCE_RAMP = ((0.0, (236, 246, 240)), (0.5, (126, 200, 172)), (1.0, (38, 108, 140)),
                 (1.0001, (252, 176, 64)), (2.0, (196, 36, 96)))
POTENTIAL_RAMP = ((0.0, (44, 38, 104)), (0.35, (70, 120, 190)), (0.7, (120, 200, 150)), (1.0, (250, 214, 80)))
NO_TAP = (110, 40, 120)  # a body with no contacted tap at all
ALPHA = 210


@dataclass
class MapImage:
    """One map: RGBA pixels (row 0 at the top, y falling) over ``box``, a legend and point labels."""
    key: str
    name: str
    box: tuple[float, float, float, float]
    rgba: np.ndarray  # (h, w, 4) uint8
    legend: list[tuple[tuple[int, int, int], str]]
    labels: list[tuple[float, float, str]] = field(default_factory=list)
    note: str = ""


def ramp(values: np.ndarray, stops) -> np.ndarray:
    """(n, 3) uint8 colours of ``values`` along the ramp ``stops``."""
    at = np.array([s[0] for s in stops])
    colours = np.array([s[1] for s in stops], float)
    v = np.clip(values, at[0], at[-1])
    return np.stack([np.interp(v, at, colours[:, c]) for c in range(3)], axis=1).round().astype(np.uint8)


def sample_grid(box, pixels: int = MAP_PIXELS):
    """Pixel centres over ``box``: (xy (h*w, 2) rows from the top, h, w)."""
    x0, y0, x1, y1 = box
    step = max(x1 - x0, y1 - y0) / pixels or 1.0
    w, h = max(1, math.ceil((x1 - x0) / step)), max(1, math.ceil((y1 - y0) / step))
    xs = x0 + (np.arange(w) + 0.5) * (x1 - x0) / w
    ys = y1 - (np.arange(h) + 0.5) * (y1 - y0) / h
    gx, gy = np.meshgrid(xs, ys)
    return np.c_[gx.ravel(), gy.ravel()], h, w


def body_at(ex, xy: np.ndarray) -> np.ndarray:
    """The body under each point: n-well index, isolated p-well body, SUBSTRATE, or None
    (as a huge sentinel) inside a deep n-well outside its p-wells."""
    points = shapely.points(xy)
    body = np.full(len(xy), SUBSTRATE, np.int64)
    off = np.iinfo(np.int64).max
    for regions, value in ((ex.deep_nwells, lambda k: np.full(len(k), off)), (ex.wells, lambda k: k),
                           (ex.pwells, pwell_body)):
        if len(regions):
            pi, ri = shapely.STRtree(regions).query(points, predicate="within")
            body[pi] = value(ri.astype(np.int64))
    return body


def tap_distance_maps(ctx, findings: list[Finding], extent) -> list[MapImage]:
    """Distance to the nearest contacted tap of the body, shaded against the body's limit."""
    ex, tech = ctx.extraction, ctx.tech
    xy, h, w = sample_grid(extent)
    body = body_at(ex, xy)
    taps = np.r_[ex.ntap.geoms[ex.ntap_contacted], ex.ptap.geoms[ex.ptap_contacted]]
    tap_body = np.r_[ex.ntap.body[ex.ntap_contacted], ex.ptap.body[ex.ptap_contacted]]
    distance, _ = TapIndex(taps, tap_body).nearest(xy, body)
    in_well = body >= 0
    limits = {kind: tech.tap_distance_limit(kind) for kind in ("p", "n")}
    fallback = float(np.max(distance[np.isfinite(distance)], initial=1.0))
    limit = np.where(in_well, limits["p"] or fallback, limits["n"] or fallback)
    colour = ramp(distance / limit, DISTANCE_RAMP)
    colour[~np.isfinite(distance)] = NO_TAP
    alpha = np.where(body == np.iinfo(np.int64).max, 0, ALPHA).astype(np.uint8)
    rgba = np.c_[colour, alpha].reshape(h, w, 4)
    shown = [f"{limits[k]:g} um" if limits[k] else "none" for k in ("p", "n")]
    legend = [(DISTANCE_RAMP[0][1], "at a tap"), (DISTANCE_RAMP[2][1], "at the limit"),
              (DISTANCE_RAMP[3][1], "beyond the limit"), (DISTANCE_RAMP[4][1], "twice the limit"),
              (NO_TAP, "no contacted tap in the body")]
    note = f"limit in n-wells {shown[0]}, in the p-body {shown[1]}"
    return [MapImage("m-tapdist", "tap-distance field", tuple(extent), rgba, legend, note=note)]


def _flagged_devices(ctx, findings: list[Finding]) -> list[tuple[str, int]]:
    """(kind, piece) of the devices with a shunt-resistance finding, worst first."""
    ex = ctx.extraction
    out = []
    for f in sorted((f for f in findings if f.rule == "shunt-resistance" and f.bbox), key=lambda f: -(f.value or 0)):
        kind = "p" if f.device_kind == "pdiff" else "n"
        pieces = ex.pdiff if kind == "p" else ex.ndiff
        match = np.flatnonzero(np.all(np.abs(shapely.bounds(pieces.geoms) - np.array(f.bbox)) < 1e-5, axis=1))
        if len(match):
            out.append((kind, int(match[0])))
    return list(dict.fromkeys(out))[:POTENTIAL_MAPS]


def sheet_potential_maps(ctx, findings: list[Finding], extent) -> list[MapImage]:
    """Per flagged device: its potential at 1 V over the sheet window and each tap's share of the current."""
    maps = []
    for n, (kind, piece) in enumerate(_flagged_devices(ctx, findings)):
        solved = device_potential(ctx, kind, piece)
        if solved is None:
            continue
        mesh, potential = solved.field.mesh, solved.field.potential
        xy, h, w = sample_grid(solved.box, MAP_PIXELS // 2)
        i = np.clip(np.searchsorted(mesh.x, xy[:, 0]) - 1, 0, len(mesh.x) - 2)
        j = np.clip(np.searchsorted(mesh.y, xy[:, 1]) - 1, 0, len(mesh.y) - 2)
        values = potential[j, i]
        colour = ramp(np.nan_to_num(values), POTENTIAL_RAMP)
        # Clear where the sheet sits at the taps' 0 V, so the geometry beneath stays readable.
        alpha = np.where(np.isnan(values), 0, ALPHA * np.clip(np.nan_to_num(values) * 3, 0, 1))
        alpha = alpha.astype(np.uint8)
        shares = solved.field.tap_current
        centres = shapely.get_coordinates(shapely.point_on_surface(solved.taps)) if len(solved.taps) else np.zeros((0, 2))
        labels = [(float(x), float(y), f"{share:.0%}") for (x, y), share in zip(centres, shares, strict=True)
                  if share >= SHARE_SHOWN]
        what = "P+" if kind == "p" else "N+"
        ohm = solved.field.resistance
        legend = [(POTENTIAL_RAMP[0][1], "0 V (taps)"), (POTENTIAL_RAMP[-1][1], "1 V (device)")]
        note = (f"{what} device at 1 V, its taps at 0 V; sheet model R = {ohm:.3g} ohm; labels: share of the "
                "current each tap collects")
        maps.append(MapImage(f"m-sheet{n}", f"sheet potential, {what} device {n + 1}", solved.box,
                             np.c_[colour, alpha].reshape(h, w, 4), legend, labels, note))
    return maps


MAP_BUILDERS = (tap_distance_maps, sheet_potential_maps)


def build_maps(ctx, findings: list[Finding], extent) -> list[MapImage]:
    """Every builder's maps for one checked top."""
    return [m for builder in MAP_BUILDERS for m in builder(ctx, findings, extent)]
