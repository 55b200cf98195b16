"""What a check runs: each script's tasks (a plain run, parameter corners, previews).

Parameter corners (docs/project.md) run a generator function over its parameter grid, each
corner its own sandboxed run; server/runs/batch.py runs the tasks. Shared by
``latchwatch check`` and the language server.

- Sweeps come from ``[[tool.latchwatch.sweep]]`` or from ``--sweep FUNCTION --param
  NAME=V1,V2``. The script is imported as a module (not run as ``__main__``) and the
  function is called with each corner's keyword arguments; the Cell, Library or list
  of cells it returns is checked (those cells are the tops). A script with sweeps is
  checked as its corners only.
- ``--param`` values: ``true``/``false`` (any case) are booleans, ``12``/``-3`` ints,
  ``0.5``/``1e-3`` floats, text in single or double quotes the string inside it, and
  anything else the string as written. Commas separate values, except inside the
  quotes of a quoted value: ``label='a,b',c`` is the two strings ``a,b`` and ``c``.
- ``--top CELL`` applies to corners as to plain runs: the cell is looked for among
  the cells a corner's call returns and the cells they reference. A preview checks
  what each function returns (``--top`` would name a cell of one function only).
- ``--corners N`` samples N corners of the grid: first the lowest corner (every
  parameter at its minimum) and the highest (every one at its maximum), so that each
  parameter's minimum and maximum are run; then other combinations of minima and
  maxima; then the rest. Within each of the last two groups the order is random with
  the fixed seed CORNER_SEED, so a sample is the same on every run. Minimum and
  maximum compare numbers (and booleans) by value; a parameter with other values has
  its first value as the minimum and its last as the maximum.
- Preview: a script that runs cleanly and creates no cell, and has no sweep, is a file
  of generator functions. Each public top-level function whose parameters all have
  defaults (and whose return annotation, if any, names a Cell, a Library or gdstk) is
  called once with its defaults, each in its own run; a function that returns no
  gdstk object is dropped, one that raises is a script-error like any other.
"""

from __future__ import annotations

import ast
import difflib
import itertools
import random
import re
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from latchwatch.server.config.files import read_bytes
from latchwatch.server.config.limits import DEFAULT_LIMITS
from latchwatch.server.config.project import ProjectConfig

CORNER_SEED = 7


_INT = re.compile(r"[+-]?\d+\Z")


_FLOAT = re.compile(r"[+-]?(\d+\.\d*|\.\d+|\d+)([eE][+-]?\d+)?\Z")


_LAYOUT_ANNOTATION = re.compile(r"\b(Cell|Library|gdstk)\b")


class SweepError(ValueError):
    """A sweep that cannot run: the message names where it was defined and what is wrong."""


@dataclass(frozen=True)
class Sweep:
    """A function of a script and the values of its parameters."""
    script: Path
    function: str
    params: dict[str, list]  # parameter -> values in the order given; empty: one call with the defaults
    where: str = "--sweep"  # where it was defined, for messages


@dataclass(frozen=True)
class Task:
    """One child run: the plain script, or one call of a function."""

    path: Path
    function: str | None = None
    corner: dict | None = None  # None for a plain run; {} for a call with the defaults
    preview: bool = False  # trying a function of a file that builds nothing itself


def parse_value(text: str):
    """One --param value (rules in the module docstring)."""
    text = text.strip()
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "'\"":
        return text[1:-1]
    if text.lower() in ("true", "false"):
        return text.lower() == "true"
    if _INT.match(text):
        return int(text)
    if _FLOAT.match(text):
        return float(text)
    return text


def parse_param(text: str) -> tuple[str, list]:
    """``NAME=V1,V2,...`` as (name, values)."""
    name, equals, values = text.partition("=")
    name = name.strip()
    if not equals or not name.isidentifier():
        raise SweepError(f"--param: expected NAME=V1,V2,... with NAME a Python identifier, got {text!r}")
    items = _split_values(values)
    if items is None:
        raise SweepError(f"--param {name}: a quote in {values!r} is not closed")
    if any(not item.strip() for item in items):
        raise SweepError(f"--param {name}: empty value in {values!r}; separate values with single commas")
    return name, [parse_value(item) for item in items]


def _split_values(text: str) -> list[str] | None:
    """``text`` split at commas outside quotes; None for an open quote. A quote opens
    only at the start of a value, so ``it's`` is text as written."""
    items, current, quote = [], [], None
    for char in text:
        if quote is None and char == ",":
            items.append("".join(current))
            current = []
            continue
        if quote is None and char in "'\"" and not "".join(current).strip():
            quote = char
        elif char == quote:
            quote = None
        current.append(char)
    if quote is not None:
        return None
    return items + ["".join(current)]


def ad_hoc_sweep(script: Path, function: str, param_texts: Iterable[str]) -> Sweep:
    """The sweep --sweep FUNCTION and --param NAME=V1,V2 ask for."""
    if not function.isidentifier():
        raise SweepError(f"--sweep: expected the name of a function in {script}, got {function!r}")
    names = module_names(script)
    if names is not None and function not in names:
        known = sorted(n for n in names if not n.startswith("_"))
        close = difflib.get_close_matches(function, known, n=1)
        hint = f"; did you mean {close[0]!r}?" if close else f" (it defines {', '.join(known) or 'nothing'})"
        raise SweepError(f"--sweep: {script} defines no function named {function!r}{hint}")
    params: dict[str, list] = {}
    for text in param_texts:
        name, values = parse_param(text)
        if name in params:
            raise SweepError(f"--param {name}: given twice; list every value in one --param {name}=V1,V2")
        params[name] = values
    return Sweep(Path(script), function, params)


def module_names(script: Path) -> set[str] | None:
    """Names the script binds at module level (definitions, assignments, imports), read
    without running it; None when that cannot be known (unreadable, a syntax error, or a
    ``from ... import *``), so that the run itself reports it."""
    try:
        tree = ast.parse(read_bytes(script, DEFAULT_LIMITS.file_bytes))
    except (OSError, SyntaxError, ValueError, RecursionError, MemoryError):
        return None
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            names.add(node.name)
        elif isinstance(node, ast.Name) and isinstance(node.ctx, ast.Store):
            names.add(node.id)
        elif isinstance(node, (ast.Import, ast.ImportFrom)):
            for alias in node.names:
                if alias.name == "*":
                    return None
                names.add((alias.asname or alias.name).split(".")[0])
    return names


def _json_value(value) -> bool:
    if isinstance(value, (bool, int, float, str)):
        return True
    if isinstance(value, list):
        return all(_json_value(v) for v in value)
    if isinstance(value, dict):
        return all(isinstance(k, str) and _json_value(v) for k, v in value.items())
    return False


def configured_sweeps(config: ProjectConfig, only: Path | None = None) -> tuple[Sweep, ...]:
    """The project's sweeps (with ``only``, those of that script), checked: values a
    child can receive (JSON values) and a script that exists."""
    sweeps = []
    prefix = "tool.latchwatch." if config.source is not None and config.source.name == "pyproject.toml" else ""
    target = Path(only).resolve() if only is not None else None
    for number, spec in enumerate(config.sweeps, start=1):
        if target is not None and Path(spec.script).resolve() != target:
            continue
        where = f"{config.source}: {prefix}sweep[{number}]"
        for name, values in spec.params.items():
            if not name.isidentifier():
                raise SweepError(f"{where}.params: {name!r} is not a Python parameter name")
            for value in values:
                if not _json_value(value):
                    raise SweepError(f"{where}.params.{name}: expected numbers, booleans, strings or lists "
                                     f"of them, got {value!r}")
        if not Path(spec.script).is_file():
            raise SweepError(f"{where}.script: no such file {spec.script}")
        sweeps.append(Sweep(Path(spec.script), spec.function, spec.params, where))
    return tuple(sweeps)


def sweeps_for(path: Path, sweeps: Iterable[Sweep]) -> list[Sweep]:
    """The sweeps of one script."""
    target = Path(path).resolve()
    return [s for s in sweeps if s.script.resolve() == target]


def corner_grid(params: dict[str, list]) -> list[dict]:
    """Every combination, the first parameter varying slowest."""
    names = list(params)
    return [dict(zip(names, values, strict=False)) for values in itertools.product(*(params[n] for n in names))]


def _extreme_indices(values: list) -> tuple[int, int]:
    numeric = all(isinstance(v, (int, float)) for v in values)
    if not numeric:
        return 0, len(values) - 1
    low = min(range(len(values)), key=lambda i: values[i])
    high = max(range(len(values)), key=lambda i: values[i])
    return low, high


def sample_corners(params: dict[str, list], count: int | None, seed: int = CORNER_SEED) -> list[dict]:
    """``count`` corners of the grid (all of them when ``count`` is None or not
    smaller), in grid order; always the lowest and the highest corner."""
    names = list(params)
    sizes = [len(params[n]) for n in names]
    total = 1
    for size in sizes:
        total *= size
    if count is None or count >= total:
        return corner_grid(params)
    if count < 2:
        raise SweepError(f"--corners: expected at least 2 (the lowest and the highest corner), got {count}")
    extremes = [_extreme_indices(params[n]) for n in names]
    lowest = tuple(low for low, _high in extremes)
    highest = tuple(high for _low, high in extremes)
    first = list(dict.fromkeys([lowest, highest]))
    vertices = [v for v in itertools.product(*(sorted(set(e)) for e in extremes)) if v not in first]
    vertex_set = set(vertices) | set(first)
    rest = [i for i in itertools.product(*(range(s) for s in sizes)) if i not in vertex_set]
    rng = random.Random(seed)
    rng.shuffle(vertices)
    rng.shuffle(rest)
    chosen = sorted((first + vertices + rest)[:count])
    return [{n: params[n][i] for n, i in zip(names, index, strict=False)} for index in chosen]


def sweep_tasks(sweep: Sweep, count: int | None = None) -> list[Task]:
    """One task per corner of a sweep (all, or ``count`` sampled)."""
    corners = sample_corners(sweep.params, count) if sweep.params else [{}]
    return [Task(sweep.script, sweep.function, corner) for corner in corners]


def preview_functions(source: str) -> list[str]:
    """Public top-level functions callable without arguments whose return annotation,
    if any, names a Cell, a Library or gdstk."""
    try:
        tree = ast.parse(source)
    except SyntaxError:
        return []
    names: dict[str, None] = {}
    for node in tree.body:
        if not isinstance(node, ast.FunctionDef) or node.name.startswith("_"):
            continue
        args = node.args
        if len(args.defaults) < len(args.posonlyargs) + len(args.args) or None in args.kw_defaults:
            continue
        if node.returns is not None and not _LAYOUT_ANNOTATION.search(ast.unparse(node.returns)):
            continue
        names[node.name] = None
    return list(names)


def plan_script(path: Path, sweeps: Iterable[Sweep], corners: int | None = None) -> list[Task]:
    """The tasks of one script: its sweeps' corners, else the plain run."""
    mine = sweeps_for(path, sweeps)
    return [task for sweep in mine for task in sweep_tasks(sweep, corners)] or [Task(Path(path))]
