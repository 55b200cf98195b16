"""From layer shapes to wells, device diffusions and taps (DESIGN 5.4).

Without a ``tap`` layer: active & nplus inside an n-well is an n-tap, active & pplus
outside every n-well is a p-tap, active & pplus inside an n-well is a P+ device
diffusion and active & nplus outside is an N+ device diffusion. With a ``tap`` layer,
taps are tap & implant and everything typed on active is a device diffusion.

Every piece keeps the index of the flat shape it was cut from (the drawn active or tap
polygon), which is how findings find their source line.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely

from . import geometry as g
from .flatten import FlatLayout
from .technology import Technology

SUBSTRATE = -1  # body id of the p-substrate; n-wells are 0..n_wells-1


@dataclass
class Pieces:
    """Typed diffusion pieces: one row per polygon part."""

    geoms: np.ndarray
    shape: np.ndarray  # flat shape index the piece was cut from
    body: np.ndarray  # well index, or SUBSTRATE

    def __len__(self) -> int:
        return len(self.geoms)

    def select(self, mask: np.ndarray) -> "Pieces":
        return Pieces(self.geoms[mask], self.shape[mask], self.body[mask])

    @staticmethod
    def concat(parts: list["Pieces"]) -> "Pieces":
        return Pieces(
            np.concatenate([p.geoms for p in parts]) if parts else np.empty(0, dtype=object),
            np.concatenate([p.shape for p in parts]) if parts else np.zeros(0, np.int64),
            np.concatenate([p.body for p in parts]) if parts else np.zeros(0, np.int64),
        )


@dataclass
class Extraction:
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

    @property
    def device_count(self) -> int:
        return len(self.pdiff) + len(self.ndiff)


def _shapes(flat: FlatLayout, tech: Technology, role: str) -> tuple[np.ndarray, np.ndarray]:
    idx = flat.on_layer(tech.layer(role))
    return flat.polygons[idx], idx


def _merge_wells(flat: FlatLayout, tech: Technology):
    geoms, idx = _shapes(flat, tech, "nwell")
    if len(geoms) == 0:
        return np.empty(0, dtype=object), []
    label = g.components(geoms, touching=True)
    n = int(label.max()) + 1
    wells = g.union_groups(geoms, label, n)
    order = np.argsort(label, kind="stable")
    members = np.split(idx[order], np.flatnonzero(np.diff(label[order])) + 1)
    return wells, members


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

    contacts, _ = _shapes(flat, tech, "contact")
    poly, _ = _shapes(flat, tech, "poly")
    return Extraction(
        flat=flat, wells=wells, well_shapes=well_shapes,
        pdiff=pdiff, ndiff=ndiff, ntap=ntap, ptap=ptap,
        ntap_contacted=g.area_overlap_any(ntap.geoms, contacts),
        ptap_contacted=g.area_overlap_any(ptap.geoms, contacts),
        pdiff_gated=g.area_overlap_any(pdiff.geoms, poly),
        ndiff_gated=g.area_overlap_any(ndiff.geoms, poly),
        contacts=contacts,
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
