"""Vectorized building blocks: overlap pairs, connected components, grouped unions
and clipping, all on numpy arrays of shapely geometries.

>>> import shapely
>>> a = shapely.box([0, 3, 10], [0, 0, 0], [2, 5, 11], [1, 1, 1])
>>> components(a, touching=True).tolist()
[0, 1, 2]
>>> components(shapely.box([0, 2], [0, 0], [2, 4], [1, 1]), touching=True).tolist()
[0, 0]
"""

from __future__ import annotations

import numpy as np
import shapely
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components


def axis_aligned_rectangles(polygons: np.ndarray) -> np.ndarray:
    """Boolean per polygon: an axis-aligned rectangle with positive area (always valid).

    >>> import shapely
    >>> axis_aligned_rectangles(np.array([shapely.box(0, 0, 2, 1), shapely.Polygon([(0, 0), (2, 0), (1, 1)])])).tolist()
    [True, False]
    """
    return bounds_and_rectangles(polygons)[1]


def bounds_and_rectangles(polygons: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(bounds (n, 4), axis_aligned_rectangles) from one pass over the bounds, for callers that need both."""
    b = shapely.bounds(polygons).reshape(-1, 4)
    box_area = (b[:, 2] - b[:, 0]) * (b[:, 3] - b[:, 1])
    return b, (shapely.get_num_coordinates(polygons) == 5) & (box_area > 0) & np.isclose(
        shapely.area(polygons), box_area, rtol=1e-12, atol=0.0)


def overlap_pairs(a: np.ndarray, b: np.ndarray, *, touching: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs (i, j) where a[i] and b[j] share area (or, with touching, any point)."""
    if len(a) == 0 or len(b) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    tree = shapely.STRtree(b)
    ia, ib = tree.query(a, predicate="intersects")
    if not touching and len(ia):
        ia, ib = _drop_touching(a, b, ia, ib)
    return ia, ib


def _drop_touching(a, b, ia, ib):
    """Keep the pairs whose interiors meet. Two axis-aligned rectangles do exactly when
    their boxes overlap with positive width and height; GEOS decides the other pairs."""
    # Bounds and rectangle flags once per array, then gathered per pair: pairs outnumber shapes.
    bounds_a, rect_a = bounds_and_rectangles(a)
    bounds_b, rect_b = (bounds_a, rect_a) if b is a else bounds_and_rectangles(b)
    ba, bb = bounds_a[ia], bounds_b[ib]
    both_boxes = rect_a[ia] & rect_b[ib]
    w = np.minimum(ba[:, 2], bb[:, 2]) - np.maximum(ba[:, 0], bb[:, 0])
    h = np.minimum(ba[:, 3], bb[:, 3]) - np.maximum(ba[:, 1], bb[:, 1])
    keep = (w > 0) & (h > 0)
    rest = np.flatnonzero(~both_boxes)
    keep[rest] = ~shapely.touches(a[ia[rest]], b[ib[rest]])
    return ia[keep], ib[keep]


def components(geoms: np.ndarray, *, touching: bool = True) -> np.ndarray:
    """Connected-component label of each geometry (geometries that meet are joined)."""
    n = len(geoms)
    if n == 0:
        return np.zeros(0, np.int64)
    ia, ib = overlap_pairs(geoms, geoms, touching=touching)
    return labels_of_pairs(ia, ib, n)


def labels_of_pairs(ia: np.ndarray, ib: np.ndarray, n: int) -> np.ndarray:
    """Connected-component label of each of n items joined by the pairs (ia[k], ib[k]).

    >>> labels_of_pairs(np.array([0, 3]), np.array([2, 4]), 5).tolist()
    [0, 1, 0, 2, 2]
    """
    graph = coo_matrix((np.ones(len(ia), dtype=np.int8), (ia, ib)), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    return labels


def largest_first_by_group(geoms: np.ndarray, label: np.ndarray, tiebreak: np.ndarray):
    """(order, starts): geometry indices sorted by group label, largest area first within
    a group (``tiebreak`` ascending on equal areas), and where each group's run begins;
    ``order[starts]`` is the largest member of each group.

    >>> import shapely
    >>> order, starts = largest_first_by_group(shapely.box([0, 0, 5], 0, [1, 3, 6], 1), np.array([0, 0, 1]), np.arange(3))
    >>> order.tolist(), starts.tolist()
    ([1, 0, 2], [0, 2])
    """
    order = np.lexsort((tiebreak, -shapely.area(geoms), label))
    starts = np.flatnonzero(np.r_[True, label[order][1:] != label[order][:-1]])
    return order, starts


def union_groups(geoms: np.ndarray, group: np.ndarray, n_groups: int) -> np.ndarray:
    """One union per group id 0..n_groups-1; singleton groups are taken as they are."""
    out = np.full(n_groups, None, dtype=object)
    if len(geoms) == 0:
        return out
    order = np.argsort(group, kind="stable")
    g = group[order]
    starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
    ends = np.r_[starts[1:], len(g)]
    single = ends - starts == 1
    out[g[starts[single]]] = geoms[order[starts[single]]]
    # Only groups with several members need GEOS unions; those are few in practice.
    for s, e in zip(starts[~single], ends[~single], strict=False):
        out[g[s]] = shapely.union_all(band_merged(geoms[order[s:e]]))
    return out


def band_merged(geoms: np.ndarray) -> np.ndarray:
    """Geometries with the same union and fewer pieces: axis-aligned rectangles with the
    same y-extent are joined where their x-intervals overlap or touch (exact: that union
    is a union of intervals). Wells and rails of a standard-cell row become a few long
    rectangles, which GEOS unites many times faster; other geometries are kept.

    >>> import shapely
    >>> [p.bounds for p in band_merged(shapely.box([0, 2, 5, 0], [0, 0, 0, 3], [3, 4, 6, 1], [1, 1, 1, 4]))]
    [(0.0, 0.0, 4.0, 1.0), (5.0, 0.0, 6.0, 1.0), (0.0, 3.0, 1.0, 4.0)]
    """
    rect = axis_aligned_rectangles(geoms)
    if rect.sum() < 2:
        return geoms
    b = shapely.bounds(geoms[rect])
    b = b[np.lexsort((b[:, 0], b[:, 3], b[:, 1]))]  # by y0, then y1, then x0
    m = len(b)
    band_start = np.r_[True, (b[1:, 1] != b[:-1, 1]) | (b[1:, 3] != b[:-1, 3])]
    band = np.cumsum(band_start) - 1
    # The largest x1 so far within each band: a running maximum of x1's ranks, each
    # band lifted above the ones before it (integers, so exact).
    x1_order = np.argsort(b[:, 2], kind="stable")
    rank = np.empty(m, np.int64)
    rank[x1_order] = np.arange(m)
    reach = b[x1_order, 2][np.maximum.accumulate(band * m + rank) - band * m]
    start = band_start | np.r_[True, b[1:, 0] > reach[:-1]]
    first = np.flatnonzero(start)
    x1 = np.maximum.reduceat(b[:, 2], first)
    joined = shapely.box(b[first, 0], b[first, 1], x1, b[first, 3])
    return np.concatenate([joined, geoms[~rect]])


def explode(geoms: np.ndarray, owner: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Polygon parts of (multi)polygons with the owner index of each part; empties drop."""
    parts, idx = shapely.get_parts(geoms, return_index=True)
    if len(parts) == 0:
        return parts, np.zeros(0, np.int64)
    polys = shapely.get_type_id(parts) == shapely.GeometryType.POLYGON
    keep = polys & (shapely.area(parts) > 0)
    return parts[keep], owner[idx[keep]]


def _covered_and_crossing(a: np.ndarray, regions: np.ndarray):
    """Split the (a, region) intersecting pairs into a[i] wholly covered by region[j], and
    pairs where a[i] crosses the region's edge. The regions are the query inputs, so
    GEOS prepares each (large) region once instead of testing it against every piece."""
    if len(a) == 0 or len(regions) == 0:
        empty = np.zeros(0, np.int64)
        return empty, empty, empty, empty
    tree = shapely.STRtree(a)
    hit_r, hit_a = tree.query(regions, predicate="intersects")
    cov_r, cov_a = tree.query(regions, predicate="covers")
    covered = np.zeros(len(a), dtype=bool)
    covered[cov_a] = True
    crossing = ~covered[hit_a]
    return cov_a, cov_r, hit_a[crossing], hit_r[crossing]


def clip_outside(a: np.ndarray, regions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Parts of each a[i] outside the union of the regions: (parts, a index)."""
    return _outside(a, regions, *_covered_and_crossing(a, regions))


def clip_inside_and_outside(a: np.ndarray, regions: np.ndarray):
    """((parts, a index, region index) of each a[i] inside each region it overlaps,
    clip_outside(a, regions)), sharing one pair query. Regions must be pairwise
    disjoint (for example merged wells)."""
    pairs = _covered_and_crossing(a, regions)
    return _inside(a, regions, *pairs), _outside(a, regions, *pairs)


def _inside(a, regions, cov_a, cov_r, cross_a, cross_r):
    pieces = shapely.intersection(a[cross_a], regions[cross_r])
    parts, owner = explode(pieces, np.arange(len(cross_a)))
    return (np.concatenate([a[cov_a], parts]), np.concatenate([cov_a, cross_a[owner]]),
            np.concatenate([cov_r, cross_r[owner]]))


def _outside(a, regions, cov_a, cov_r, cross_a, cross_r):
    rest = a.copy()
    rest[cov_a] = None
    if len(cross_a):
        covering = union_groups(regions[cross_r], cross_a, len(a))
        hit = np.flatnonzero(covering != None)  # noqa: E711 (elementwise)
        hit = hit[rest[hit] != None]  # noqa: E711
        rest[hit] = shapely.difference(a[hit], covering[hit].astype(object))
    keep = np.flatnonzero(rest != None)  # noqa: E711
    return explode(rest[keep], keep)


def clip_to_union(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Parts of each a[i] inside the union of b (b may overlap itself): (parts, a index)."""
    cov_a, _, cross_a, cross_b = _covered_and_crossing(a, b)
    covered = np.unique(cov_a)
    keep = ~np.isin(cross_a, covered)
    cross_a, cross_b = cross_a[keep], cross_b[keep]
    if len(cross_a) == 0:
        return a[covered], covered
    covering = union_groups(b[cross_b], cross_a, len(a))
    hit = np.flatnonzero(covering != None)  # noqa: E711
    parts, owner = explode(shapely.intersection(a[hit], covering[hit].astype(object)), hit)
    return np.concatenate([a[covered], parts]), np.concatenate([covered, owner])


def area_overlap_any(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Boolean per a[i]: some b[j] shares area with it."""
    hit = np.zeros(len(a), dtype=bool)
    ia, _ = overlap_pairs(a, b)
    hit[ia] = True
    return hit


def within_distance_any(a: np.ndarray, b: np.ndarray, distance: float) -> np.ndarray:
    """Boolean per a[i]: some b[j] lies within ``distance`` of it (touching counts)."""
    hit = np.zeros(len(a), dtype=bool)
    if len(a) and len(b):
        ia, _ = shapely.STRtree(b).query(a, predicate="dwithin", distance=distance)
        hit[ia] = True
    return hit
