"""Errors a check raises about the layout's cells before any rule runs; the command line
reports them (exit status 2) without importing the analysis itself."""

from __future__ import annotations


class TopCellError(ValueError):
    """--top names a cell the layout does not have."""


class HierarchyError(ValueError):
    """The reference graph has a cycle or is deeper than MAX_DEPTH."""
