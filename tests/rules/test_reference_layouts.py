"""The whole pipeline (layout file -> flatten -> extract -> exact tap distance) against a
slow, obviously correct reference on hypothesis-generated hierarchical layouts: gdstk's
own flattening, shapely unions for the wells, and dense sampling for the distances."""

from __future__ import annotations

import gdstk
import numpy as np
import shapely
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from latchwatch.analyzers.check import CheckOptions, check_outcome
from latchwatch.server.config.techfiles import load_technology
from latchwatch.server.sandbox.runner import read_layout_file

NWELL, ACTIVE, NPLUS, PPLUS, CONTACT = 1, 2, 4, 5, 6
STEP = 0.1  # um, the reference's sampling grid


def on_grid(lo, hi):
    """Coordinates on a 5 nm grid, so that abutting array pitches stay exact in the file."""
    return st.integers(int(np.ceil(lo / 0.005)), int(np.floor(hi / 0.005))).map(lambda k: k * 0.005)


@st.composite
def layouts(draw):
    w, h = draw(on_grid(8, 24)), draw(on_grid(6, 16))
    unit = gdstk.Cell("UNIT")
    unit.add(gdstk.rectangle((0, 0), (w, h), layer=NWELL))
    # P+ device in the left half, n-tap in the right half: they never overlap.
    px0, py0 = draw(on_grid(0.5, w / 2 - 2)), draw(on_grid(0.5, h - 2))
    px1, py1 = draw(on_grid(px0 + 0.5, w / 2 - 0.5)), draw(on_grid(py0 + 0.5, h - 0.5))
    for layer in (PPLUS, ACTIVE):
        unit.add(gdstk.rectangle((px0, py0), (px1, py1), layer=layer))
    tx0, ty0 = draw(on_grid(w / 2 + 0.5, w - 1.6)), draw(on_grid(0.5, h - 1.6))
    for layer in (NPLUS, ACTIVE):
        unit.add(gdstk.rectangle((tx0, ty0), (tx0 + 1.0, ty0 + 1.0), layer=layer))
    if draw(st.floats(0, 1)) < 0.8:  # sometimes uncontacted: the well then floats
        unit.add(gdstk.rectangle((tx0 + 0.3, ty0 + 0.3), (tx0 + 0.7, ty0 + 0.7), layer=CONTACT))
    top = gdstk.Cell("TOP")
    diag = float(np.hypot(w, h)) + 1.0
    for k in range(draw(st.integers(1, 3))):
        angle = draw(st.sampled_from([0, 30, 90, 180, 270]))
        ref = gdstk.Reference(unit, (k * 400.0, draw(on_grid(-60, 60))), rotation=np.radians(angle),
                              x_reflection=draw(st.booleans()))
        cols, rows = draw(st.integers(1, 3)), draw(st.integers(1, 2))
        if cols * rows > 1:
            # Abutting copies merge their wells (axis-aligned only); others stay apart.
            abut = angle % 90 == 0 and draw(st.booleans())
            pitch = ((w, h) if angle % 180 == 0 else (h, w)) if abut else (diag, diag)
            ref.repetition = gdstk.Repetition(cols, rows, spacing=pitch)
        top.add(ref)
    return top, unit


def _reference_distances(top):
    """Per P+ device polygon: (bounds, max over the device of the distance to the nearest
    contacted n-tap of its own merged n-well, or inf)."""
    def layer(n):  # flattened by gdstk, snapped to the file's 1 nm grid as a layout database does
        return [shapely.Polygon(np.round(p.points, 3)) for p in top.get_polygons(layer=n, datatype=0)]
    wells = list(shapely.get_parts(shapely.union_all(layer(NWELL))))
    contacts = layer(CONTACT)
    nplus = shapely.union_all(layer(NPLUS))
    pplus = shapely.union_all(layer(PPLUS))
    actives = layer(ACTIVE)
    taps = [a for a in actives if nplus.contains(a.centroid) and any(a.intersection(c).area > 0 for c in contacts)]
    devices = [a for a in actives if pplus.contains(a.centroid)]
    out = []
    for dev in devices:
        well = next(w for w in wells if w.contains(dev.centroid))
        own = [t for t in taps if well.contains(t.centroid)]
        if not own:
            out.append((dev.bounds, np.inf))
            continue
        x0, y0, x1, y1 = dev.bounds
        xs, ys = np.meshgrid(np.arange(x0, x1 + STEP, STEP), np.arange(y0, y1 + STEP, STEP))
        grid = np.column_stack([xs.ravel(), ys.ravel()])
        grid = grid[shapely.covers(dev, shapely.points(grid))]
        # The boundary too, finely: a maximum on an edge may lie a whole grid diagonal
        # from the nearest grid point inside.
        edge = shapely.segmentize(dev.exterior, STEP / 4)
        pts = shapely.points(np.concatenate([grid, shapely.get_coordinates(edge)]))
        out.append((dev.bounds, float(shapely.distance(pts, shapely.union_all(own)).max())))
    return out


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(layout=layouts())
def test_pipeline_matches_dense_sampling(layout, tmp_path_factory):
    top, unit = layout
    lib = gdstk.Library()
    lib.add(top, unit)
    path = tmp_path_factory.mktemp("ref") / "ref.gds"
    lib.write_gds(str(path))
    result = check_outcome(read_layout_file(path, "gds"), load_technology("demo"), CheckOptions(top="TOP"),
                           want_devices=True)
    got = [(np.array(d.bbox), d.tap_distance_um) for d in result.devices if d.kind == "pdiff"]
    # The reference reads the same file back (coordinates on the same 1 nm grid).
    expected = _reference_distances(next(c for c in gdstk.read_gds(str(path)).cells if c.name == "TOP"))
    assert len(got) == len(expected)
    for bounds, ref in expected:
        # Array pitches read back from a file can fall on half nanometres, which the two
        # sides may round either way: boxes and values agree to within the 1 nm grid.
        (value,) = [v for b, v in got if np.allclose(b, bounds, atol=1.01e-3)]
        if np.isinf(ref):
            assert value is None  # a floating well: no tap to measure to
            continue
        # The reference samples on a 0.1 um grid (plus the vertices): it can miss the true
        # maximum by at most half a grid diagonal; the pipeline is exact to 1 nm.
        assert ref - 2e-3 <= value <= ref + STEP * np.sqrt(2) / 2 + 2e-3
