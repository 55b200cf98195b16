"""A flattened layout's polygons, kept as ring vertices and made into shapely polygons
only when asked for, a layer at a time.

Making a shapely polygon costs about a microsecond, the largest single part of
flattening a million shapes, and a check asks only for the layers its technology
names: the metal of a layout without labels, say, is never needed as geometry. So
the rings stay numpy arrays; ``at`` builds the polygons of the shapes asked for once
and keeps them. Which rings are axis-aligned rectangles is read from the vertices
too, so that only the other shapes are built to be tested for validity.
"""

from __future__ import annotations

import threading

import numpy as np
import shapely


def polygons_from_rings(coords: np.ndarray, starts: np.ndarray, counts: np.ndarray,
                        unusable: np.ndarray | None = None) -> np.ndarray:
    """Shapely polygons of the rings ``coords[starts[k]:starts[k] + counts[k]]``, in one
    ragged-array call (five times faster than shapely.polygons on a million rectangles).
    Rings are closed here, so no shapely version has to; fewer than three vertices, or a
    ring flagged in ``unusable``, give an empty polygon, which the flattening's repair
    reports."""
    out = np.empty(len(counts), dtype=object)
    degenerate = counts < 3 if unusable is None else (counts < 3) | unusable
    if degenerate.any():
        out[degenerate] = [shapely.Polygon()] * int(degenerate.sum())
    keep = np.flatnonzero(~degenerate)
    if len(keep) == 0:
        return out
    closed = counts[keep] + 1
    ring_offsets = np.zeros(len(keep) + 1, np.int64)
    np.cumsum(closed, out=ring_offsets[1:])
    within = np.arange(ring_offsets[-1]) - np.repeat(ring_offsets[:-1], closed)
    within[ring_offsets[1:] - 1] = 0  # each ring ends on its first vertex
    vertices = coords[np.repeat(starts[keep], closed) + within]
    out[keep] = shapely.from_ragged_array(shapely.GeometryType.POLYGON, vertices,
                                          (ring_offsets, np.arange(len(keep) + 1)))
    return out


def non_finite_rings(coords: np.ndarray, starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Boolean per ring ``coords[starts[k]:starts[k] + counts[k]]``: a NaN or infinite vertex
    (one check of the whole array when there is none)."""
    finite = np.isfinite(coords).all(axis=1)
    if finite.all():
        return np.zeros(len(counts), dtype=bool)
    bad_vertex = np.concatenate([[0], np.cumsum(~finite)])
    return bad_vertex[starts + counts] > bad_vertex[starts]


def rectangle_rings(coords: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Boolean per ring: four vertices that make an axis-aligned rectangle of positive area
    (the shapes geometry.axis_aligned_rectangles finds, told from their vertices).

    >>> ring = np.array([[0, 0], [2, 0], [2, 1], [0, 1], [0, 0], [1, 1], [0, 1], [1, 0.]])
    >>> rectangle_rings(ring, np.array([0, 4, 8])).tolist()
    [True, False]
    """
    n = len(offsets) - 1
    counts = np.diff(offsets)
    if n and (counts == 4).all():  # rectangles only, as a rule: a view of the vertices, no gather
        four, v = slice(None), coords.reshape(n, 4, 2)
    else:
        four = np.flatnonzero(counts == 4)
        v = coords[offsets[four][:, None] + np.arange(4)]  # (k, 4, 2)
    out = np.zeros(n, dtype=bool)
    if len(v) == 0:
        return out
    x0, x1, x2, x3 = (v[:, k, 0] for k in range(4))
    y0, y1, y2, y3 = (v[:, k, 1] for k in range(4))
    # Edges alternate horizontal and vertical, starting either way, and neither side is zero.
    x_first = (y0 == y1) & (x1 == x2) & (y2 == y3) & (x3 == x0) & (x0 != x1) & (y1 != y2)
    y_first = (x0 == x1) & (y1 == y2) & (x2 == x3) & (y3 == y0) & (y0 != y1) & (x1 != x2)
    out[four] = x_first | y_first
    return out


class LazyPolygons:
    """The polygons of a flattened layout's shapes, built from their rings on first use."""

    def __init__(self, coords: np.ndarray, offsets: np.ndarray):
        self.coords = coords  # (vertices, 2), every ring's vertices in shape order
        self.offsets = offsets  # (shapes + 1,): ring k is coords[offsets[k]:offsets[k + 1]]
        self._built = np.full(len(offsets) - 1, None, dtype=object)
        self._missing = np.ones(len(offsets) - 1, dtype=bool)
        # Rings with a NaN or infinite vertex are built empty: GEOS cannot repair them, and
        # refuses to close one whose first vertex is NaN.
        self.non_finite = non_finite_rings(coords, offsets[:-1], np.diff(offsets))
        self._lock = threading.Lock()  # extraction asks from two threads

    def __len__(self) -> int:
        return len(self._built)

    def at(self, idx: np.ndarray) -> np.ndarray:
        """The polygons of shapes ``idx`` (an index array, or one index for one polygon),
        built now where not yet built."""
        idx = np.asarray(idx, dtype=np.int64)
        if idx.ndim == 0:
            return self.at(idx[None])[0]
        with self._lock:
            todo = idx[self._missing[idx]]
            if len(todo) > 1 and not (todo[1:] > todo[:-1]).all():  # layers come in order, as a rule
                todo = np.unique(todo)
            if len(todo):
                self._built[todo] = polygons_from_rings(
                    self.coords, self.offsets[todo], self.offsets[todo + 1] - self.offsets[todo],
                    self.non_finite[todo])
                self._missing[todo] = False
            return self._built[idx]

    def every(self) -> np.ndarray:
        """All the polygons (built now where not yet built)."""
        return self.at(np.arange(len(self)))

    def replace(self, idx: np.ndarray, polygons: np.ndarray) -> None:
        """Put repaired polygons in place of shapes ``idx``."""
        with self._lock:
            self._built[idx] = polygons
            self._missing[idx] = False

    def extent(self, rectangles: np.ndarray) -> np.ndarray:
        """(xmin, ymin, xmax, ymax) of every non-empty polygon, as shapely.total_bounds
        would give it; ``rectangles`` flags the shapes whose rings are rectangles, whose
        vertices are their polygon's, so only the others are asked."""
        others = np.flatnonzero(~rectangles)
        boxes = [shapely.total_bounds(self.at(others))] if len(others) else []
        if len(others) < len(rectangles):
            boxes.append(self._rectangles_extent(others))
        boxes = [b for b in boxes if np.isfinite(b).all()]
        if not boxes:
            return np.full(4, np.nan)
        stacked = np.array(boxes)
        return np.r_[stacked[:, :2].min(axis=0), stacked[:, 2:].max(axis=0)]

    def _rectangles_extent(self, others: np.ndarray) -> np.ndarray:
        """The extent of the rectangles' vertices. Usually every vertex's: when the other
        rings' vertices (few, as a rule) reach no extreme of the whole array, the
        rectangles' reach them all; otherwise the rectangles' vertices are gathered."""
        coords = self.coords
        counts = self.offsets[others + 1] - self.offsets[others]
        theirs = coords[np.repeat(self.offsets[others], counts) + np.arange(counts.sum())
                        - np.repeat(np.cumsum(counts) - counts, counts)]
        if np.isfinite(coords).all():
            low, high = _column_bounds(coords)
            if not len(theirs) or ((theirs > low).all() and (theirs < high).all()):
                return np.r_[low, high]
        starts = np.delete(self.offsets[:-1], others)
        return np.r_[_column_bounds(coords[starts[:, None] + np.arange(4)].reshape(-1, 2))]


def _column_bounds(xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """((xmin, ymin), (xmax, ymax)) of an (n, 2) array, a column at a time: numpy reduces
    along the long axis of an (n, 2) array twenty times slower than along one column."""
    x, y = xy[:, 0], xy[:, 1]
    return np.array([x.min(), y.min()]), np.array([x.max(), y.max()])
