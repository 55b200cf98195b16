"""From layer shapes to wells, device diffusions and taps (docs/technology.md).

Without a ``tap`` layer: active & nplus inside an n-well is an n-tap, active & pplus
outside every n-well is a p-tap, active & pplus inside an n-well is a P+ device
diffusion and active & nplus outside is an N+ device diffusion. With a ``tap`` layer,
taps are tap & implant and everything typed on active is a device diffusion.

Every piece keeps the index of the flat shape it was cut from (the drawn active or tap
polygon), which is how findings find their source line.

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

from latchwatch.analyzers.layout import geometry as g
from latchwatch.analyzers.layout.flatten import FlatLayout
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
    shape: np.ndarray  # flat shape index the piece was cut from
    body: np.ndarray  # well index, or SUBSTRATE

    def __len__(self) -> int:
        return len(self.geoms)

    def select(self, mask: np.ndarray) -> Pieces:
        return Pieces(self.geoms[mask], self.shape[mask], self.body[mask])

    @staticmethod
    def concat(parts: list[Pieces]) -> Pieces:
        return Pieces(
            np.concatenate([p.geoms for p in parts]) if parts else np.empty(0, dtype=object),
            np.concatenate([p.shape for p in parts]) if parts else np.zeros(0, np.int64),
            np.concatenate([p.body for p in parts]) if parts else np.zeros(0, np.int64),
        )


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

def _shapes(flat: FlatLayout, tech: Technology, role: str) -> tuple[np.ndarray, np.ndarray]:
    idx = flat.on_layer(tech.layer(role))
    return flat.polygons[idx], idx


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
    return _merge_touching(*_shapes(flat, tech, role))


def _isolated_pwells(flat, tech, deep: np.ndarray, deep_shapes: list[np.ndarray], wells: np.ndarray):
    """(regions, drawn shapes of each): p-wells isolated over a deep n-well (see the top)."""
    if len(deep) == 0:
        return np.empty(0, dtype=object), []
    drawn, drawn_idx = _shapes(flat, tech, "pwell")
    if len(drawn):
        parts, owner = g.clip_to_union(drawn, deep)
        return _merge_touching(parts, drawn_idx[owner])
    parts, owner = g.clip_outside(deep, wells) if len(wells) else g.explode(deep, np.arange(len(deep)))
    return parts, [deep_shapes[int(o)] for o in owner]


def _split_by_pwells(pieces: Pieces, pwells: np.ndarray) -> Pieces:
    """Pieces inside an isolated p-well move to its body; the rest stay where they were."""
    if len(pwells) == 0 or len(pieces) == 0:
        return pieces
    inside, i_owner, i_pwell = g.clip_inside(pieces.geoms, pwells)
    outside, o_owner = g.clip_outside(pieces.geoms, pwells)
    return Pieces.concat([
        Pieces(outside, pieces.shape[o_owner], pieces.body[o_owner]),
        Pieces(inside, pieces.shape[i_owner], pwell_body(i_pwell.astype(np.int64))),
    ])


def _implanted(flat, tech, drawn_role: str, implant_role: str) -> Pieces:
    """Parts of the drawn diffusion shapes covered by an implant."""
    drawn, drawn_idx = _shapes(flat, tech, drawn_role)
    implant, _ = _shapes(flat, tech, implant_role)
    parts, owner = g.clip_to_union(drawn, implant)
    return Pieces(parts, drawn_idx[owner], np.full(len(parts), SUBSTRATE, np.int64))


def _split_by_wells(pieces: Pieces, wells: np.ndarray) -> tuple[Pieces, Pieces]:
    """(parts inside wells with body = well, parts outside every well)."""
    inside, i_owner, i_well = g.clip_inside(pieces.geoms, wells)
    outside, o_owner = g.clip_outside(pieces.geoms, wells)
    return (
        Pieces(inside, pieces.shape[i_owner], i_well.astype(np.int64)),
        Pieces(outside, pieces.shape[o_owner], np.full(len(outside), SUBSTRATE, np.int64)),
    )


def extract(flat: FlatLayout, tech: Technology) -> Extraction:
    """Turn a flattened layout's shapes into wells, device diffusions and taps with their bodies."""
    wells, well_shapes = _merge_wells(flat, tech)
    n_active_in, n_active_out = _split_by_wells(_implanted(flat, tech, "active", "nplus"), wells)
    p_active_in, p_active_out = _split_by_wells(_implanted(flat, tech, "active", "pplus"), wells)
    if tech.layer("tap") is not None:
        n_tap_in, _ = _split_by_wells(_implanted(flat, tech, "tap", "nplus"), wells)
        _, p_tap_out = _split_by_wells(_implanted(flat, tech, "tap", "pplus"), wells)
        ntap, ptap = n_tap_in, p_tap_out
    else:
        ntap, ptap = n_active_in, p_active_out
    pdiff, ndiff = p_active_in, n_active_out
    deep, deep_shapes = _merge_wells(flat, tech, "deep_nwell")
    pwells, pwell_shapes = _isolated_pwells(flat, tech, deep, deep_shapes, wells)
    ndiff, ptap = _split_by_pwells(ndiff, pwells), _split_by_pwells(ptap, pwells)

    contacts, _ = _shapes(flat, tech, "contact")
    poly, _ = _shapes(flat, tech, "poly")
    return Extraction(
        flat=flat, wells=wells, well_shapes=well_shapes,
        pdiff=pdiff, ndiff=ndiff, ntap=ntap, ptap=ptap,
        ntap_contacted=g.area_overlap_any(ntap.geoms, contacts),
        ptap_contacted=g.area_overlap_any(ptap.geoms, contacts),
        pdiff_gated=g.area_overlap_any(pdiff.geoms, poly),
        ndiff_gated=g.area_overlap_any(ndiff.geoms, poly),
        contacts=contacts, deep_nwells=deep, deep_nwell_shapes=deep_shapes,
        pwells=pwells, pwell_shapes=pwell_shapes,
    )


def spacing_to_opposite_well(ex: Extraction, kind: str) -> np.ndarray:
    """Per device piece, the spacing to the opposite well: for N+ in the p-body the
    distance to the nearest n-well, for P+ in an n-well the distance to its well's edge."""
    if kind == "n":
        geoms = ex.ndiff.geoms
        if len(ex.wells) == 0 or len(geoms) == 0:
            return np.full(len(geoms), np.inf)
        tree = shapely.STRtree(ex.wells)
        _, dist = tree.query_nearest(geoms, return_distance=True, all_matches=False)
        return dist
    geoms = ex.pdiff.geoms
    if len(geoms) == 0:
        return np.zeros(0)
    edges = shapely.boundary(ex.wells[ex.pdiff.body])
    return shapely.distance(geoms, edges)
