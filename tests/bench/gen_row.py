"""Benchmark layout: flat standard-cell rows of a requested size.

    python gen_row.py SHAPES     writes gen_row.gds with SHAPES polygons, rounded to whole rows

Every polygon is drawn flat through ``box()``, so the count is the real number of
polygons the script creates. Each row is a run of groups (a well-tap cell and four
inverters, with real n-well, P+ and N+ diffusions, poly gates, contacted n- and
p-taps and metal1 rails). The layout is clean except for the deliberate defects in
GAPS and BARE_TAPS, which exist once the layout has enough rows. Coordinates in
micrometres, demo technology.
"""

import sys

import gdstk

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)
ROW_H, ROW_PITCH, INV_W, TAP_W = 10.0, 14.0, 3.0, 2.0
PER_GROUP, GROUPS_PER_ROW = 4, 50
GROUP_W = TAP_W + PER_GROUP * INV_W
GAPS = {(2, 10): 3, (5, 30): 3, (11, 45): 3}  # (row, group): tap cells left out from there
BARE_TAPS = {(7, 20)}  # (row, group): tap cell drawn without its contacts


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def frame(cell, x, y, width):
    """N-well and both rails of one cell."""
    box(cell, NWELL, x, y + 5.0, x + width, y + ROW_H + 0.8)
    box(cell, METAL1, x, y, x + width, y + 1.2)
    box(cell, METAL1, x, y + ROW_H - 1.2, x + width, y + ROW_H)


def inverter(cell, x, y):
    frame(cell, x, y, INV_W)
    box(cell, PPLUS, x + 0.3, y + 5.8, x + 2.7, y + 8.4)
    box(cell, ACTIVE, x + 0.5, y + 6.0, x + 2.5, y + 8.2)  # PMOS
    box(cell, NPLUS, x + 0.3, y + 1.6, x + 2.7, y + 4.2)
    box(cell, ACTIVE, x + 0.5, y + 1.8, x + 2.5, y + 4.0)  # NMOS
    box(cell, POLY, x + 1.3, y + 1.3, x + 1.7, y + 8.7)
    for cy in (2.7, 6.9):
        box(cell, CONTACT, x + 0.65, y + cy, x + 1.0, y + cy + 0.35)
        box(cell, CONTACT, x + 2.0, y + cy, x + 2.35, y + cy + 0.35)
    box(cell, METAL1, x + 0.55, y + 1.2, x + 1.1, y + 3.2)
    box(cell, METAL1, x + 0.55, y + 6.7, x + 1.1, y + ROW_H - 1.2)
    box(cell, METAL1, x + 1.9, y + 2.5, x + 2.45, y + 7.4)


def well_tap(cell, x, y, contacted=True):
    frame(cell, x, y, TAP_W)
    box(cell, NPLUS, x + 0.3, y + 8.6, x + 1.7, y + 9.9)
    box(cell, ACTIVE, x + 0.5, y + 8.8, x + 1.5, y + 9.7)  # n-well tap
    box(cell, PPLUS, x + 0.3, y + 0.1, x + 1.7, y + 1.4)
    box(cell, ACTIVE, x + 0.5, y + 0.3, x + 1.5, y + 1.2)  # substrate tap
    if contacted:
        for cy in (0.55, 9.05):
            box(cell, CONTACT, x + 0.8, y + cy, x + 1.2, y + cy + 0.4)


def group_kind(row, group):
    """'tap', 'bare' (tap without contacts) or 'fill' (no tap) for a group's first cell."""
    if (row, group) in BARE_TAPS:
        return "bare"
    for (gap_row, first), count in GAPS.items():
        if row == gap_row and first <= group < first + count:
            return "fill"
    return "tap"


def draw_row(cell, row, groups):
    y = row * ROW_PITCH
    for g in range(groups):
        x = g * GROUP_W
        kind = group_kind(row, g)
        if kind == "fill":
            frame(cell, x, y, TAP_W)
        else:
            well_tap(cell, x, y, contacted=kind == "tap")
        for i in range(PER_GROUP):
            inverter(cell, x + TAP_W + i * INV_W, y)
    well_tap(cell, groups * GROUP_W, y)


def main(target_shapes):
    top = gdstk.Cell("BENCH_ROWS")
    draw_row(top, 0, GROUPS_PER_ROW)
    rows = max(1, round(target_shapes / len(top.polygons)))  # whole rows, all alike in size
    for row in range(1, rows):
        draw_row(top, row, GROUPS_PER_ROW)
    lib = gdstk.Library("BENCH")
    lib.add(top)
    lib.write_gds("gen_row.gds")
    return top


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100_000)
