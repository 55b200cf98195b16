"""Quillfern QF-S12 "Saltmarsh": latch-up characterisation structures on the test chip.

Each structure is a PNPN stack drawn in a line: substrate tap, N+ emitter, n-well
edge, P+ emitter, n-well tap. The tap-to-emitter spacing is swept so the lab can
measure how the trigger current falls as the taps move away. The last structure
lies beyond the production rule on purpose, and its finding is accepted here.
Coordinates in micrometres, demo technology.
"""

import gdstk

NWELL, ACTIVE, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (4, 0), (5, 0), (6, 0), (7, 0)
EMITTER_W, WELL_MARGIN, GAP = 2.0, 2.0, 10.0


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def diffusion(cell, implant, x0, x1, contacted):
    box(cell, implant, x0 - 0.2, 2.8, x1 + 0.2, 7.2)
    box(cell, ACTIVE, x0, 3.0, x1, 7.0)
    if contacted:
        for y in (3.5, 5.5):
            box(cell, CONTACT, x0 + 0.3, y, x0 + 0.7, y + 0.4)
        box(cell, METAL1, x0, 3.0, x1, 7.0)


def pnpn_structure(cell, x0, tap_spacing):
    """Returns the width of the structure."""
    n_emitter = x0 + 1.0 + tap_spacing
    well_edge = n_emitter + EMITTER_W + WELL_MARGIN
    p_emitter = well_edge + WELL_MARGIN
    n_tap = p_emitter + EMITTER_W + tap_spacing
    diffusion(cell, PPLUS, x0, x0 + 1.0, contacted=True)  # substrate tap
    box(cell, ACTIVE, n_emitter, 3.0, n_emitter + EMITTER_W, 7.0)  # N+ emitter
    box(cell, NPLUS, n_emitter - 0.2, 2.8, n_emitter + EMITTER_W + 0.2, 7.2)
    box(cell, NWELL, well_edge, 0.0, n_tap + 1.0 + WELL_MARGIN, 10.0)
    box(cell, ACTIVE, p_emitter, 3.0, p_emitter + EMITTER_W, 7.0)  # P+ emitter
    box(cell, PPLUS, p_emitter - 0.2, 2.8, p_emitter + EMITTER_W + 0.2, 7.2)
    diffusion(cell, NPLUS, n_tap, n_tap + 1.0, contacted=True)  # n-well tap
    return n_tap + 1.0 + WELL_MARGIN - x0


chip = gdstk.Cell("LU_TEST_ROW")
x = 0.0
for spacing in (5.0, 10.0, 15.0):
    x += pnpn_structure(chip, x, spacing) + GAP
# 30 um: the out-of-rule reference point of the sweep.
x += pnpn_structure(chip, x, 30.0)  # latchwatch: ignore[tap-distance]

lib = gdstk.Library("QF_S12_LU_TEST")
lib.add(chip)
lib.write_gds("latchup_test_structures.gds")
