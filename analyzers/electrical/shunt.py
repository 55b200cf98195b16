"""Shunt resistance of every device diffusion, estimated from a sheet model of its body.

Bodies and their sheets: each n-well (``nwell_sheet``), each isolated p-well
(``pwell_sheet``) and the substrate (``psub_sheet``), or the sheet derived from doping
and depth (technology.Electrical.sheet). The substrate is a sheet over the layout's
extent plus SUBSTRATE_MARGIN with every n-well, deep n-well and isolated p-well cut
out. Contacted taps of the body are the grounded electrodes; the device diffusion is
the other one (analyzers/electrical/sheet.py solves the sheet).

A body whose grid stays small is solved whole: one factorization for all its devices.
Larger bodies are solved in a window around each device, reaching WINDOW_REACH times
the true distance to its WINDOW_TAPS-th nearest tap beyond it (the sheet outside a
window is cut away, which can only raise the estimate; see _windowed). Windows whose
contents are the same up to a translation (repeated cells) are solved once: each
window's contents are hashed after clipping, relative to the device. The cost is then
linear in the number of distinct windows, and a window an earlier check of this process
solved is taken from window_memo.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from scipy.spatial import cKDTree

from latchwatch.analyzers.electrical.sheet import SheetProblem, make_mesh, solve
from latchwatch.analyzers.electrical.window_memo import SOLVED_WINDOWS, memo_keys
from latchwatch.analyzers.extraction.extract import SUBSTRATE, Pieces, is_pwell_body, pwell_index
from latchwatch.analyzers.extraction.nets import pad_connected
from latchwatch.analyzers.extraction.tapdistance import TapIndex
from latchwatch.analyzers.layout import geometry as g
from latchwatch.analyzers.parallel import side_by_side

SUBSTRATE_MARGIN = 5.0  # layout units (um) of substrate sheet beyond the layout's extent
WHOLE_BODY_CELLS = 6000  # grid cells up to which a body is solved whole
WHOLE_BODY_DEVICES = 48  # more devices than this: windows (the grid grows with every device)
WINDOW_TAPS = 2  # a window reaches WINDOW_REACH times the distance to the device's WINDOW_TAPS-th nearest tap
SECOND_TAP_CAP = 2.0  # ... but no farther than this many times the distance to the nearest tap
WINDOW_REACH = 2.0
WINDOW_RETRIES = 2  # a device cut off from its taps inside its window gets a 4x wider one
CHANNEL_TAPS = 2  # taps tried for a device's channel bound
PRUNE_MARGIN = 1.1  # a bound this far inside the limit skips the solve (the grid errs by under 6%)
QUANTUM = 1e-6  # layout units: window contents are compared on this grid


@dataclass
class KindShunt:
    """Per device piece of one kind (aligned with Extraction.pdiff or .ndiff)."""

    ohm: np.ndarray  # estimated resistance to the body's taps; inf: no tap reachable; nan: no sheet value
    required: np.ndarray  # A the device must withstand
    pad: np.ndarray  # bool: pad-connected
    taps: Pieces  # the contacted taps of the body type
    sheet: np.ndarray  # ohm/sq used per device (nan when unknown)
    vbe_on: float

    @property
    def trigger(self) -> np.ndarray:
        """Current (A) through the shunt that forward-biases the junction: vbe_on / R."""
        with np.errstate(divide="ignore"):
            return np.where(np.isnan(self.ohm), np.nan, self.vbe_on / self.ohm)


def shunt_estimates(ctx, exact: bool | None = None) -> dict[str, KindShunt]:
    """Per kind ("p", "n"), computed once per check context. ``exact`` (default: the
    options' exact_devices, set when the devices table is wanted) estimates every
    device; otherwise devices that a channel bound proves within their limit are
    skipped (their ``ohm`` is nan), which is all the rule needs."""
    exact = ctx.options.exact_devices if exact is None else exact
    return ctx.memo(("shunt", exact), lambda: _both_kinds(ctx, prune=not exact))


PARALLEL_DEVICES = 20_000  # devices of both kinds from which the two kinds are estimated side by side


def _both_kinds(ctx, prune: bool) -> dict[str, KindShunt]:
    """The estimates of both kinds; on a large layout in two threads (analyzers/parallel.py;
    at 1M shapes on 2 cores: 2.0 s serial, 1.4 s in two threads). The two kinds share
    nothing they write but the window memo, which takes a lock."""
    ex = ctx.extraction
    large = len(ex.pdiff) + len(ex.ndiff) >= PARALLEL_DEVICES
    if large:
        pad_connected(ctx)  # a shared memo entry: computed once, before the threads read it
    p, n = side_by_side(lambda: _estimate_kind(ctx, "p", prune), lambda: _estimate_kind(ctx, "n", prune),
                        large=large, name="latchwatch-shunt")
    return {"p": p, "n": n}


def _estimate_kind(ctx, kind: str, prune: bool) -> KindShunt:
    ex, elec = ctx.extraction, ctx.tech.electrical
    pieces = ex.pdiff if kind == "p" else ex.ndiff
    taps = ex.ntap.select(ex.ntap_contacted) if kind == "p" else ex.ptap.select(ex.ptap_contacted)
    n = len(pieces)
    pad = pad_connected(ctx)[kind] if n else np.zeros(0, bool)
    required = np.where(pad, elec.injection_current, elec.core_current)
    bodies, body_of = np.unique(pieces.body, return_inverse=True)
    sheet = np.array([_sheet_of(elec, kind, int(b)) for b in bodies], float)[body_of.ravel()]
    ohm = np.full(n, np.inf)
    ohm[np.isnan(sheet)] = np.nan
    tapped = np.isin(pieces.body, taps.body) & ~np.isnan(sheet)
    if not tapped.any():
        return KindShunt(ohm, required, pad, taps, sheet, elec.vbe_on)
    regions = body_regions(ex, kind)
    if prune:
        bound = np.full(n, np.inf)
        bound[tapped] = channel_bound(pieces.select(tapped), taps, sheet[tapped], regions)
        proven = tapped & (bound * PRUNE_MARGIN <= elec.vbe_on / required)
        ohm[proven] = np.nan
        tapped &= ~proven
    windowed = []
    for body in np.unique(pieces.body[tapped]):
        members = np.flatnonzero((pieces.body == body) & tapped)
        region, exclude, box = regions(int(body))
        if len(members) <= WHOLE_BODY_DEVICES:
            whole = SheetProblem(box, np.array([region], dtype=object), exclude, taps.geoms[taps.body == body],
                                 pieces.geoms[members], float(sheet[members[0]]), elec.sheet_grid)
            if make_mesh(whole)[0].cells <= WHOLE_BODY_CELLS:
                ohm[members] = solve(whole).resistance
                continue
        windowed.append(members)
    if windowed:
        members = np.concatenate(windowed)
        ohm[members] = _windowed(pieces, members, sheet[members], taps, regions, elec.sheet_grid)
    return KindShunt(ohm, required, pad, taps, sheet, elec.vbe_on)


def channel_bound(pieces: Pieces, taps: Pieces, sheet: np.ndarray, regions) -> np.ndarray:
    """A proven upper bound on each piece's shunt resistance (inf when none is found).

    Thomson's principle: any unit current flow from the device to the taps dissipates at
    least as much as the real one. The flow used is uniform along a straight channel from
    the device's centroid to a tap's, as wide as the smaller of the two discs centred
    there that fit inside the device and the tap (so the channel's ends lie inside both
    electrodes); when the channel lies in the sheet, R <= Rs * length / width. The
    best of the CHANNEL_TAPS nearest taps of the body is taken."""
    n = len(pieces)
    bound = np.full(n, np.inf)
    if n == 0 or len(taps) == 0:
        return bound
    dev_c, dev_r = _inner_disc(pieces.geoms)
    tap_c, tap_r = _inner_disc(taps.geoms)
    k = min(CHANNEL_TAPS, len(taps))
    _, near = cKDTree(np.c_[tap_c, taps.body * _BODY_SPACING]).query(np.c_[dev_c, pieces.body * _BODY_SPACING],
                                                                   k=list(range(1, k + 1)))
    dev = np.repeat(np.arange(n), k)
    tap = near.ravel()
    ok = taps.body[tap] == pieces.body[dev]
    dev, tap = dev[ok], tap[ok]
    width = 2 * np.minimum(dev_r[dev], tap_r[tap])
    a, b = dev_c[dev], tap_c[tap]
    length = np.hypot(*(b - a).T)
    ok = (width > 0) & (length > 0)
    dev, tap, width, length, a, b = dev[ok], tap[ok], width[ok], length[ok], a[ok], b[ok]
    normal = np.c_[-(b - a)[:, 1], (b - a)[:, 0]] / length[:, None] * (width / 2)[:, None]
    corners = np.stack([a + normal, b + normal, b - normal, a - normal], axis=1)
    channels = shapely.polygons(corners)
    body = pieces.body[dev]
    bodies, body_of = np.unique(body, return_inverse=True)
    info = [regions(int(b)) for b in bodies]
    region = np.array([i[0] for i in info], dtype=object)
    shapely.prepare(region)  # one prepared region per body, asked about many channels
    inside = shapely.covers(region[body_of.ravel()], channels)
    for k, (_, cut, _) in enumerate(info):
        if len(cut):  # a channel that meets a cut-out shape at all is not used (touching too)
            sel = np.flatnonzero(body_of.ravel() == k)
            hit, _ = shapely.STRtree(cut).query(channels[sel], predicate="intersects")
            inside[sel[hit]] = False
    value = np.where(inside, sheet[dev] * length / width, np.inf)
    np.minimum.at(bound, dev, value)
    return bound


def _inner_disc(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Centroid of each polygon and the radius of the disc around it inside the polygon
    (0 when the centroid lies outside). Rectangles take their box (no GEOS call)."""
    b = shapely.bounds(geoms)
    centre = (b[:, :2] + b[:, 2:]) / 2
    radius = np.minimum(b[:, 2] - b[:, 0], b[:, 3] - b[:, 1]) / 2
    other = np.flatnonzero(~g.axis_aligned_rectangles(geoms))
    if len(other):
        c = shapely.centroid(geoms[other])
        radius[other] = np.where(shapely.contains(geoms[other], c),
                                 shapely.distance(c, shapely.boundary(geoms[other])), 0.0)
        centre[other] = shapely.get_coordinates(c)
    return centre, radius


def _sheet_of(elec, kind: str, body: int) -> float:
    name = "nwell" if kind == "p" else ("pwell" if is_pwell_body(body) else "psub")
    value = elec.sheet(name)
    return np.nan if value is None else float(value)


def substrate_box(ex) -> tuple[float, float, float, float]:
    """The substrate region: the layout's extent grown by SUBSTRATE_MARGIN on every side."""
    x0, y0, x1, y1 = ex.flat.extent()
    m = SUBSTRATE_MARGIN
    return (float(x0 - m), float(y0 - m), float(x1 + m), float(y1 + m))


def body_regions(ex, kind: str):
    """body -> (region polygon, polygons cut out of it, bounding box). Merged wells keep
    the vertices where their drawn shapes met; simplify(0) drops those."""
    empty = np.empty(0, dtype=object)
    if kind == "p":
        wells = shapely.simplify(ex.wells, 0.0)
        return lambda body: (wells[body], empty, tuple(shapely.bounds(wells[body]).tolist()))
    pwells = shapely.simplify(ex.pwells, 0.0)
    box = substrate_box(ex)
    cut = shapely.simplify(np.concatenate([ex.wells, ex.deep_nwells, ex.pwells]).astype(object), 0.0)

    def region(body):
        if is_pwell_body(body):
            k = pwell_index(body)
            return pwells[k], empty, tuple(shapely.bounds(pwells[k]).tolist())
        return shapely.box(*box), cut, box

    return region


def tap_reach(pieces: Pieces, taps: Pieces) -> np.ndarray:
    """True geometric distance from each piece to the WINDOW_TAPS-th nearest tap of its
    own body, at most SECOND_TAP_CAP times the nearest one, and never less than the
    piece's own larger side (a tap abutting the device still needs room for the
    current to spread). -inf where the body has no tap.

    Box centres would not do: the centre of a tap ring, or of an L-shaped strip, can sit
    on the device it surrounds."""
    nearest, _ = nearest_taps(pieces, taps)
    reach = nearest.copy()
    found = np.isfinite(nearest)
    if WINDOW_TAPS > 1 and found.any():
        rows = np.flatnonzero(found)
        cap = SECOND_TAP_CAP * nearest[rows]
        qi, ti = shapely.STRtree(taps.geoms).query(pieces.geoms[rows], predicate="dwithin", distance=cap)
        same = taps.body[ti] == pieces.body[rows[qi]]
        qi, ti = qi[same], ti[same]
        d = shapely.distance(pieces.geoms[rows[qi]], taps.geoms[ti])
        # The WINDOW_TAPS-th smallest distance per piece, or the cap when fewer taps are that near.
        order = np.lexsort((d, qi))
        rank = np.arange(len(order)) - np.searchsorted(qi[order], qi[order])
        kth = np.full(len(rows), np.nan)
        pick = order[rank == WINDOW_TAPS - 1]
        kth[qi[pick]] = d[pick]
        reach[rows] = np.where(np.isnan(kth), cap, kth)
    b = shapely.bounds(pieces.geoms)
    size = np.maximum(b[:, 2] - b[:, 0], b[:, 3] - b[:, 1])
    return np.where(found, np.maximum(reach, size), -np.inf)


_BODY_SPACING = 1e12


def nearest_taps(pieces: Pieces, taps: Pieces) -> tuple[np.ndarray, np.ndarray]:
    """(distance, tap index) from each piece to the nearest tap of its own body."""
    return TapIndex(taps.geoms, taps.body).nearest_to_shapes(pieces.geoms, pieces.body)


# --- windows -------------------------------------------------------------------------

def _windowed(pieces, members, sheet, taps, regions, grid) -> np.ndarray:
    """Estimates of ``pieces[members]``, each in its own window; windows of every body of
    the kind are compared together, so a repeated well is solved once.

    Cutting the sheet outside a window can only raise the resistance (removing conductor
    never lowers it: Rayleigh's monotonicity), so each estimate errs upward. A window
    reaches WINDOW_REACH times the true distance to the device's WINDOW_TAPS-th nearest
    tap (tap_reach), so the taps that carry most of the current lie inside it; a device
    that still finds no tap in its window gets a 4x wider one, WINDOW_RETRIES times."""
    devices = pieces.geoms[members]
    body = pieces.body[members]
    bounds = shapely.bounds(devices)
    reach = WINDOW_REACH * tap_reach(Pieces(devices, members, body), taps)
    info = {int(b): regions(int(b)) for b in np.unique(body)}
    body_box = np.array([info[int(b)][2] for b in body], float)
    ohm = np.full(len(members), np.inf)
    todo = np.arange(len(members))
    for attempt in range(WINDOW_RETRIES + 1):
        if len(todo) == 0:
            break
        r = reach[todo] * 4.0 ** attempt
        b, limit = bounds[todo], body_box[todo]
        boxes = np.c_[np.maximum(b[:, :2] - r[:, None], limit[:, :2]), np.minimum(b[:, 2:] + r[:, None], limit[:, 2:])]
        ohm[todo] = _solve_windows(devices[todo], body[todo], sheet[todo], boxes, info, taps, grid)
        todo = todo[np.isinf(ohm[todo])]
    return ohm


@dataclass
class _WindowPieces:
    """Clipped contents of many windows, one row per part: a clipped rectangle as its
    ``bounds`` row (its ``geoms`` entry None, built only for a window that is solved),
    or a polygon part in ``geoms`` (its ``bounds`` row NaN)."""

    window: np.ndarray
    category: np.ndarray  # 0 region, 1 cut out of the region, 2 tap
    geoms: np.ndarray
    bounds: np.ndarray | None = None

    def __post_init__(self):
        if self.bounds is None:
            self.bounds = np.full((len(self.window), 4), np.nan)

    def shapes(self, rows: np.ndarray) -> np.ndarray:
        """The geometries of ``rows``."""
        out = self.geoms[rows].copy()
        b = self.bounds[rows]
        rect = ~np.isnan(b[:, 0])
        if rect.any():
            out[rect] = shapely.box(b[rect, 0], b[rect, 1], b[rect, 2], b[rect, 3])
        return out


def _clip(windows: np.ndarray, shapes: np.ndarray, index: np.ndarray, boxes: np.ndarray,
          category: int) -> _WindowPieces:
    """Parts of ``shapes[index[k]]`` inside box ``windows[k]``. Rectangles are clipped
    with their bounds and kept as bounds (no GEOS overlay or geometry: most layout
    shapes are rectangles, and most windows repeat one already solved)."""
    geoms = shapes[index]
    rect = g.axis_aligned_rectangles(geoms)
    out_window, out_geoms, out_bounds = [], [], []
    if rect.any():
        b, w = shapely.bounds(geoms[rect]), boxes[windows[rect]]
        c = np.c_[np.maximum(b[:, :2], w[:, :2]), np.minimum(b[:, 2:], w[:, 2:])]
        ok = (c[:, 2] > c[:, 0]) & (c[:, 3] > c[:, 1])
        out_window.append(windows[rect][ok])
        out_geoms.append(np.full(int(ok.sum()), None, dtype=object))
        out_bounds.append(c[ok])
    if (~rect).any():
        w = windows[~rect]
        box_geoms = shapely.box(boxes[w, 0], boxes[w, 1], boxes[w, 2], boxes[w, 3])
        parts, owner = g.explode(shapely.intersection(geoms[~rect], box_geoms), np.arange(len(w)))
        # One form per shape (no collinear vertices, canonical ring start), so that equal
        # contents give equal coordinates wherever the window cut them out.
        out_window.append(w[owner])
        out_geoms.append(shapely.normalize(shapely.simplify(parts, 0.0)))
        out_bounds.append(np.full((len(parts), 4), np.nan))
    if not out_window:
        return _WindowPieces(np.zeros(0, np.int64), np.zeros(0, np.int64), np.empty(0, dtype=object))
    window = np.concatenate(out_window)
    return _WindowPieces(window, np.full(len(window), category, np.int64), np.concatenate(out_geoms),
                         np.concatenate(out_bounds))


def _solve_windows(devices, body, sheet, boxes, info, taps, grid) -> np.ndarray:
    n = len(devices)
    box_geoms = shapely.box(boxes[:, 0], boxes[:, 1], boxes[:, 2], boxes[:, 3])
    # The substrate's region is its box (the window itself) less the wells; a well's is the well.
    substrate = body == SUBSTRATE
    own = np.flatnonzero(~substrate)
    parts = [_clip(own, np.array([info[int(b)][0] for b in body[own]], dtype=object), np.arange(len(own)),
                   boxes, 0)]
    cut = info[SUBSTRATE][1] if substrate.any() else np.empty(0, dtype=object)
    if len(cut):
        w, c = shapely.STRtree(cut).query(box_geoms[substrate], predicate="intersects")
        parts.append(_clip(np.flatnonzero(substrate)[w], cut, c, boxes, 1))
    w, t = shapely.STRtree(taps.geoms).query(box_geoms, predicate="intersects")
    same = taps.body[t] == body[w]
    parts.append(_clip(w[same], taps.geoms, t[same], boxes, 2))
    contents = _WindowPieces(*(np.concatenate([getattr(p, f) for p in parts])
                               for f in ("window", "category", "geoms", "bounds")))
    key = window_keys(devices, boxes, shapely.bounds(devices)[:, :2], contents)
    key[:, 4] ^= sheet.view(np.uint64) ^ substrate.astype(np.uint64)
    _, first, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    order = np.argsort(contents.window, kind="stable")
    starts = np.searchsorted(contents.window[order], np.arange(n + 1))
    memo = memo_keys(key[first], grid)
    known = [SOLVED_WINDOWS.get(k) for k in memo]
    ohm_unique = np.array([np.nan if v is None else v for v in known], float)
    todo = [u for u, v in enumerate(known) if v is None]
    for u in todo:
        w = first[u]
        mine = order[starts[w]:starts[w + 1]]
        cat, geoms = contents.category[mine], contents.shapes(mine)
        include = np.array([box_geoms[w]], dtype=object) if substrate[w] else geoms[cat == 0]
        problem = SheetProblem(tuple(boxes[w].tolist()), include, geoms[cat == 1], geoms[cat == 2],
                               np.array([devices[w]], dtype=object), float(sheet[w]), grid)
        ohm_unique[u] = solve(problem).resistance[0]
    SOLVED_WINDOWS.record([memo[u] for u in todo], ohm_unique[todo])
    return ohm_unique[inverse.ravel()]


# --- window keys ---------------------------------------------------------------------

_MULTIPLIERS = (np.uint64(0x9E3779B97F4A7C15), np.uint64(0xC2B2AE3D27D4EB4F))


def _sequence_hash(values: np.ndarray, group: np.ndarray, n_groups: int, multiplier: np.uint64) -> np.ndarray:
    """A 64-bit polynomial hash of each group's values, in order (groups contiguous)."""
    out = np.zeros(n_groups, np.uint64)
    if len(values) == 0:
        return out
    starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
    position = np.arange(len(values)) - np.repeat(starts, np.diff(np.r_[starts, len(values)]))
    powers = np.ones(int(position.max()) + 1, np.uint64)
    with np.errstate(over="ignore"):
        for k in range(1, len(powers)):
            powers[k] = powers[k - 1] * multiplier
        mixed = (values.astype(np.uint64) + np.uint64(0x632BE59BD9B4E019)) * powers[position]
        out[group[starts]] = np.add.reduceat(mixed, starts)
    return out


def window_keys(devices, boxes, origin, contents: _WindowPieces) -> np.ndarray:
    """(n, 5) uint64 rows, equal for windows whose contents are equal after translating
    each to its device's lower-left corner: two 64-bit hashes of the clipped contents,
    of the device, and of the window's size and place relative to the device."""
    n = len(devices)
    keys = np.zeros((n, 5), np.uint64)
    size = np.round((boxes[:, 2:] - boxes[:, :2]) / QUANTUM).astype(np.int64)
    # The window's place relative to its device counts too: a substrate window's region is
    # the window itself, which its clipped contents do not show.
    offset = np.round((boxes[:, :2] - origin) / QUANTUM).astype(np.int64)
    with np.errstate(over="ignore"):
        mixed = np.zeros(n, np.uint64)
        for part in (size[:, 0], size[:, 1], offset[:, 0], offset[:, 1]):
            mixed = mixed * _MULTIPLIERS[0] + part.astype(np.uint64)
    keys[:, 4] = mixed
    rect = ~np.isnan(contents.bounds[:, 0])
    poly = np.flatnonzero(~rect)
    for h, mult in enumerate(_MULTIPLIERS):
        keys[:, h] = _window_hash(_polygon_hashes(devices, np.arange(n), origin, mult), np.zeros(n, np.int64),
                                  np.arange(n), n, mult)
        part_hash = np.zeros(len(rect), np.uint64)
        part_hash[rect] = _rectangle_hashes(contents.bounds[rect], contents.window[rect], origin, mult)
        part_hash[poly] = _polygon_hashes(contents.geoms[poly], contents.window[poly], origin, mult) ^ _POLYGON_TAG
        keys[:, 2 + h] = _window_hash(part_hash, contents.category, contents.window, n, mult)
    return keys


_POLYGON_TAG = np.uint64(0x5BD1E9955BD1E995)  # keeps a polygon part's hash apart from a rectangle's


def _polygon_hashes(geoms, owner, origin, multiplier) -> np.ndarray:
    """Per geometry, a hash of its vertices relative to its window's origin, in order."""
    if len(geoms) == 0:
        return np.zeros(0, np.uint64)
    xy, part = shapely.get_coordinates(geoms, return_index=True)
    q = np.round((xy - origin[owner[part]]) / QUANTUM).astype(np.int64)
    seq = np.c_[q, np.full(len(q), -1, np.int64)].ravel()  # -1 separates vertices from nothing
    return _sequence_hash(seq, np.repeat(part, 3), len(geoms), multiplier)


def _rectangle_hashes(bounds, owner, origin, multiplier) -> np.ndarray:
    """Per clipped rectangle, a hash of its four bounds relative to its window's origin."""
    q = np.round((bounds - np.tile(origin[owner], 2)) / QUANTUM).astype(np.int64).astype(np.uint64)
    out = np.zeros(len(q), np.uint64)
    with np.errstate(over="ignore"):
        for column in range(4):
            out = out * multiplier + (q[:, column] + np.uint64(0x632BE59BD9B4E019))
    return out


def _window_hash(part_hash, category, owner, n, multiplier) -> np.ndarray:
    """Per window, an order-free hash of its parts: sorted by (category, hash) first."""
    order = np.lexsort((part_hash, category, owner))
    seq = np.c_[category[order].astype(np.uint64), part_hash[order]].ravel().view(np.int64)
    return _sequence_hash(seq, np.repeat(owner[order], 2), n, multiplier)


# --- figures -------------------------------------------------------------------------

_PREFIXES = {-15: "f", -12: "p", -9: "n", -6: "u", -3: "m", 0: "", 3: "k", 6: "M", 9: "G", 12: "T"}


def si(value: float, unit: str) -> str:
    """Three significant figures with an SI prefix: si(23500, "ohm") == "23.5 kohm"."""
    value = float(value)
    if not np.isfinite(value):
        return f"{value} {unit}"
    if value == 0:
        return f"0 {unit}"
    rounded = float(f"{value:.3g}")
    exponent = int(np.clip(np.floor(np.log10(abs(rounded)) / 3) * 3, -15, 12))
    mantissa = f"{rounded / 10 ** exponent:#.3g}".rstrip(".")
    return f"{mantissa} {_PREFIXES[exponent]}{unit}"
