"""From layer shapes to wells, device diffusions and taps (docs/technology.md).

Without a ``tap`` layer: active & nplus inside an n-well is an n-tap, active & pplus
outside every n-well is a p-tap, active & pplus inside an n-well is a P+ device
diffusion and active & nplus outside is an N+ device diffusion. With a ``tap`` layer,
taps are tap & implant and everything typed on active is a device diffusion.

Touching and overlapping pieces of the same kind in the same body are one diffusion,
however many shapes drew it (PDK cells draw a transistor's diffusion in several
polygons, a tap strip in abutting rectangles): they are merged before taps, contacts
and devices are decided. Every merged piece keeps the flat shapes that drew it; its
``shape`` is the one that drew the most of it, which is how findings find their source
line, and the others go into the finding's related information.

Isolation: with a ``deep_nwell`` layer, a p-well isolated over a deep n-well is a body
of its own (ids ``pwell_body(k)``, below SUBSTRATE): its N+ device diffusions and its
p-taps are taken out of the substrate. Where the layout draws ``pwell`` shapes, the
isolated p-wells are their parts inside a deep n-well; otherwise they are the parts of
each deep n-well not covered by an n-well (the usual n-well ring around a deep n-well
then separates them from the substrate).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import shapely

from latchwatch.analyzers.extraction.layers import layer_shapes
from latchwatch.analyzers.layout import geometry as g
from latchwatch.analyzers.layout.flatten import FlatLayout
from latchwatch.analyzers.parallel import side_by_side
from latchwatch.analyzers.technology.model import Technology

SUBSTRATE = -1  # body id of the p-substrate; n-wells are 0..n_wells-1
FIRST_PWELL = -2  # isolated p-well k has body FIRST_PWELL - k


def pwell_body(k):
    """Body id of isolated p-well ``k`` (works on arrays)."""
    return FIRST_PWELL - k


def pwell_index(body):
    """Index of the isolated p-well with body id ``body`` (works on arrays)."""
    return FIRST_PWELL - body


def is_pwell_body(body):
    """True where a body number names an isolated p-well (those are numbered below SUBSTRATE)."""
    return np.asarray(body) <= FIRST_PWELL


@dataclass
class Pieces:
    """Typed diffusion pieces: one row per polygon part."""

    geoms: np.ndarray
    shape: np.ndarray  # flat shape index the piece was cut from (after merging: the one that drew most of it)
    body: np.ndarray  # well index, or SUBSTRATE
    # Per piece merged from several shapes, every flat shape that drew it; None (for the
    # whole array or one piece) means the piece was drawn by ``shape`` alone.
    drawn: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.geoms)

    def drawn_shapes(self, i: int) -> np.ndarray:
        """The flat shapes that drew piece ``i``, ``shape[i]`` among them."""
        several = None if self.drawn is None else self.drawn[i]
        return np.array([self.shape[i]], np.int64) if several is None else several

    def select(self, mask: np.ndarray) -> Pieces:
        return Pieces(self.geoms[mask], self.shape[mask], self.body[mask],
                      None if self.drawn is None else self.drawn[mask])

    def taken(self, owner: np.ndarray, geoms: np.ndarray, body: np.ndarray) -> Pieces:
        """New pieces ``geoms`` cut from pieces ``owner`` of these, in bodies ``body``."""
        return Pieces(geoms, self.shape[owner], body, None if self.drawn is None else self.drawn[owner])

    @staticmethod
    def concat(parts: list[Pieces]) -> Pieces:
        if not parts:
            return Pieces(np.empty(0, dtype=object), np.zeros(0, np.int64), np.zeros(0, np.int64))
        drawn = None
        if any(p.drawn is not None for p in parts):
            drawn = np.concatenate([np.full(len(p), None, dtype=object) if p.drawn is None else p.drawn for p in parts])
        return Pieces(*(np.concatenate([getattr(p, f) for p in parts]) for f in ("geoms", "shape", "body")), drawn)


def merged(pieces: Pieces) -> Pieces:
    """Touching or overlapping pieces in the same body united into one piece each.

    >>> import shapely
    >>> strip = Pieces(shapely.box([0, 2, 9], 0, [2, 4, 10], 1), np.array([5, 6, 7]), np.zeros(3, np.int64))
    >>> one = merged(strip)
    >>> [p.bounds for p in one.geoms], one.shape.tolist(), [one.drawn_shapes(i).tolist() for i in range(2)]
    ([(0.0, 0.0, 4.0, 1.0), (9.0, 0.0, 10.0, 1.0)], [5, 7], [[5, 6], [7]])
    """
    n = len(pieces)
    if n < 2:
        return pieces
    ia, ib = g.overlap_pairs(pieces.geoms, pieces.geoms, touching=True)
    keep = (pieces.body[ia] == pieces.body[ib]) & (ia != ib)
    if not keep.any():
        return pieces
    label = g.labels_of_pairs(ia[keep], ib[keep], n)
    n_groups = int(label.max()) + 1
    # Without the seams' collinear vertices, which would otherwise become grid lines of the sheet model.
    geoms = shapely.simplify(g.union_groups(pieces.geoms, label, n_groups), 0.0)
    # The representative: the piece with the largest area, the first-drawn shape on a tie.
    order, starts = g.largest_first_by_group(pieces.geoms, label, pieces.shape)
    first = order[starts]
    drawn = np.full(n_groups, None, dtype=object)
    sizes = np.diff(np.r_[starts, n])
    for s, size in zip(starts[sizes > 1].tolist(), sizes[sizes > 1].tolist(), strict=True):  # merged groups only
        members = order[s:s + size]
        drawn[label[members[0]]] = np.unique(np.concatenate([pieces.drawn_shapes(int(m)) for m in members]))
    return Pieces(geoms, pieces.shape[first], pieces.body[first], drawn)


@dataclass
class Extraction:
    """Wells, device diffusions, taps, contacts and gates of one flattened top cell."""
    flat: FlatLayout
    wells: np.ndarray  # merged n-well regions
    well_shapes: list[np.ndarray]  # flat shape indices of the polygons of each well
    pdiff: Pieces  # P+ device diffusion in an n-well (body = well)
    ndiff: Pieces  # N+ device diffusion in the p-body (body = SUBSTRATE)
    ntap: Pieces  # n-taps (body = well)
    ptap: Pieces  # p-taps (body = SUBSTRATE)
    ntap_contacted: np.ndarray  # bool per ntap piece
    ptap_contacted: np.ndarray
    pdiff_gated: np.ndarray  # bool per pdiff piece: poly crosses it (a transistor)
    ndiff_gated: np.ndarray
    contacts: np.ndarray
    deep_nwells: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))
    deep_nwell_shapes: list[np.ndarray] = field(default_factory=list)
    pwells: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))  # isolated p-wells
    pwell_shapes: list[np.ndarray] = field(default_factory=list)  # drawn shapes of each

def _merge_touching(geoms: np.ndarray, idx: np.ndarray):
    """Merged regions of touching shapes, and the given indices of each region's members."""
    if len(geoms) == 0:
        return np.empty(0, dtype=object), []
    label = g.components(geoms, touching=True)
    n = int(label.max()) + 1
    regions = g.union_groups(geoms, label, n)
    order = np.argsort(label, kind="stable")
    members = np.split(idx[order], np.flatnonzero(np.diff(label[order])) + 1)
    return regions, [np.unique(m) for m in members]


def _merge_wells(flat: FlatLayout, tech: Technology, role: str = "nwell"):
    return _merge_touching(*layer_shapes(flat, tech, role))


def _isolated_pwells(flat, tech, deep: np.ndarray, deep_shapes: list[np.ndarray], wells: np.ndarray):
    """(regions, drawn shapes of each): p-wells isolated over a deep n-well (see the top)."""
    if len(deep) == 0:
        return np.empty(0, dtype=object), []
    drawn, drawn_idx = layer_shapes(flat, tech, "pwell")
    if len(drawn):
        parts, owner = g.clip_to_union(drawn, deep)
        return _merge_touching(parts, drawn_idx[owner])
    parts, owner = g.clip_outside(deep, wells) if len(wells) else g.explode(deep, np.arange(len(deep)))
    return parts, [deep_shapes[int(o)] for o in owner]


def _split_by_pwells(pieces: Pieces, pwells: np.ndarray) -> Pieces:
    """Pieces inside an isolated p-well move to its body; the rest stay where they were."""
    if len(pwells) == 0 or len(pieces) == 0:
        return pieces
    (inside, i_owner, i_pwell), (outside, o_owner) = g.clip_inside_and_outside(pieces.geoms, pwells)
    return Pieces.concat([
        pieces.taken(o_owner, outside, pieces.body[o_owner]),
        pieces.taken(i_owner, inside, pwell_body(i_pwell.astype(np.int64))),
    ])


def _implanted(flat, tech, drawn_role: str, implant_role: str) -> Pieces:
    """Parts of the drawn diffusion shapes covered by an implant."""
    drawn, drawn_idx = layer_shapes(flat, tech, drawn_role)
    implant, _ = layer_shapes(flat, tech, implant_role)
    parts, owner = g.clip_to_union(drawn, implant)
    return Pieces(parts, drawn_idx[owner], np.full(len(parts), SUBSTRATE, np.int64))


def _split_by_wells(pieces: Pieces, wells: np.ndarray) -> tuple[Pieces, Pieces]:
    """(parts inside wells with body = well, parts outside every well)."""
    (inside, i_owner, i_well), (outside, o_owner) = g.clip_inside_and_outside(pieces.geoms, wells)
    return (
        pieces.taken(i_owner, inside, i_well.astype(np.int64)),
        pieces.taken(o_owner, outside, np.full(len(outside), SUBSTRATE, np.int64)),
    )


PARALLEL_SHAPES = 50_000  # flat shapes from which the N+ and P+ sides are extracted side by side


def extract(flat: FlatLayout, tech: Technology) -> Extraction:
    """Turn a flattened layout's shapes into wells, device diffusions and taps with their bodies."""
    wells, well_shapes = _merge_wells(flat, tech)
    deep, deep_shapes = _merge_wells(flat, tech, "deep_nwell")
    pwells, pwell_shapes = _isolated_pwells(flat, tech, deep, deep_shapes, wells)
    contacts, _ = layer_shapes(flat, tech, "contact")
    poly, _ = layer_shapes(flat, tech, "poly")
    # Derived layers both sides read are evaluated (and cached on ``flat``) before they start.
    for role in ("active", "tap", "nplus", "pplus"):
        layer_shapes(flat, tech, role)
    shared = (wells, pwells, contacts, poly)
    (ntap, ndiff, ntap_contacted, ndiff_gated), (ptap, pdiff, ptap_contacted, pdiff_gated) = side_by_side(
        lambda: _implant_side(flat, tech, "nplus", *shared), lambda: _implant_side(flat, tech, "pplus", *shared),
        large=flat.shape_count >= PARALLEL_SHAPES, name="latchwatch-extract")
    return Extraction(
        flat=flat, wells=wells, well_shapes=well_shapes,
        pdiff=pdiff, ndiff=ndiff, ntap=ntap, ptap=ptap,
        ntap_contacted=ntap_contacted, ptap_contacted=ptap_contacted,
        pdiff_gated=pdiff_gated, ndiff_gated=ndiff_gated,
        contacts=contacts, deep_nwells=deep, deep_nwell_shapes=deep_shapes,
        pwells=pwells, pwell_shapes=pwell_shapes,
    )


def _implant_side(flat, tech, implant: str, wells, pwells, contacts, poly):
    """(taps, device diffusions, taps contacted, devices gated) of one implant: for N+ the
    n-taps inside the n-wells and the N+ devices outside them (out of the substrate where
    an isolated p-well holds them); for P+ the p-taps outside and the P+ devices inside."""
    inside, outside = _split_by_wells(_implanted(flat, tech, "active", implant), wells)
    if tech.has_layer("tap"):
        tap_inside, tap_outside = _split_by_wells(_implanted(flat, tech, "tap", implant), wells)
        taps = tap_inside if implant == "nplus" else tap_outside
    else:
        taps = inside if implant == "nplus" else outside
    devices = outside if implant == "nplus" else inside
    if implant == "nplus":
        devices = _split_by_pwells(devices, pwells)
    else:
        taps = _split_by_pwells(taps, pwells)
    taps, devices = merged(taps), merged(devices)
    return taps, devices, g.area_overlap_any(taps.geoms, contacts), g.area_overlap_any(devices.geoms, poly)


def spacing_to_opposite_well(ex: Extraction, kind: str, within: float) -> np.ndarray:
    """Per device piece of ``kind``, the spacing that picks its row of a by_spacing table:
    the smallest spacing between a well and a diffusion of the other type outside it, over
    the diffusions that lie within ``within`` um of the device; inf when there is none.

    This is how GF180MCU's latch-up table defines it (design manual section 14.3,
    tables_clear/55_Latch-up_152.csv): outside deep n-wells, N+ outside the n-wells to the
    nearest n-well (LU.3 for an N+ device, LU.4 for a P+ device in an n-well); for an N+
    device in an isolated p-well, or a P+ device whose n-well touches a deep n-well, P+ to
    the nearest isolated p-well (LU.2, LU.1). A diffusion counts whole once any part of it
    is within range, which can only lower the spacing, so the row chosen is never looser
    than the table's.
    """
    devices = ex.pdiff if kind == "p" else ex.ndiff
    spacing = np.full(len(devices), np.inf)
    if len(devices) == 0:
        return spacing
    if kind == "n":
        isolated = is_pwell_body(devices.body)
    elif len(ex.deep_nwells):
        isolated = g.area_overlap_any(ex.wells, ex.deep_nwells)[devices.body]
    else:
        isolated = np.zeros(len(devices), dtype=bool)
    for rows, sources, wells in ((np.flatnonzero(~isolated), ex.ndiff.geoms, ex.wells),
                                 (np.flatnonzero(isolated), ex.pdiff.geoms, ex.pwells)):
        if len(rows) == 0 or len(sources) == 0 or len(wells) == 0:
            continue
        _, gap = shapely.STRtree(wells).query_nearest(sources, return_distance=True, all_matches=False)
        device, source = shapely.STRtree(sources).query(devices.geoms[rows], predicate="dwithin", distance=within)
        np.minimum.at(spacing, rows[device], gap[source])
    spacing[spacing > within] = np.inf  # the nearest well lies out of range
    return spacing
