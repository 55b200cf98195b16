"""Reads a GDSII or OASIS file into the same CapturedLayout a script run yields.

Files carry no Python stacks: every stack id is -1 and findings fall back to cell
names and coordinates. The collection code is the probe's, so both entry points
produce identical arrays for identical geometry.
"""

from __future__ import annotations

from pathlib import Path

import gdstk

from latchwatch.analyzers.model.captured import CapturedLayout

from latchwatch.server.child import probe
from latchwatch.server.sandbox import wire

LAYOUT_SUFFIXES = {".gds": "gds", ".gds2": "gds", ".gdsii": "gds", ".oas": "oas", ".oasis": "oas"}


class LayoutFileError(ValueError):
    """The file is missing, of an unknown kind, or not a readable layout."""


def is_layout_file(path: str | Path) -> bool:
    return Path(path).suffix.lower() in LAYOUT_SUFFIXES


def read_layout(path: str | Path) -> CapturedLayout:
    """All cells of a .gds or .oas file, hierarchy kept, repetitions expanded into arrays."""
    path = Path(path)
    kind = LAYOUT_SUFFIXES.get(path.suffix.lower())
    if kind is None:
        raise LayoutFileError(f"{path}: not a layout file (expected one of {', '.join(sorted(LAYOUT_SUFFIXES))})")
    if not path.is_file():
        raise LayoutFileError(f"{path}: no such file")
    try:
        library = gdstk.read_gds(str(path)) if kind == "gds" else gdstk.read_oas(str(path))
    except (OSError, RuntimeError, ValueError) as error:
        raise LayoutFileError(f"{path}: cannot read as {'GDSII' if kind == 'gds' else 'OASIS'}: {error}") from None
    header, arrays = probe.collect(library.cells, recorder=None, unit=library.unit, source=str(path))
    header["precision"] = library.precision
    return wire.layout_from_parts(header, arrays)
