"""The limits that keep one input from exhausting latchwatch itself (docs/project.md, ``[limits]``).

The sandbox limits what a script may do in its child; these limit the parent: the
size of a file it reads, the number of shapes and vertices a layout may expand to
before it is flattened, and the memory and time of the analysis process
(server/runs/analysis.py). Each is a key of the project file's ``[limits]`` table,
and every message about one says how to raise it.
"""

from __future__ import annotations

from dataclasses import dataclass

from latchwatch.analyzers.layout.budget import LayoutBudget

# key -> (field, unit factor, description of the expected value)
KEYS = {
    "file-mib": ("file_bytes", 1 << 20, "a positive number of MiB"),
    "shapes": ("shapes", 1, "a positive whole number of shapes"),
    "vertices": ("vertices", 1, "a positive whole number of vertices"),
    "analysis-gib": ("analysis_memory", 1 << 30, "a positive number of GiB"),
    "analysis-seconds": ("analysis_seconds", 1, "a positive number of seconds"),
}
WHOLE = ("shapes", "vertices")


def raise_hint(key: str, suggested) -> str:
    """How to raise one limit, for the message that reports it."""
    return (f"raise it with `{key} = {suggested}` under [limits] in latchwatch.toml "
            f"(or [tool.latchwatch.limits] in pyproject.toml)")


@dataclass(frozen=True)
class Limits:
    """The parent's limits; the defaults fit a machine with 8 GiB or more to spare."""
    file_bytes: int = 256 << 20  # a script, layout, project or technology file
    # 1M shapes take about 0.8 GiB to check (docs/performance.md): 10M fit the memory limit below.
    shapes: int = 10_000_000
    vertices: int = 50_000_000  # a 10^7-vertex polygon takes about 1.5 GiB (tests/bench/bench_limits.py)
    analysis_memory: int = 8 << 30  # bytes of address space of one analysis process
    analysis_seconds: float = 600.0

    def file_hint(self) -> str:
        return raise_hint("file-mib", f"{2 * self.file_bytes / (1 << 20):g}")

    def budget(self) -> LayoutBudget:
        """The layout budget for flattening, with the hints that name these keys."""
        return LayoutBudget(shapes=self.shapes, vertices=self.vertices,
                            shapes_hint=raise_hint("shapes", 2 * self.shapes),
                            vertices_hint=raise_hint("vertices", 2 * self.vertices))

    def memory_hint(self) -> str:
        return raise_hint("analysis-gib", f"{2 * self.analysis_memory / (1 << 30):g}")

    def time_hint(self) -> str:
        return raise_hint("analysis-seconds", f"{2 * self.analysis_seconds:g}")


DEFAULT_LIMITS = Limits()


def parse_limits(table, fail) -> Limits:
    """Limits from a ``[limits]`` table; ``fail(key, message)`` raises for a bad entry."""
    if not isinstance(table, dict):
        fail("limits", f"expected a table of {', '.join(KEYS)}, got {table!r}")
    values = {}
    for key, value in table.items():
        if key not in KEYS:
            fail(f"limits.{key}", f"unknown key; known keys: {', '.join(KEYS)}")
        field, factor, expected = KEYS[key]
        number_ok = isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0
        if not number_ok or (key in WHOLE and not isinstance(value, int)):
            fail(f"limits.{key}", f"expected {expected}, got {value!r}")
        values[field] = value * factor if field == "analysis_seconds" else int(value * factor)
    return Limits(**values)
