"""Small builders of captured layouts for analyzer unit tests (no child process)."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np

from latchwatch.analyzers.model.captured import CapturedCell, CapturedLayout
from latchwatch.analyzers.model.findings import Frame

# The demo technology's layers (server/config/technologies/demo.toml).
NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)


class CellBuilder:
    def __init__(self, name: str):
        self.name = name
        self.polys: list[tuple[tuple[int, int], np.ndarray, int]] = []
        self.refs: list[dict] = []
        self.labels: list[tuple[str, tuple[int, int], tuple[float, float], int]] = []

    def rect(self, layer, x0, y0, x1, y1, stack=-1):
        self.polys.append((layer, np.array([(x0, y0), (x1, y0), (x1, y1), (x0, y1)], float), stack))
        return self

    def polygon(self, layer, points, stack=-1):
        self.polys.append((layer, np.asarray(points, float), stack))
        return self

    def label(self, text, layer, x, y, stack=-1):
        """A text label on (layer, texttype) ``layer`` at (x, y)."""
        self.labels.append((text, layer, (x, y), stack))
        return self

    def ref(self, cell_index, origin=(0, 0), rotation=0.0, magnification=1.0, x_reflection=False,
            columns=1, rows=1, v1=(0, 0), v2=(0, 0), explicit=None, stack=-1):
        self.refs.append(dict(cell=cell_index, origin=origin, rotation=rotation, mag=magnification,
                              xr=x_reflection, columns=columns, rows=rows, v1=v1, v2=v2,
                              explicit=explicit, stack=stack))
        return self

    def build(self) -> CapturedCell:
        c = CapturedCell(self.name)
        if self.polys:
            c.poly_layer = np.array([p[0][0] for p in self.polys], np.int32)
            c.poly_datatype = np.array([p[0][1] for p in self.polys], np.int32)
            c.poly_offsets = np.concatenate([[0], np.cumsum([len(p[1]) for p in self.polys])]).astype(np.int64)
            c.points = np.concatenate([p[1] for p in self.polys])
            c.poly_stack = np.array([p[2] for p in self.polys], np.int32)
        if self.labels:
            c.label_text = [t for t, _, _, _ in self.labels]
            c.label_layer = np.array([lay[0] for _, lay, _, _ in self.labels], np.int32)
            c.label_texttype = np.array([lay[1] for _, lay, _, _ in self.labels], np.int32)
            c.label_origin = np.array([xy for _, _, xy, _ in self.labels], float)
            c.label_stack = np.array([st for _, _, _, st in self.labels], np.int32)
        if self.refs:
            r = self.refs
            c.ref_cell = np.array([x["cell"] for x in r], np.int32)
            c.ref_origin = np.array([x["origin"] for x in r], float)
            c.ref_rotation = np.array([x["rotation"] for x in r], float)
            c.ref_magnification = np.array([x["mag"] for x in r], float)
            c.ref_x_reflection = np.array([x["xr"] for x in r], bool)
            c.ref_columns = np.array([x["columns"] for x in r], np.int32)
            c.ref_rows = np.array([x["rows"] for x in r], np.int32)
            c.ref_v1 = np.array([x["v1"] for x in r], float)
            c.ref_v2 = np.array([x["v2"] for x in r], float)
            counts = [len(x["explicit"]) if x["explicit"] is not None else 0 for x in r]
            c.ref_explicit_offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
            ex = [np.asarray(x["explicit"], float) for x in r if x["explicit"] is not None]
            c.ref_explicit = np.concatenate(ex) if ex else np.zeros((0, 2))
            c.ref_stack = np.array([x["stack"] for x in r], np.int32)
        return c


class GdstkAdder:
    """The benchmark generators draw through ``cell.add(gdstk polygon)``; this collects into a CellBuilder."""

    def __init__(self, cell: CellBuilder):
        self.cell = cell

    def add(self, polygon):
        self.cell.polygon((polygon.layer, polygon.datatype), polygon.points)


def layout(*cells: CellBuilder, frames=(), stacks=(), source="test.py") -> CapturedLayout:
    return CapturedLayout([c.build() for c in cells], list(frames), [tuple(s) for s in stacks], source)


def outcome(captured: CapturedLayout | None, status="ok", failure=None, script="test.py"):
    """A RunOutcome-shaped record (duck-typed so analyzer tests need no runner)."""
    return SimpleNamespace(script=script, status=status, seconds=0.0, layout=captured, failure=failure,
                           output="", sandbox={}, corner=None)


def frame(line, file="/proj/test.py", function="<module>"):
    return Frame(file, line, function)


# A P+ diffusion 30 um long with its n-tap at the left end: the farthest point is at
# x = 30, 31 um from the tap edge at x = -1 (analytic), over the demo limit of 20 um.
FAR_SCRIPT = '''import gdstk
lib = gdstk.Library()
cell = lib.new_cell("TOP")
cell.add(gdstk.rectangle((-5, -5), (40, 10), layer=1))
cell.add(gdstk.rectangle((0, 0), (30, 4), layer=5))
cell.add(gdstk.rectangle((0, 0), (30, 4), layer=2))    # P+ diffusion, 30 um long
cell.add(gdstk.rectangle((-3, 0), (-1, 4), layer=4))
cell.add(gdstk.rectangle((-3, 0), (-1, 4), layer=2))   # its n-tap at the left end
cell.add(gdstk.rectangle((-2.5, 1.5), (-1.5, 2.5), layer=6))
'''


# A generator of finger arrays, for the parameter-corner tests of the runs and the editor.
GENERATOR = '''\
import gdstk

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0)


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def finger_array(fingers=4, w=2.0, pitch=1.5):
    """A PMOS with `fingers` gates and one n-well tap at its left end."""
    if fingers < 1:
        raise ValueError(f"fingers must be at least 1, got {fingers}")
    cell = gdstk.Cell(f"FINGERS_{fingers}")
    length = fingers * pitch + 0.5
    box(cell, NPLUS, -3.2, -0.2, -0.8, w + 0.2)
    box(cell, ACTIVE, -3.0, 0.0, -1.0, w)
    box(cell, CONTACT, -2.2, w / 2 - 0.2, -1.8, w / 2 + 0.2)
    box(cell, PPLUS, -0.2, -0.2, length + 0.2, w + 0.2)
    box(cell, ACTIVE, 0.0, 0.0, length, w)
    for i in range(fingers):
        box(cell, POLY, 0.5 + i * pitch, -0.5, 1.0 + i * pitch, w + 0.5)
    box(cell, NWELL, -4.0, -1.5, length + 1.5, w + 1.5)
    return cell


def pitch_of(l=0.5, gap=1.0):
    return l + gap


def wide_pair(w=3.0) -> "gdstk.Cell":
    return finger_array(16, w)
'''
DIFFUSION_LINE = next(n for n, line in enumerate(GENERATOR.splitlines(), 1) if "box(cell, ACTIVE, 0.0" in line)
RAISE_LINE = next(n for n, line in enumerate(GENERATOR.splitlines(), 1) if "raise ValueError" in line)
