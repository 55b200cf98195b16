"""io-guard-ring: a pad-connected diffusion without a closed guard ring of the right
type, width and distance (docs/rules.md; geometry in analyzers/extraction/rings.py)."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.extraction import rings
from latchwatch.analyzers.extraction.nets import pad_connected
from latchwatch.analyzers.extraction.tapdistance import SLACK
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc
from latchwatch.analyzers.rules.tap_distance import describe

# Per device kind: the ring it needs and the ring of the opposite type.
RING = {"n": ("P+", "p-tap"), "p": ("N+", "n-tap")}
DEFAULT_REACH = 20.0  # um searched for an open ring when the technology sets no max_gap

MESSAGE_NONE = "pad-connected {what} has no {ring} guard ring: no {tap} within {reach:.2f} um surrounds it"
MESSAGE_OPEN = "pad-connected {what} has an open {ring} guard ring: a gap{width} at ({x:.2f}, {y:.2f}){more}"
MESSAGE_WRONG = ("pad-connected {what} is surrounded only by an {other} ring ({other_tap}), not the {ring} "
                 "guard ring ({tap}) it needs")
MESSAGE_NARROW = ("{name} around a pad-connected {what} is {width:.2f} um wide at ({x:.2f}, {y:.2f}) "
                  "(minimum {limit:.2f} um)")
MESSAGE_FAR = ("pad-connected {what} lies up to {value:.2f} um from its {name}, at "
               "({x:.2f}, {y:.2f}) (limit {limit:.2f} um)")
MESSAGE_BARE = "{name} around a pad-connected {what} encloses no contact"
MESSAGE_NO_OUTER = ("no {other} guard ring surrounds the {ring} guard ring of a pad-connected {what} "
                    "(double rings required)")


class _Kind:
    """The pad-connected devices of one kind with their own and the opposite ring regions."""

    def __init__(self, ctx, kind: str):
        ex = ctx.extraction
        self.kind = kind
        self.pieces = ex.ndiff if kind == "n" else ex.pdiff
        self.gated = ex.ndiff_gated if kind == "n" else ex.pdiff_gated
        own, other = (ex.ptap, ex.ntap) if kind == "n" else (ex.ntap, ex.ptap)
        own_c, other_c = (ex.ptap_contacted, ex.ntap_contacted) if kind == "n" else (
            ex.ntap_contacted, ex.ptap_contacted)
        self.own_taps, self.other_taps = own, other
        self.own_tree = shapely.STRtree(own.geoms)
        self.own = ctx.memo(("tap-regions", "p" if kind == "n" else "n"), lambda: rings.tap_regions(own, own_c))
        self.other = ctx.memo(("tap-regions", kind), lambda: rings.tap_regions(other, other_c))
        names = RING[kind], RING["p" if kind == "n" else "n"]
        self.words = dict(ring=names[0][0], tap=names[0][1], other=names[1][0], other_tap=names[1][1])


def _nearest_shape(taps, candidates: np.ndarray, location) -> int:
    """The drawn shape of the tap piece among ``candidates`` nearest ``location`` (x, y)."""
    near = candidates[int(np.argmin(shapely.distance(taps.geoms[candidates], shapely.points(location))))]
    return int(taps.shape[near])


def _ring_piece(regions: rings.TapRegions, taps, region: int, location) -> int:
    return _nearest_shape(taps, regions.members[region], location)


def check(ctx):
    """Findings for pad-connected diffusions without a closed, wide, near enough and contacted guard ring."""
    params = ctx.tech.rules.get("io-guard-ring")
    if params is None:
        return
    pads = pad_connected(ctx)
    for kind in ("n", "p"):
        devices = np.flatnonzero(pads[kind])
        if len(devices):
            yield from _check_kind(ctx, _Kind(ctx, kind), devices, params)


def _check_kind(ctx, k: _Kind, devices: np.ndarray, params):
    min_width, max_gap, double = params.get("min_width"), params.get("max_gap"), params.get("double", False)
    double = double is True or double == ("ndiff" if k.kind == "n" else "pdiff")
    geoms, body = k.pieces.geoms[devices], k.pieces.body[devices]
    own_hole = rings.innermost_holes(k.own, geoms, lambda d, r: k.own.body[r] == body[d])
    other_hole = rings.innermost_holes(k.other, geoms, lambda d, r: np.ones(len(d), bool))
    bounds = shapely.bounds(geoms)
    seen = set()
    for n, i in enumerate(devices):
        shape = int(k.pieces.shape[i])
        words = dict(k.words, what=describe(k.kind, bool(k.gated[i])))

        def finding(code, message, location, related_shape, related_text, shape=shape, n=n, i=i, **fields):
            if (shape, code) in seen:
                return None
            seen.add((shape, code))
            related = (ctx.related_shape(related_shape, related_text, location),) if related_shape is not None else ()
            return ctx.piece_finding(RULE, k.pieces, i, message, location=location, bbox=bounds[n], related=related,
                                     **fields)

        hole = own_hole[n]
        if hole < 0:
            f = _missing_ring(ctx, k, n, i, geoms[n], other_hole[n], min_width, max_gap, words, finding)
            if f is not None:
                yield f
            continue
        inner = _Ring(k.own, k.own_taps, hole, f"{words['ring']} guard ring", "")
        yield from _judge(inner, geoms[n], geoms[n], min_width, max_gap, words, finding)
        if double:
            ring_geom = inner.geom
            outer = rings.innermost_holes(k.other, np.array([ring_geom], dtype=object),
                                          lambda d, r: np.ones(len(d), bool))[0]
            if outer < 0:
                f = finding("no-outer", MESSAGE_NO_OUTER.format(**words), None, None, "")
                if f is not None:
                    yield f
                continue
            outer_ring = _Ring(k.other, k.other_taps, outer, f"outer {words['other']} guard ring", "outer-")
            yield from _judge(outer_ring, ring_geom, geoms[n], min_width, max_gap, words, finding)


class _Ring:
    """A closed ring: the tap region owning ``hole``, how messages name it, its finding codes' prefix."""

    def __init__(self, regions: rings.TapRegions, taps, hole: int, name: str, code: str):
        self.regions, self.taps, self.name, self.code = regions, taps, name, code
        self.region = int(regions.hole_owner[hole])
        self.geom, self.hole = regions.geoms[self.region], regions.holes[hole]

    def piece(self, location) -> int:
        return _ring_piece(self.regions, self.taps, self.region, location)


def _judge(ring: _Ring, inside, device, min_width, max_gap, words, finding):
    """Width (of the band around ``inside``), distance from the device and contact of one ring."""
    words = dict(words, name=ring.name)
    if min_width is not None:
        narrow = rings.narrowest_band(ring.geom, ring.hole, inside, min_width)
        if narrow is not None:
            x, y = narrow.location
            f = finding(ring.code + "narrow", MESSAGE_NARROW.format(width=narrow.width, x=x, y=y, limit=min_width,
                                                                    **words),
                        narrow.location, ring.piece(narrow.location), ring.name,
                        value=narrow.width, limit=min_width, unit="um")
            if f is not None:
                yield f
    if max_gap is not None:
        value, point = rings.farthest_on_line(shapely.get_exterior_ring(device), np.array([ring.geom], dtype=object))
        if value > max_gap + SLACK:
            f = finding(ring.code + "far", MESSAGE_FAR.format(value=value, x=point[0], y=point[1], limit=max_gap,
                                                              **words),
                        point, ring.piece(point), ring.name, value=value, limit=max_gap, unit="um")
            if f is not None:
                yield f
    if not ring.regions.contacted[ring.region]:
        where = shapely.get_coordinates(shapely.point_on_surface(ring.geom))[0]
        f = finding(ring.code + "bare", MESSAGE_BARE.format(**words), where, ring.piece(where), ring.name)
        if f is not None:
            yield f


def _missing_ring(ctx, k, n, i, geom, other_hole, min_width, max_gap, words, finding):
    """No ring of the right type: a ring of the wrong type, an open ring, or nothing."""
    if other_hole >= 0:
        region = int(k.other.hole_owner[other_hole])
        where = shapely.get_coordinates(shapely.shortest_line(k.other.holes[other_hole].exterior, geom))[0]
        return finding("wrong", MESSAGE_WRONG.format(**words), where,
                       _ring_piece(k.other, k.other_taps, region, where), f"{words['other']} ring")
    reach = (max_gap if max_gap is not None else DEFAULT_REACH) + 2 * (min_width or 1.0)
    near = np.zeros(0, np.int64)
    if len(k.own_taps):
        near = np.sort(k.own_tree.query(geom, predicate="dwithin", distance=reach))
        near = near[k.own_taps.body[near] == k.pieces.body[i]]
    gap = None
    if len(near):
        gap = rings.find_gap(shapely.union_all(k.own_taps.geoms[near]), geom,
                             max_gap if max_gap is not None else DEFAULT_REACH)
    if gap is None:
        where = None if len(near) == 0 else shapely.get_coordinates(
            shapely.shortest_line(shapely.union_all(k.own_taps.geoms[near]), geom))[0]
        related = _nearest_shape(k.own_taps, near, where) if len(near) else None
        return finding("none", MESSAGE_NONE.format(reach=reach, **words), where, related,
                       f"nearest {words['tap']}")
    x, y = gap.location
    width = f" of {gap.width:.2f} um" if gap.width is not None else ""
    more = f" ({gap.count} gaps in all)" if gap.count > 1 else ""
    return finding("open", MESSAGE_OPEN.format(width=width, x=x, y=y, more=more, **words), gap.location,
                   _nearest_shape(k.own_taps, near, gap.location), f"{words['ring']} ring beside the gap",
                   value=gap.width, unit="um" if gap.width is not None else None)


RULE = Rule(
    id="io-guard-ring",
    severity=Severity.ERROR,
    summary="A pad-connected diffusion lacks a closed guard ring of the right type, width and distance.",
    doc=RuleDoc(
        flags=(
            "Every pad-connected device diffusion (one of its terminals is on a net whose label matches "
            "[nets] pads, or it overlaps the io_marker layer) that is not surrounded by a closed guard ring "
            "of the right type: a P+ ring (p-taps of its own body, the substrate or its isolated p-well) "
            "around N+, an N+ ring (n-taps in its own n-well) around P+. Closed means the diffusion lies in a "
            "hole of one connected tap region; pieces meeting at a corner point count as connected, and the "
            "width check then reports the joint. With [rules.io-guard-ring]: min_width, the ring must hold a "
            "closed band at least that wide all round: the ring eroded by half the width must still surround "
            "the diffusion (the narrowest width of the best band and its place are reported, found by bisection "
            "to 1 nm; the erosion draws arcs with 32 chords per quarter circle, which can let a ring pass at "
            "most r(1 - cos(pi/128)), 0.03 nm at 2 um, narrower than asked); max_gap, no point of the diffusion's "
            "edge may lie farther than that from the ring (its inner edge; exact to 1 nm), so a ring spaced max_gap "
            "away on every side passes; double = true, a closed ring of the "
            "opposite type must surround the first, held to the same width, to the same max_gap from the diffusion "
            "and to a contact (double = \"ndiff\" or \"pdiff\" asks it for pad-connected N+ or P+ only). The "
            "ring must also enclose a contact. Only the innermost "
            "ring of the right type is judged. An open ring (taps that a closing with a radius up to max_gap "
            "makes surround the diffusion, with most of the closed hole's edge tap) is reported with the place "
            "and width of its gap, a ring of the wrong type as such, and anything else as no ring."
        ),
        why=(
            "A pad-connected diffusion is where external current enters: an undershoot or overshoot at the "
            "pin forward-biases its junction and injects carriers straight into the substrate or the well, "
            "the trigger current of the parasitic thyristor. A majority-carrier ring of taps around it ties "
            "the body right there, keeping the local base voltage of the parasitic bipolar below the "
            "junction turn-on voltage (about 0.6-0.7 V); the opposite-type ring of a double ring collects "
            "the injected minority carriers before they reach the neighbouring devices. A ring that is "
            "open, too narrow or too far away lets the current past, and its resistance is no longer small."
        ),
        example=(
            "box(cell, NPLUS, 0, 0, 10, 4)\n"
            "box(cell, ACTIVE, 0, 0, 10, 4)              # output NMOS drain on the pad net\n"
            "ring(cell, PPLUS, -4, -4, 14, 8, width=2, gap_at='left')   # P+ ring with a gap\n"
            "cell.add(gdstk.Label('PAD_OUT', (5, 2), layer=7, texttype=5))"
        ),
        fix=(
            "Draw an unbroken contacted tap ring around every pad-connected device: P+ (substrate taps) "
            "around N+ drivers, N+ (n-well taps) around P+ drivers, at least min_width wide and no farther "
            "than max_gap from the devices; route gate poly over the ring in metal instead of breaking the "
            "ring for it; where the technology asks for double rings, add the opposite-type ring outside."
        ),
    ),
    check=check,
)
