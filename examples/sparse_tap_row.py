"""Quillfern QF-S12 "Saltmarsh": the shift register that loads the sensor gain code.

The row sits beside the analog front end, so a continuous substrate-tie strip runs
under its VSS rail. The n-well is tied by a small well-tap cell placed at the start
of every group of seven inverters. Coordinates in micrometres, demo technology.
"""

import gdstk

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)
ROW_H, INV_W, TAP_W = 10.0, 3.0, 2.0


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def inverter():
    cell = gdstk.Cell("SR_INV")
    box(cell, NWELL, 0, 5.0, INV_W, ROW_H + 0.8)
    box(cell, PPLUS, 0.3, 5.8, 2.7, 8.4)
    box(cell, ACTIVE, 0.5, 6.0, 2.5, 8.2)  # PMOS
    box(cell, NPLUS, 0.3, 1.6, 2.7, 4.2)
    box(cell, ACTIVE, 0.5, 1.8, 2.5, 4.0)  # NMOS
    box(cell, POLY, 1.3, 1.3, 1.7, 8.7)
    for y0, y1 in ((0, 1.2), (ROW_H - 1.2, ROW_H)):
        box(cell, METAL1, 0, y0, INV_W, y1)
    return cell


def nwell_tap():
    cell = gdstk.Cell("SR_NWTAP")
    box(cell, NWELL, 0, 5.0, TAP_W, ROW_H + 0.8)
    box(cell, NPLUS, 0.3, 8.6, 1.7, 9.9)
    box(cell, ACTIVE, 0.5, 8.8, 1.5, 9.7)
    box(cell, CONTACT, 0.8, 9.05, 1.2, 9.45)
    box(cell, METAL1, 0, ROW_H - 1.2, TAP_W, ROW_H)
    box(cell, METAL1, 0, 0, TAP_W, 1.2)
    return cell


def substrate_strip(cell, length, pitch=1.0):
    box(cell, PPLUS, 0, 0.1, length, 1.4)
    box(cell, ACTIVE, 0.2, 0.3, length - 0.2, 1.2)
    for i in range(int((length - 0.4) // pitch)):
        box(cell, CONTACT, 0.5 + i * pitch, 0.55, 0.9 + i * pitch, 0.95)


def shift_register_row(bits, tap_every):
    inv, tap = inverter(), nwell_tap()
    row = gdstk.Cell("GAIN_SR_ROW")
    x = 0.0
    for first in range(0, bits, tap_every):
        group = min(tap_every, bits - first)
        row.add(gdstk.Reference(tap, (x, 0)))
        row.add(gdstk.Reference(inv, (x + TAP_W, 0), columns=group, rows=1, spacing=(INV_W, 0)))
        x += TAP_W + group * INV_W
    substrate_strip(row, x)
    return row, [inv, tap]


row, leaf_cells = shift_register_row(bits=14, tap_every=7)
lib = gdstk.Library("QF_S12_GAIN_SR")
lib.add(row, *leaf_cells)
lib.write_gds("sparse_tap_row.gds")
