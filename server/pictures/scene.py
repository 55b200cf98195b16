"""What a page draws of one checked top, taken from its check context before the context
is dropped: the shapes of every drawn layer, the extracted wells, diffusions and taps,
and the maps (server/pictures/maps.py). Plain arrays only, so a run keeps no flat layout.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import shapely

from latchwatch.analyzers.extraction.nets import pad_connected
from latchwatch.analyzers.layout.geometry import axis_aligned_rectangles
from latchwatch.analyzers.model.findings import Finding
from latchwatch.server.pictures.maps import MapImage, build_maps

# Extracted layers drawn over the drawn ones: (key, name shown, attribute of the Extraction).
EXTRACTED = (
    ("x-pdiff", "P+ device diffusion (extracted)", "pdiff"),
    ("x-ndiff", "N+ device diffusion (extracted)", "ndiff"),
    ("x-ntap", "n-tap, contacted (extracted)", "ntap"),
    ("x-ptap", "p-tap, contacted (extracted)", "ptap"),
    ("x-bare", "tap without contact (extracted)", None),
    ("x-pad", "pad-connected device (extracted)", "pad"),
)


@dataclass
class LayerShapes:
    """The shapes of one layer: rectangles as (n, 4) boxes, the others as polygons."""
    key: str  # "L/D" of a drawn layer, or one of EXTRACTED's keys
    name: str
    role: str | None  # the technology's role of a drawn layer ("nwell", "active"...), or the extracted key
    rects: np.ndarray  # (n, 4) x0, y0, x1, y1
    polygons: np.ndarray  # shapely polygons that are not axis-aligned rectangles

    @property
    def count(self) -> int:
        return len(self.rects) + len(self.polygons)


@dataclass
class Drawing:
    """One checked top of one run, ready for the page."""
    top: str
    extent: tuple[float, float, float, float]
    layers: list[LayerShapes]
    maps: list[MapImage]
    # (rule, message, location) of each finding of the top's layout rules: which findings sit on this drawing.
    finding_keys: set = field(default_factory=set)

    @property
    def shapes(self) -> int:
        return sum(layer.count for layer in self.layers)


def finding_key(finding: Finding) -> tuple:
    """What matches a report's finding to the drawing it came from (unchanged by display paths and severities)."""
    return (finding.rule, finding.message, finding.location)


def split_shapes(polygons: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(boxes of the axis-aligned rectangles, the other polygons, oriented for a nonzero fill)."""
    polygons = np.asarray(polygons, dtype=object)
    if len(polygons) == 0:
        return np.zeros((0, 4)), np.empty(0, dtype=object)
    rect = axis_aligned_rectangles(polygons)
    others = polygons[~rect]
    if len(others):
        others = shapely.orient_polygons(shapely.get_parts(others), exterior_cw=False)
    return shapely.bounds(polygons[rect]).reshape(-1, 4), np.asarray(others, dtype=object)


def _layer(key: str, name: str, role: str | None, polygons) -> LayerShapes:
    rects, others = split_shapes(polygons)
    return LayerShapes(key, name, role, rects, others)


def capture(ctx, findings: list[Finding]) -> Drawing:
    """The drawing of the top in ``ctx`` (a CheckContext with a flat layout) and its findings."""
    flat, tech = ctx.flat, ctx.tech
    roles = {pair: role for role, pair in tech.layers.items()}
    layers = []
    # One int per (layer, datatype), both 16-bit in GDSII: np.unique on it sorts plain integers.
    keys = np.unique(flat.layer.astype(np.int64) * 65536 + flat.datatype)
    for layer, datatype in zip((keys // 65536).tolist(), (keys % 65536).tolist(), strict=True):
        role = roles.get((layer, datatype))
        shown = f"{role} ({layer}/{datatype})" if role else f"layer {layer}/{datatype}"
        layers.append(_layer(f"{layer}/{datatype}", shown, role, flat.polygons[flat.on_layer((layer, datatype))]))
    layers.sort(key=lambda item: _drawn_order(item.role))
    ex = ctx.extraction
    for key, name, attribute in EXTRACTED:
        if attribute is None:
            geoms = np.r_[ex.ntap.geoms[~ex.ntap_contacted], ex.ptap.geoms[~ex.ptap_contacted]]
        elif attribute == "pad":
            pad = pad_connected(ctx)
            geoms = np.r_[ex.pdiff.geoms[pad["p"]], ex.ndiff.geoms[pad["n"]]]
        elif attribute in ("ntap", "ptap"):
            geoms = getattr(ex, attribute).geoms[getattr(ex, f"{attribute}_contacted")]
        else:
            geoms = getattr(ex, attribute).geoms
        if len(geoms):
            layers.append(_layer(key, name, key, geoms))
    layers.sort(key=lambda item: item.role in CUT_ROLES)  # cuts on top, over the hatched taps
    extent = tuple(float(v) for v in shapely.total_bounds(flat.polygons)) if len(flat.polygons) else (0, 0, 1, 1)
    return Drawing(flat.top_name, extent, layers, build_maps(ctx, findings, extent),
                   {finding_key(f) for f in findings})


# Bottom to top: bodies, implants, diffusion, poly, cuts, metals, then anything else.
DRAWN_ORDER = ("deep_nwell", "pwell", "nwell", "nplus", "pplus", "active", "tap", "poly", "contact",
               "metal1", "via1", "metal2", "via2", "metal3", "pad")


CUT_ROLES = ("contact", "via1", "via2")


def _drawn_order(role: str | None) -> int:
    return DRAWN_ORDER.index(role) if role in DRAWN_ORDER else len(DRAWN_ORDER)
