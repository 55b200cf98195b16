"""Benchmark layout: the rows of gen_row.py built hierarchically.

    python gen_row_hier.py SHAPES   writes gen_row_hier.gds, SHAPES polygons once flattened

One cell per standard cell (the drawing functions of gen_row.py at the origin), one
cell per kind of row made of Reference arrays, and the rows placed as Reference
arrays in the top cell. Flattened, it is the layout gen_row.py draws flat, with the
same deliberate defects, for the flattening benchmark.
"""

import sys

import gdstk

from gen_row import (
    BARE_TAPS,
    GAPS,
    GROUP_W,
    GROUPS_PER_ROW,
    INV_W,
    PER_GROUP,
    ROW_PITCH,
    TAP_W,
    frame,
    group_kind,
    inverter,
    well_tap,
)


def leaf_cells():
    inv, tap, bare, fill = (gdstk.Cell(n) for n in ("INV", "TAP", "TAP_BARE", "FILL"))
    inverter(inv, 0, 0)
    well_tap(tap, 0, 0)
    well_tap(bare, 0, 0, contacted=False)
    frame(fill, 0, 0, TAP_W)
    return {"inv": inv, "tap": tap, "bare": bare, "fill": fill}


def row_cell(name, leaves, row):
    """One row: the inverters as PER_GROUP arrays, the first cells of the groups as
    arrays of runs of the same kind, and the closing tap."""
    cell = gdstk.Cell(name)
    for i in range(PER_GROUP):
        cell.add(gdstk.Reference(leaves["inv"], (TAP_W + i * INV_W, 0), columns=GROUPS_PER_ROW, rows=1,
                                 spacing=(GROUP_W, 0)))
    kinds = [group_kind(row, g) for g in range(GROUPS_PER_ROW)]
    start = 0
    for g in range(1, GROUPS_PER_ROW + 1):
        if g == GROUPS_PER_ROW or kinds[g] != kinds[start]:
            leaf = leaves[kinds[start]]
            cell.add(gdstk.Reference(leaf, (start * GROUP_W, 0), columns=g - start, rows=1, spacing=(GROUP_W, 0)))
            start = g
    cell.add(gdstk.Reference(leaves["tap"], (GROUPS_PER_ROW * GROUP_W, 0)))
    return cell


def flat_count(cell):
    return len(cell.get_polygons())


def main(target_shapes):
    leaves = leaf_cells()
    plain = row_cell("ROW", leaves, row=None)  # a row without defects
    rows = max(1, round(target_shapes / flat_count(plain)))
    special = {r for r, _ in list(GAPS) + list(BARE_TAPS) if r < rows}
    top = gdstk.Cell("BENCH_ROWS")
    cells = [top, plain, *leaves.values()]
    start = 0
    for r in sorted(special) + [rows]:
        if r > start:  # a run of plain rows
            top.add(gdstk.Reference(plain, (0, start * ROW_PITCH), columns=1, rows=r - start,
                                    spacing=(0, ROW_PITCH)))
        if r < rows:
            cells.append(row_cell(f"ROW_{r}", leaves, row=r))
            top.add(gdstk.Reference(cells[-1], (0, r * ROW_PITCH)))
        start = r + 1
    lib = gdstk.Library("BENCH_HIER")
    lib.add(*cells)
    lib.write_gds("gen_row_hier.gds")
    return top


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100_000)
