"""A gdsfactory 9 generator of about SHAPES rectangles, for bench_capture_gdsfactory.py.

    python gen_gdsfactory.py [SHAPES]     default 100000

95% of the shapes are drawn one by one with ``add_polygon`` in ``@gf.cell`` strips of
500, each placed with ``<<`` and moved; the rest come from a 50-rectangle unit cell
placed as one instance array (``add_ref`` with columns and rows). Writes
gdsfactory_bench.gds into the current folder, as generators do.
"""

import math
import sys

import gdsfactory as gf

gf.gpdk.PDK.activate()

SHAPES = int(sys.argv[1]) if len(sys.argv) > 1 else 100_000
PER_STRIP = 500
UNIT = 50


def rect(c, layer, x0, y0, x1, y1):
    c.add_polygon([(x0, y0), (x1, y0), (x1, y1), (x0, y1)], layer=layer)


@gf.cell
def strip(index: int, count: int = PER_STRIP) -> gf.Component:
    c = gf.Component()
    height = 1.0 + index % 3
    for k in range(count):
        rect(c, (1 + k % 4, 0), 2.0 * k, 0.0, 2.0 * k + 1.0, height)
    return c


@gf.cell
def unit() -> gf.Component:
    c = gf.Component()
    for k in range(UNIT):
        rect(c, (2, 0), 0.0, 2.0 * k, 1.5, 2.0 * k + 1.0)
    return c


arrayed = SHAPES // 20
side = max(1, math.isqrt(arrayed // UNIT))
drawn = SHAPES - side * side * UNIT
top = gf.Component("BENCH")
for index in range(drawn // PER_STRIP):
    ref = top << strip(index)
    ref.move((0.0, 5.0 * index))
top.add_ref(unit(), columns=side, rows=side, column_pitch=3.0, row_pitch=110.0).move((-5.0 - 3.0 * side, 0.0))
top.write_gds("gdsfactory_bench.gds")
