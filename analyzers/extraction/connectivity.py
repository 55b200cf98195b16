"""Nets: conductors joined through the cuts of ``[connectivity] stack`` (docs/technology.md).

Conductors are the diffusion pieces of the extraction, poly and every metal role the
stack names. A device diffusion is cut by the poly that crosses it, so a transistor's
source and drain are separate conductors; taps are taken as they are. Shapes of one
conductor role that meet (share a point) are one conductor; diffusion pieces only when
they carry the same implant, since a butted N+/P+ junction is a diode, not a wire
(unless a contact straddles it). A cut joins every lower and upper conductor it shares
area with. Pairs come from STRtree queries and nets from scipy's connected components:
there is no loop over pairs.

>>> import shapely
>>> m1 = shapely.box([0, 5, 20], [0, 0, 0], [3, 9, 21], [1, 1, 1])
>>> m2 = shapely.box([0], [0], [9], [1])
>>> via = shapely.box([0.2, 5.2], [0.2, 0.2], [0.6, 5.6], [0.6, 0.6])
>>> join_nets([m1, m2, via], [(0, 2, 1)]).tolist()   # two metal1 shapes meet through metal2
[0, 0, 1, 0, 0, 0]
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from latchwatch.analyzers.extraction.extract import Extraction, Pieces
from latchwatch.analyzers.extraction.layers import layer_shapes
from latchwatch.analyzers.layout import geometry as g
from latchwatch.analyzers.technology.model import Technology, is_conductor_role

# Diffusion kinds of a conductor (NOT_DIFFUSION for poly and metals).
NDIFF, PDIFF, NTAP, PTAP, NOT_DIFFUSION = 0, 1, 2, 3, -1
_IMPLANT = np.array([0, 1, 0, 1])  # N+ or P+ per diffusion kind


@dataclass
class Conductors:
    """One row per conductor node (a diffusion part, a poly or a metal shape)."""

    geoms: np.ndarray
    role: np.ndarray  # index into Connectivity.roles
    kind: np.ndarray  # NDIFF, PDIFF, NTAP, PTAP or NOT_DIFFUSION
    piece: np.ndarray  # index of the diffusion piece in its Pieces, or -1
    shape: np.ndarray  # flat shape index (the drawn shape, for provenance)

    def __len__(self) -> int:
        return len(self.geoms)


@dataclass
class Connectivity:
    """Conductors of every role and the net each belongs to, joined through the technology's cuts."""
    roles: tuple[str, ...]
    conductors: Conductors
    net: np.ndarray  # net id per conductor
    n_nets: int

    def of_diffusion(self, kind: int) -> tuple[np.ndarray, np.ndarray]:
        """(piece index, net) of every conductor cut from the diffusion pieces of ``kind``."""
        rows = np.flatnonzero(self.conductors.kind == kind)
        return self.conductors.piece[rows], self.net[rows]


class Shapes:
    """A geometry array with what pair queries need (tree, boxes, rectangle flags),
    each computed once however many queries use it."""

    def __init__(self, geoms):
        self.geoms = np.asarray(geoms, dtype=object)
        n = len(self.geoms)
        self.rect = g.axis_aligned_rectangles(self.geoms) if n else np.zeros(0, bool)
        self.bounds = shapely.bounds(self.geoms) if n else np.zeros((0, 4))
        self._tree = None

    def __len__(self) -> int:
        return len(self.geoms)

    @property
    def tree(self) -> shapely.STRtree:
        if self._tree is None:
            self._tree = shapely.STRtree(self.geoms)
        return self._tree


def _candidates(a: Shapes, b: Shapes):
    """Pairs whose boxes meet (the tree's own test), and which of them are two rectangles."""
    if len(a) == 0 or len(b) == 0:
        empty = np.zeros(0, np.int64)
        return empty, empty, np.zeros(0, bool)
    ia, ib = b.tree.query(a.geoms)
    return ia, ib, a.rect[ia] & b.rect[ib]


def _meeting(a: Shapes, b: Shapes):
    """Pairs (i, j) where a[i] and b[j] share at least a point. Two axis-aligned
    rectangles do exactly when their boxes do; GEOS decides the other pairs."""
    ia, ib, both = _candidates(a, b)
    rest = np.flatnonzero(~both)
    keep = np.ones(len(ia), dtype=bool)
    keep[rest] = shapely.intersects(a.geoms[ia[rest]], b.geoms[ib[rest]])
    return ia[keep], ib[keep]


def _sharing_area(a: Shapes, b: Shapes):
    """Pairs (i, j) where a[i] and b[j] share area: for two rectangles, boxes that overlap
    with positive width and height; GEOS decides the other pairs."""
    ia, ib, both = _candidates(a, b)
    ba, bb = a.bounds[ia], b.bounds[ib]
    w = np.minimum(ba[:, 2], bb[:, 2]) - np.maximum(ba[:, 0], bb[:, 0])
    h = np.minimum(ba[:, 3], bb[:, 3]) - np.maximum(ba[:, 1], bb[:, 1])
    keep = (w > 0) & (h > 0)
    rest = np.flatnonzero(~both & keep)
    ga, gb = a.geoms[ia[rest]], b.geoms[ib[rest]]
    keep[rest] = shapely.intersects(ga, gb) & ~shapely.touches(ga, gb)
    return ia[keep], ib[keep]


def meeting_pairs(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs (i, j) where a[i] and b[j] share at least a point."""
    return _meeting(Shapes(a), Shapes(b))


def join_nets(layers: list, links, same_conductor=None) -> np.ndarray:
    """Net id of every shape of ``layers`` (geometry arrays or Shapes, concatenated in
    order). ``links`` are (lower, cut, upper) indices into ``layers``; shapes of one layer
    that meet are joined, except where ``same_conductor(layer, i, j)`` returns False for
    some pairs (it returns the mask of pairs to keep)."""
    layers = [x if isinstance(x, Shapes) else Shapes(x) for x in layers]
    sizes = np.array([len(x) for x in layers], dtype=np.int64)
    start = np.concatenate([[0], np.cumsum(sizes)])
    rows, cols = [], []
    cut_layers = {c for _, c, _ in links}
    for k, shapes in enumerate(layers):
        if k in cut_layers:
            continue  # cuts join what they overlap, not each other
        i, j = _meeting(shapes, shapes)
        if same_conductor is not None and len(i):
            keep = same_conductor(k, i, j)
            i, j = i[keep], j[keep]
        rows.append(i + start[k])
        cols.append(j + start[k])
    for lower, cut, upper in links:
        for other in (lower, upper):
            c, o = _sharing_area(layers[cut], layers[other])
            rows.append(c + start[cut])
            cols.append(o + start[other])
    n = int(start[-1])
    if n == 0:
        return np.zeros(0, np.int64)
    r = np.concatenate(rows) if rows else np.zeros(0, np.int64)
    c = np.concatenate(cols) if cols else np.zeros(0, np.int64)
    graph = coo_matrix((np.ones(len(r), dtype=np.int8), (r, c)), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    return labels


def terminals(pieces: Pieces, poly: Shapes) -> tuple[np.ndarray, np.ndarray]:
    """Parts of each diffusion piece outside the poly that crosses it: (parts, piece index)."""
    if len(pieces) == 0:
        return np.empty(0, dtype=object), np.zeros(0, np.int64)
    ip, jp = _sharing_area(Shapes(pieces.geoms), poly)
    if len(ip) == 0:
        return pieces.geoms, np.arange(len(pieces))
    gates = g.union_groups(poly.geoms[jp], ip, len(pieces))
    gated = np.flatnonzero(gates != None)  # noqa: E711 (elementwise)
    rest = np.setdiff1d(np.arange(len(pieces)), gated)
    parts, owner = g.explode(shapely.difference(pieces.geoms[gated], gates[gated].astype(object)), gated)
    return np.concatenate([pieces.geoms[rest], parts]), np.concatenate([rest, owner])


def _diffusion_conductors(ex: Extraction, poly: Shapes, kinds) -> Conductors:
    geoms, kind, piece, shape = [], [], [], []
    for code in kinds:
        pieces = (ex.ndiff, ex.pdiff, ex.ntap, ex.ptap)[code]
        if code in (NDIFF, PDIFF):
            parts, owner = terminals(pieces, poly)
        else:
            parts, owner = pieces.geoms, np.arange(len(pieces))
        geoms.append(parts)
        kind.append(np.full(len(parts), code, np.int64))
        piece.append(owner)
        shape.append(pieces.shape[owner])
    return Conductors(np.concatenate(geoms), np.zeros(0), np.concatenate(kind), np.concatenate(piece),
                      np.concatenate(shape))


def conductor_roles(tech: Technology) -> tuple[str, ...]:
    """Conductor roles of the stack and of [labels], in first-mention order."""
    roles: list[str] = []
    for lower, _, upper in tech.connectivity:
        for role in (lower, upper):
            if role not in roles:
                roles.append(role)
    for role in tech.labels:
        if role not in roles and is_conductor_role(role):
            roles.append(role)
    return tuple(roles)


def connect(ex: Extraction, tech: Technology) -> Connectivity:
    """Join the extracted conductors through the [connectivity] stack into nets."""
    flat = ex.flat
    roles = conductor_roles(tech)
    poly = Shapes(layer_shapes(flat, tech, "poly")[0])
    has_tap_layer = tech.has_layer("tap")
    per_role: list[Conductors] = []
    for role in roles:
        if role == "active":
            kinds = (NDIFF, PDIFF) if has_tap_layer else (NDIFF, PDIFF, NTAP, PTAP)
            c = _diffusion_conductors(ex, poly, kinds)
        elif role == "tap" and has_tap_layer:
            c = _diffusion_conductors(ex, poly, (NTAP, PTAP))
        else:
            geoms, idx = layer_shapes(flat, tech, role)
            c = Conductors(geoms, np.zeros(0), np.full(len(idx), NOT_DIFFUSION, np.int64),
                           np.full(len(idx), -1, np.int64), idx)
        per_role.append(c)
    cut_roles = sorted({cut for _, cut, _ in tech.connectivity})
    cuts = [layer_shapes(flat, tech, role)[0] for role in cut_roles]
    links = [(roles.index(lo), len(roles) + cut_roles.index(cut), roles.index(up))
             for lo, cut, up in tech.connectivity]

    def same_implant(k, i, j):
        kind = per_role[k].kind
        if len(kind) == 0 or kind[0] == NOT_DIFFUSION:
            return np.ones(len(i), dtype=bool)
        return _IMPLANT[kind[i]] == _IMPLANT[kind[j]]

    layers = [poly if role == "poly" else Shapes(c.geoms) for role, c in zip(roles, per_role, strict=False)]
    labels = join_nets(layers + [Shapes(c) for c in cuts], links, same_implant)
    n_cond = sum(len(c) for c in per_role)
    conductors = Conductors(
        geoms=np.concatenate([c.geoms for c in per_role]) if per_role else np.empty(0, dtype=object),
        role=np.repeat(np.arange(len(roles)), [len(c) for c in per_role]),
        kind=np.concatenate([c.kind for c in per_role]) if per_role else np.zeros(0, np.int64),
        piece=np.concatenate([c.piece for c in per_role]) if per_role else np.zeros(0, np.int64),
        shape=np.concatenate([c.shape for c in per_role]) if per_role else np.zeros(0, np.int64),
    )
    net = labels[:n_cond]
    # Dense net ids over the conductors (cuts that join nothing drop out).
    _, net = np.unique(net, return_inverse=True)
    return Connectivity(roles, conductors, net.astype(np.int64), int(net.max()) + 1 if len(net) else 0)
