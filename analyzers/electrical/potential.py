"""The solved sheet of one device, for pictures: its potential and how its current splits
between the taps (analyzers/electrical/sheet.py potential_field).

The window is the one the shunt estimate would give the device (shunt.py): WINDOW_REACH
times its tap reach around it, inside its body's region, with that body's contacted taps.
The grid is uniform and finer than the estimate's adaptive one (PICTURE_CELLS across the
window, or the technology's sheet_grid when finer), so the map shows the field, not the grid.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely

from latchwatch.analyzers.electrical.sheet import PotentialField, SheetProblem, potential_field
from latchwatch.analyzers.electrical.shunt import WINDOW_REACH, body_regions, shunt_estimates, tap_reach
from latchwatch.analyzers.extraction.extract import Pieces

PICTURE_CELLS = 120


@dataclass
class DevicePotential:
    """One device's potential field with the taps it was solved against (their flat shapes)."""
    kind: str  # "p" or "n"
    piece: int  # index into Extraction.pdiff / .ndiff
    box: tuple[float, float, float, float]
    field: PotentialField
    taps: np.ndarray  # tap polygons of the problem, aligned with field.tap_current


def device_potential(ctx, kind: str, piece: int) -> DevicePotential | None:
    """The potential of device ``piece`` of ``kind`` at 1 V; None when its body has no
    sheet value or no contacted tap."""
    ex = ctx.extraction
    estimate = shunt_estimates(ctx)[kind]
    pieces = ex.pdiff if kind == "p" else ex.ndiff
    if np.isnan(estimate.sheet[piece]):
        return None
    taps = estimate.taps
    body = int(pieces.body[piece])
    own = np.flatnonzero(taps.body == body)
    if len(own) == 0:
        return None
    one = Pieces(pieces.geoms[piece:piece + 1], np.array([piece]), np.array([body]))
    reach = WINDOW_REACH * float(tap_reach(one, taps)[0])
    region, exclude, limit = body_regions(ex, kind)(body)
    b = shapely.bounds(pieces.geoms[piece])
    box = (max(b[0] - reach, limit[0]), max(b[1] - reach, limit[1]),
           min(b[2] + reach, limit[2]), min(b[3] + reach, limit[3]))
    window = shapely.box(*box)
    tap_geoms = taps.geoms[own]
    inside = shapely.intersects(tap_geoms, window)
    problem = SheetProblem(box, np.array([shapely.intersection(region, window)], dtype=object), exclude,
                           tap_geoms[inside], pieces.geoms[piece:piece + 1], float(estimate.sheet[piece]),
                           _grid(box, ctx.tech.electrical.sheet_grid))
    return DevicePotential(kind, piece, box, potential_field(problem), tap_geoms[inside])


def _grid(box, sheet_grid: float | None) -> float:
    side = max(box[2] - box[0], box[3] - box[1]) / PICTURE_CELLS
    return side if sheet_grid is None else min(side, sheet_grid)
