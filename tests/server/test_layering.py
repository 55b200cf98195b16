"""The house's layering, read from the code's own import statements (every import, at any depth).

- analyzers/ is pure computation: no server, pygls, lsprotocol, argparse or subprocess.
- server/sandbox/ and server/child/ know nothing of the editor or the command line.
- server/child/ runs in the user's interpreter: standard library, numpy and layout libraries,
  and its own package through relative imports only.
- No two modules import each other in a circle (module-level imports).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from locations import ROOT

PACKAGES = {"analyzers": "latchwatch.analyzers", "server": "latchwatch.server", "latchwatch": "latchwatch"}


def _module_name(path: Path) -> str:
    relative = path.relative_to(ROOT).with_suffix("")
    parts = list(relative.parts)
    prefix = PACKAGES[parts[0]].split(".")
    rest = parts[1:] if parts[0] != "latchwatch" else parts[1:]
    if rest and rest[-1] == "__init__":
        rest = rest[:-1]
    return ".".join(prefix + rest)


def _sources() -> dict[str, Path]:
    return {_module_name(p): p for folder in PACKAGES for p in (ROOT / folder).rglob("*.py")}


def _imports(module: str, path: Path, top_level_only: bool = False) -> set[str]:
    """Absolute names of what ``module`` imports (relative imports resolved)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    nodes = tree.body if top_level_only else ast.walk(tree)
    found = set()
    for node in nodes:
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            found.add(target)
            found.update(f"{target}.{alias.name}" for alias in node.names)
    return found


SOURCES = _sources()


def _offenders(prefix: str, forbidden: tuple[str, ...]) -> list[str]:
    return sorted(f"{module} imports {name}" for module, path in SOURCES.items() if module.startswith(prefix)
                  for name in _imports(module, path)
                  if any(name == f or name.startswith(f + ".") for f in forbidden))


def test_analyzers_are_pure_computation():
    assert _offenders("latchwatch.analyzers", ("latchwatch.server", "pygls", "lsprotocol", "argparse",
                                               "subprocess")) == []


@pytest.mark.parametrize("room", ["latchwatch.server.sandbox", "latchwatch.server.child"])
def test_sandbox_and_child_know_no_editor_or_command_line(room):
    assert _offenders(room, ("latchwatch.server.lsp", "latchwatch.server.cli", "pygls", "lsprotocol")) == []


def test_the_child_imports_no_latchwatch():
    """Its own modules only by relative import: under ``-I`` in a foreign interpreter it is latchwatch_child."""
    absolute = sorted(f"{path.name} imports {getattr(node, 'module', None) or alias.name}"
                      for module, path in SOURCES.items() if module.startswith("latchwatch.server.child")
                      for node in ast.walk(ast.parse(path.read_text(encoding="utf-8")))
                      if isinstance(node, (ast.Import, ast.ImportFrom)) and not getattr(node, "level", 0)
                      for alias in node.names
                      if (getattr(node, "module", None) or alias.name).split(".")[0] == "latchwatch")
    assert absolute == []


def test_no_import_circles():
    graph = {m: {n for n in _imports(m, p, top_level_only=True) if n in SOURCES and n != m}
             for m, p in SOURCES.items()}
    state: dict[str, int] = {}
    circles = []

    def visit(node, trail):
        state[node] = 1
        for target in sorted(graph[node]):
            if state.get(target) == 1:
                circles.append(" -> ".join(trail[trail.index(target):] + [target]))
            elif target not in state:
                visit(target, trail + [target])
        state[node] = 2

    for module in sorted(graph):
        if module not in state:
            visit(module, [module])
    assert circles == []


def test_the_checks_see_the_whole_house():
    # Guards the guard: a wrong root would make every test above pass on nothing.
    assert "latchwatch.analyzers.check" in SOURCES and "latchwatch.server.child.boot" in SOURCES
    assert any(n.startswith("latchwatch.server.") for n in _imports("latchwatch.server.cli.main",
                                                                     SOURCES["latchwatch.server.cli.main"]))
