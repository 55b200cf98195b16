"""Geometry to SVG text: path data of rectangles and polygons, PNG data URIs of images,
a raster overview of a layer for far zoom, and the packed shapes the page's script draws
when zoomed in. SVG y grows downwards, so every y is written negated.
"""

from __future__ import annotations

import base64
import math
import struct
import zlib

import numpy as np
import shapely

QUANTUM = 1e-3  # layout units: coordinates are written on this grid (1 nm for micrometre layouts)
OVERVIEW_PIXELS = 1024  # the longer side of a layer's overview raster


def rect_path(rects: np.ndarray) -> str:
    """Path data of (n, 4) boxes: one subpath each, all wound the same way (nonzero fill)."""
    if len(rects) == 0:
        return ""
    q = np.round(rects / QUANTUM).astype(np.int64)
    x0, y1, w, h = q[:, 0], -q[:, 3], q[:, 2] - q[:, 0], q[:, 3] - q[:, 1]
    parts = [f"M{_n(a)} {_n(b)}h{_n(c)}v{_n(d)}h{_n(-c)}z" for a, b, c, d in zip(x0.tolist(), y1.tolist(),
                                                                            w.tolist(), h.tolist(), strict=True)]
    return "".join(parts)


def _n(v: int) -> str:
    """An integer count of QUANTUM as a coordinate."""
    sign = "-" if v < 0 else ""
    whole, frac = divmod(abs(v), 1000)
    return f"{sign}{whole}.{frac:03d}".rstrip("0").rstrip(".") if frac else f"{sign}{whole}"


def polygon_path(polygons: np.ndarray) -> str:
    """Path data of polygons with their holes (exteriors and holes wound oppositely)."""
    if len(polygons) == 0:
        return ""
    rings = shapely.get_rings(polygons)
    out = []
    for ring in rings:
        xy = np.round(shapely.get_coordinates(ring)[:-1] / QUANTUM).astype(np.int64)
        xy[:, 1] = -xy[:, 1]
        out.append("M" + "L".join(f"{_n(x)} {_n(y)}" for x, y in xy.tolist()) + "z")
    return "".join(out)


def png_data_uri(rgba: np.ndarray) -> str:
    """A PNG (8-bit RGBA, no filter) of an (h, w, 4) array, as a data: URI."""
    h, w, _ = rgba.shape
    raw = b"".join(b"\x00" + rgba[row].astype(np.uint8).tobytes() for row in range(h))

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    png = (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 6, 0, 0, 0))
           + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def overview_mask(rects: np.ndarray, polygons: np.ndarray, extent) -> np.ndarray:
    """Boolean (h, w) coverage of a layer over ``extent`` (row 0 at the top): the merged
    region at far zoom. Every shape marks at least the pixel it sits in, so small
    shapes stay visible; rectangles are painted exactly by a summed-area count."""
    x0, y0, x1, y1 = extent
    step = max(x1 - x0, y1 - y0) / OVERVIEW_PIXELS or 1.0
    w, h = max(1, math.ceil((x1 - x0) / step)), max(1, math.ceil((y1 - y0) / step))
    count = np.zeros((h + 1, w + 1), np.int64)
    boxes = np.r_[rects.reshape(-1, 4), shapely.bounds(polygons).reshape(-1, 4)] if len(polygons) else rects
    if len(boxes):
        i0 = np.clip(np.floor((boxes[:, 0] - x0) / step), 0, w - 1).astype(np.int64)
        i1 = np.clip(np.ceil((boxes[:, 2] - x0) / step), i0 + 1, w).astype(np.int64)
        j0 = np.clip(np.floor((y1 - boxes[:, 3]) / step), 0, h - 1).astype(np.int64)
        j1 = np.clip(np.ceil((y1 - boxes[:, 1]) / step), j0 + 1, h).astype(np.int64)
        rect_rows = len(rects)
        for rows, sign in ((j0, 1), (j1, -1)):
            np.add.at(count, (rows[:rect_rows], i0[:rect_rows]), sign)
            np.add.at(count, (rows[:rect_rows], i1[:rect_rows]), -sign)
        mask = np.cumsum(np.cumsum(count, axis=0), axis=1)[:h, :w] > 0
    else:
        mask = np.zeros((h, w), bool)
    if len(polygons):  # pixel centres inside a polygon, and each polygon's own pixel
        xs, ys = x0 + (np.arange(w) + 0.5) * step, y1 - (np.arange(h) + 0.5) * step
        gx, gy = np.meshgrid(xs, ys)
        hit, _ = shapely.STRtree(polygons).query(shapely.points(gx.ravel(), gy.ravel()), predicate="intersects")
        mask.ravel()[np.unique(hit)] = True
        mask[j0[len(rects):], i0[len(rects):]] = True
    return mask


def mask_image(mask: np.ndarray, colour: tuple[int, int, int], alpha: int) -> np.ndarray:
    """RGBA pixels: ``colour`` where the mask is set, transparent elsewhere."""
    rgba = np.zeros((*mask.shape, 4), np.uint8)
    rgba[mask] = (*colour, alpha)
    return rgba


def pack_rects(rects: np.ndarray) -> str:
    """Boxes for the page's script: int32 x0, -y1, w, h on the QUANTUM grid, rows sorted
    and each column delta-coded (regular layouts repeat their steps), deflated, base64."""
    q = np.round(rects / QUANTUM).astype(np.int64)
    rows = np.c_[q[:, 0], -q[:, 3], q[:, 2] - q[:, 0], q[:, 3] - q[:, 1]]
    rows = rows[np.lexsort((rows[:, 0], rows[:, 1]))]
    deltas = np.diff(rows, axis=0, prepend=np.zeros((1, 4), np.int64)).astype(np.int32)
    return base64.b64encode(zlib.compress(deltas.tobytes(), 6)).decode("ascii")


def pack_polygons(polygons: np.ndarray) -> str:
    """Rings for the page's script: int32 [vertex count, x, -y, x, -y, ...] per ring, deflated, base64."""
    words = []
    for ring in shapely.get_rings(polygons) if len(polygons) else []:
        xy = np.round(shapely.get_coordinates(ring)[:-1] / QUANTUM).astype(np.int64)
        xy[:, 1] = -xy[:, 1]
        words.append(np.r_[len(xy), xy.ravel()])
    data = np.concatenate(words).astype(np.int32).tobytes() if words else b""
    return base64.b64encode(zlib.compress(data, 6)).decode("ascii")
