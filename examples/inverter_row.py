"""Quillfern QF-S12 "Saltmarsh": the clock-buffer block of the digital section.

Three rows of tapless inverters with a well-tap cell (n-well tap and substrate tap)
at both ends of each row and between every group of four inverters.
Coordinates in micrometres, demo technology.
"""

import gdstk

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)
METAL1_PIN = (7, 5)
ROW_H, INV_W, TAP_W = 10.0, 3.0, 2.0


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def rails(cell, width):
    box(cell, METAL1, 0, 0, width, 1.2)  # VSS
    box(cell, METAL1, 0, ROW_H - 1.2, width, ROW_H)  # VDD
    box(cell, NWELL, 0, 5.0, width, ROW_H + 0.8)


def inverter():
    cell = gdstk.Cell("INV_X1")
    rails(cell, INV_W)
    box(cell, PPLUS, 0.3, 5.8, 2.7, 8.4)
    box(cell, ACTIVE, 0.5, 6.0, 2.5, 8.2)  # PMOS
    box(cell, NPLUS, 0.3, 1.6, 2.7, 4.2)
    box(cell, ACTIVE, 0.5, 1.8, 2.5, 4.0)  # NMOS
    box(cell, POLY, 1.3, 1.3, 1.7, 8.7)
    for y in (2.7, 6.9):  # source and drain contacts of both transistors
        box(cell, CONTACT, 0.65, y, 1.0, y + 0.35)
        box(cell, CONTACT, 2.0, y, 2.35, y + 0.35)
    box(cell, METAL1, 0.55, 1.2, 1.1, 3.2)  # NMOS source to VSS
    box(cell, METAL1, 0.55, 6.7, 1.1, ROW_H - 1.2)  # PMOS source to VDD
    box(cell, METAL1, 1.9, 2.5, 2.45, 7.4)  # output
    return cell


def well_tap():
    cell = gdstk.Cell("TAP")
    rails(cell, TAP_W)
    box(cell, NPLUS, 0.3, 8.6, 1.7, 9.9)
    box(cell, ACTIVE, 0.5, 8.8, 1.5, 9.7)  # n-well tap under VDD
    box(cell, PPLUS, 0.3, 0.1, 1.7, 1.4)
    box(cell, ACTIVE, 0.5, 0.3, 1.5, 1.2)  # substrate tap under VSS
    for y in (0.55, 9.05):
        box(cell, CONTACT, 0.8, y, 1.2, y + 0.4)
    return cell


def inverter_row(groups, per_group):
    inv, tap = inverter(), well_tap()
    row = gdstk.Cell("CLKBUF_ROW")
    x = 0.0
    for _ in range(groups):
        row.add(gdstk.Reference(tap, (x, 0)))
        row.add(gdstk.Reference(inv, (x + TAP_W, 0), columns=per_group, rows=1, spacing=(INV_W, 0)))
        x += TAP_W + per_group * INV_W
    row.add(gdstk.Reference(tap, (x, 0)))  # closing tap at the row end
    row.add(gdstk.Label("VDD", (1.0, ROW_H - 0.6), layer=METAL1_PIN[0], texttype=METAL1_PIN[1]))
    row.add(gdstk.Label("VSS", (1.0, 0.6), layer=METAL1_PIN[0], texttype=METAL1_PIN[1]))
    return row, [inv, tap]


row, leaf_cells = inverter_row(groups=5, per_group=4)
block = gdstk.Cell("CLKBUF_BLOCK")
block.add(gdstk.Reference(row, (0, 0), columns=1, rows=3, spacing=(0, ROW_H + 4.0)))

lib = gdstk.Library("QF_S12_CLKBUF")
lib.add(block, row, *leaf_cells)
lib.write_gds("inverter_row.gds")
