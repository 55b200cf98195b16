"""A flat generator of 200,000 rectangles, written the way generators usually are.

Input of tests/bench/bench_capture.py; runnable on its own (`python gen_flat.py`).
"""

import gdstk

COLUMNS = 500
COUNT = 200_000


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer))


lib = gdstk.Library()
top = lib.new_cell("FLAT")
for i in range(COUNT):
    x = (i % COLUMNS) * 2.0
    y = (i // COLUMNS) * 2.0
    box(top, 1 + i % 3, x, y, x + 1.0, y + 1.0)
lib.write_gds("flat.gds")
