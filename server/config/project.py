"""Project configuration (docs/project.md).

Where it is read from, walking up from the checked script's folder, nearest first:

- ``pyproject.toml`` with a ``[tool.latchwatch]`` table (a pyproject.toml without
  one is passed by);
- ``latchwatch.toml``, with the same keys at the top level (``tech = ...``,
  ``[[sweep]]``), no ``[tool.latchwatch]`` wrapper.

Both in one folder is an error rather than a silent choice. Paths in the file (a
``tech`` file, ``python``, sweep scripts) are relative to the file's folder and are
stored resolved; a bare interpreter name such as ``python3`` and a built-in
technology name are kept as written. No key grants trust: trust comes only from
``latchwatch trust`` or an editor setting (docs/sandbox.md). ``require-sandbox = true`` can
only tighten: it makes a missing sandbox protection an error for every run of the
project; ``false`` does not undo the command-line flag or the editor setting.
"""

from __future__ import annotations

import difflib
import os
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

from latchwatch.analyzers.model.findings import Severity
from latchwatch.server.config.files import InputFileError, read_bytes
from latchwatch.server.config.limits import DEFAULT_LIMITS, Limits, parse_limits
from latchwatch.server.sandbox.policy import pass_env_problem

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised only on Python 3.10
    import tomli as tomllib

PYPROJECT = "pyproject.toml"
OWN_FILE = "latchwatch.toml"
KEYS = ("tech", "include", "exclude", "python", "timeout", "disable", "severity", "sweep", "require-sandbox", "env",
        "html", "limits")
SWEEP_KEYS = ("script", "function", "params")
# Folders expand_includes never descends into: tool caches, virtual environments, VCS.
SKIPPED_FOLDER = re.compile(r"^(\..*|__pycache__)$")


class ConfigError(Exception):
    """A project file that cannot be used; the message names the file and the key."""

    def __init__(self, message: str, file: Path | None = None, key: str | None = None):
        super().__init__(message)
        self.file = file
        self.key = key


@dataclass(frozen=True)
class SweepSpec:
    """One [[tool.latchwatch.sweep]] entry: a script, a function in it, and the values of its parameters."""
    script: str  # resolved path of the generator script
    function: str  # a function in it returning a gdstk.Cell or gdstk.Library
    params: dict[str, list]  # parameter -> values; the full grid is run


@dataclass(frozen=True)
class ProjectConfig:
    """The project's [tool.latchwatch] settings, with the folder and file they came from."""
    root: Path | None = None  # folder of the file that held the configuration
    source: Path | None = None  # that file
    tech: str | None = None  # built-in name as written, or a resolved file path
    include: tuple[str, ...] = ()
    exclude: tuple[str, ...] = ()
    python: str | None = None
    timeout: float | None = None
    disable: tuple[str, ...] = ()
    severity: dict[str, Severity] = field(default_factory=dict)
    sweeps: tuple[SweepSpec, ...] = ()
    require_sandbox: bool = False  # can only tighten: a missing protection becomes an error
    env: tuple[str, ...] = ()  # environment variables the scripts also see (PDK_ROOT)
    html: Path | None = None  # `latchwatch check` also writes the page there (resolved)
    limits: Limits = DEFAULT_LIMITS  # [limits]: what one input may cost latchwatch itself


def _read_toml(path: Path) -> dict:
    try:
        raw = read_bytes(path, DEFAULT_LIMITS.file_bytes)  # read before its own [limits] are known
        return tomllib.loads(raw.decode("utf-8"))
    except RecursionError:
        raise ConfigError(f"{path}: not valid TOML for latchwatch: arrays or tables nest deeper than it reads",
                          file=path) from None
    except tomllib.TOMLDecodeError as error:
        raise ConfigError(f"{path}: not valid TOML: {error}", file=path) from None
    except UnicodeDecodeError as error:
        raise ConfigError(f"{path}: not valid TOML: not UTF-8 text (byte {error.object[error.start]:#04x} at "
                          f"offset {error.start})", file=path) from None
    except InputFileError as error:
        raise ConfigError(str(error), file=path) from None
    except OSError as error:
        raise ConfigError(f"{path}: cannot be read: {error.strerror}", file=path) from None


def _pyproject_table(path: Path, document: dict) -> dict | None:
    tool = document.get("tool", {})
    if not isinstance(tool, dict) or "latchwatch" not in tool:
        return None
    table = tool["latchwatch"]
    if not isinstance(table, dict):
        raise ConfigError(
            f"{path}: tool.latchwatch: expected a table, got {table!r}", path, "tool.latchwatch"
        )
    return table


def find_project_config(start: Path, known_rules: set[str] | None = None) -> ProjectConfig:
    """The configuration nearest to ``start`` (a file or a folder), or an empty one."""
    start = Path(start).absolute()
    folder = start if start.is_dir() else start.parent
    for candidate in (folder, *folder.parents):
        pyproject, own = candidate / PYPROJECT, candidate / OWN_FILE
        table = _pyproject_table(pyproject, _read_toml(pyproject)) if pyproject.is_file() else None
        if table is not None and own.is_file():
            raise ConfigError(
                f"{own}: latchwatch is also configured in {pyproject} [tool.latchwatch]; "
                "keep one of the two",
                own,
            )
        if table is not None:
            return _parse(table, pyproject, "tool.latchwatch.", known_rules)
        if own.is_file():
            return load_project_config(own, known_rules)
    return ProjectConfig()


def load_project_config(path: Path, known_rules: set[str] | None = None) -> ProjectConfig:
    """Read one project file: a pyproject.toml (its [tool.latchwatch] table) or a file
    with the keys at the top level. ``known_rules`` validates rule ids when given."""
    path = Path(path).absolute()
    document = _read_toml(path)
    if path.name == PYPROJECT:
        table = _pyproject_table(path, document)
        if table is None:
            raise ConfigError(f"{path}: has no [tool.latchwatch] table", path, "tool.latchwatch")
        return _parse(table, path, "tool.latchwatch.", known_rules)
    if "tool" in document:
        raise ConfigError(
            f"{path}: tool: in {path.name} write the keys at the top level, "
            "without a [tool.latchwatch] table",
            path,
            "tool",
        )
    return _parse(document, path, "", known_rules)


class _Reader:
    """Checks values of one file; ``prefix`` is how the table's keys are spelled there."""

    def __init__(self, path: Path, prefix: str, known_rules: set[str] | None):
        self.path, self.prefix, self.known_rules = path, prefix, known_rules

    def fail(self, key: str, message: str):
        full = self.prefix + key
        raise ConfigError(f"{self.path}: {full}: {message}", self.path, full)

    def expect(self, key: str, expected: str, got):
        self.fail(key, f"expected {expected}, got {got!r}")

    def unknown_keys(self, table: dict, allowed: tuple[str, ...], where: str = "") -> None:
        for key in table:
            if "trust" in key.lower():
                self.fail(
                    where + key,
                    "a project file cannot grant trust; trust is granted only by "
                    "`latchwatch trust PATH` or an editor setting",
                )
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1)
                hint = f"; did you mean {close[0]!r}?" if close else f"; known keys: {', '.join(allowed)}"
                self.fail(where + key, f"unknown key{hint}")

    def string(self, key: str, value) -> str:
        if not isinstance(value, str) or not value.strip():
            self.expect(key, "a non-empty string", value)
        return value

    def strings(self, key: str, value) -> tuple[str, ...]:
        if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
            self.expect(key, "a list of non-empty strings", value)
        return tuple(value)

    def patterns(self, key: str, value) -> tuple[str, ...]:
        patterns = self.strings(key, value)
        for pattern in patterns:
            if Path(pattern).is_absolute() or ".." in re.split(r"[/\\]", pattern):
                self.expect(key, "glob patterns inside the configuration file's folder", pattern)
        return patterns

    def rule_id(self, key: str, rule: str) -> None:
        if self.known_rules is None or rule in self.known_rules:
            return
        close = difflib.get_close_matches(rule, sorted(self.known_rules), n=1)
        hint = f"; did you mean {close[0]!r}?" if close else "; `latchwatch rules` lists them"
        self.fail(key, f"unknown rule {rule!r}{hint}")

    def path_value(self, text: str) -> str:
        # normpath, not resolve: keep the user's spelling of symlinked folders, as root does.
        return os.path.normpath(self.path.parent / text)


def _looks_like_path(text: str) -> bool:
    return "/" in text or "\\" in text or text.endswith(".toml")


def _parse(table: dict, path: Path, prefix: str, known_rules: set[str] | None) -> ProjectConfig:
    read = _Reader(path, prefix, known_rules)
    read.unknown_keys(table, KEYS)
    values: dict = {}

    if "tech" in table:
        tech = read.string("tech", table["tech"])
        values["tech"] = read.path_value(tech) if _looks_like_path(tech) else tech
    for key in ("include", "exclude"):
        if key in table:
            values[key] = read.patterns(key, table[key])
    if "python" in table:
        python = read.string("python", table["python"])
        values["python"] = read.path_value(python) if _looks_like_path(python) else python
    if "timeout" in table:
        timeout = table["timeout"]
        if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not timeout > 0:
            read.expect("timeout", "a positive number of seconds", timeout)
        values["timeout"] = float(timeout)
    if "disable" in table:
        values["disable"] = read.strings("disable", table["disable"])
        for rule in values["disable"]:
            read.rule_id("disable", rule)
    if "severity" in table:
        values["severity"] = _severities(read, table["severity"])
    if "sweep" in table:
        values["sweeps"] = _sweeps(read, table["sweep"])
    if "require-sandbox" in table:
        if not isinstance(table["require-sandbox"], bool):
            read.expect("require-sandbox", "true or false", table["require-sandbox"])
        values["require_sandbox"] = table["require-sandbox"]
    if "env" in table:
        values["env"] = read.strings("env", table["env"])
        for name in values["env"]:
            problem = pass_env_problem(name)
            if problem:
                read.fail("env", problem)
    if "html" in table:
        page = read.string("html", table["html"])
        if not page.lower().endswith((".html", ".htm")):
            read.expect("html", "a path of an .html file (the page `latchwatch check` writes)", page)
        values["html"] = Path(read.path_value(page))
    if "limits" in table:
        values["limits"] = parse_limits(table["limits"], read.fail)
    return ProjectConfig(root=path.parent, source=path, **values)


def severity_problem(table, known_rules) -> tuple[str, str, object] | None:
    """The first wrong entry of a ``severity`` table as (key, expected, value), or None.

    The one definition of a severity override table, for the project file and the
    editor settings alike: rule id = "error" | "warning" | "info"."""
    if not isinstance(table, dict):
        return "severity", "a table of rule = severity", table
    for rule, level in table.items():
        if known_rules is not None and rule not in known_rules:
            return f"severity.{rule}", "a rule id (`latchwatch rules` lists them)", rule
        if not isinstance(level, str) or level.lower() not in ("error", "warning", "info"):
            return f"severity.{rule}", "one of error, warning, info", level
    return None


def severity_overrides(table) -> dict[str, Severity]:
    """Rule id -> Severity of a table that ``severity_problem`` accepted."""
    return {rule: Severity.parse(level) for rule, level in table.items()}


def _severities(read: _Reader, table) -> dict[str, Severity]:
    if isinstance(table, dict):
        for rule in table:
            read.rule_id(f"severity.{rule}", rule)  # with a did-you-mean hint
    problem = severity_problem(table, read.known_rules)
    if problem is not None:
        read.expect(*problem)
    return severity_overrides(table)


def _sweeps(read: _Reader, entries) -> tuple[SweepSpec, ...]:
    if isinstance(entries, dict):
        entries = [entries]  # [tool.latchwatch.sweep] written once, without the double brackets
    if not isinstance(entries, list):
        read.expect("sweep", "an array of tables ([[sweep]])", entries)
    sweeps = []
    for number, entry in enumerate(entries, start=1):
        where = f"sweep[{number}]."
        if not isinstance(entry, dict):
            read.expect(f"sweep[{number}]", "a table", entry)
        read.unknown_keys(entry, SWEEP_KEYS, where)
        for key in SWEEP_KEYS:
            if key not in entry:
                read.fail(where + key, "missing; every sweep needs script, function and params")
        script = read.string(where + "script", entry["script"])
        function = read.string(where + "function", entry["function"])
        if not function.isidentifier():
            read.expect(where + "function", "the name of a function in the script", function)
        params = entry["params"]
        if not isinstance(params, dict) or not params:
            read.expect(where + "params", "a table of parameter = [values]", params)
        for name, values in params.items():
            if not isinstance(values, list) or not values:
                read.expect(f"{where}params.{name}", "a non-empty list of values", values)
        sweeps.append(SweepSpec(read.path_value(script), function, {k: list(v) for k, v in params.items()}))
    return tuple(sweeps)


def _pattern_regex(pattern: str) -> re.Pattern:
    """A glob on '/'-separated relative paths: ``**`` spans folders, ``*`` and ``?``
    stay within one name, ``[...]`` is a character class."""
    parts = []
    index = 0
    while index < len(pattern):
        char = pattern[index]
        if pattern.startswith("**/", index):
            parts.append("(?:.*/)?")
            index += 3
            continue
        if pattern.startswith("**", index):
            parts.append(".*")
            index += 2
            continue
        if char == "*":
            parts.append("[^/]*")
        elif char == "?":
            parts.append("[^/]")
        elif char == "[" and "]" in pattern[index + 1:]:
            end = pattern.index("]", index + 1)
            body = pattern[index + 1:end].replace("\\", "\\\\")
            parts.append(f"[^{body[1:]}]" if body.startswith("!") else f"[{body}]")
            index = end + 1
            continue
        else:
            parts.append(re.escape(char))
        index += 1
    return re.compile("".join(parts) + r"\Z")


def _excluded(relative: str, excludes: list[re.Pattern]) -> bool:
    """A file is excluded when it, or any folder above it, matches an exclude pattern."""
    names = relative.split("/")
    prefixes = ["/".join(names[: n + 1]) for n in range(len(names))]
    return any(rx.match(prefix) for rx in excludes for prefix in prefixes)


def is_excluded(config: ProjectConfig, path: Path) -> bool:
    """The one include/exclude matcher: ``path`` (inside the project) matches an exclude
    pattern, itself or through a folder above it. Used by the include walk and by paths
    given on the command line alike."""
    if not config.exclude or config.root is None:
        return False
    try:
        relative = path.resolve().relative_to(config.root.resolve()).as_posix()
    except ValueError:
        return False
    return _excluded(relative, [_pattern_regex(p.replace("\\", "/").strip("/")) for p in config.exclude])


def expand_includes(config: ProjectConfig) -> list[Path]:
    """The files the include globs name, minus the excluded ones, sorted. Hidden
    folders (.venv, .git) and __pycache__ are never entered."""
    if config.root is None or not config.include:
        return []
    excludes = [_pattern_regex(p.replace("\\", "/").strip("/")) for p in config.exclude]
    found = set()
    for pattern in config.include:
        if pattern.rstrip("/").endswith("**"):  # Path.glob gives folders for "x/**"; mean their files
            pattern = pattern.rstrip("/") + "/*"
        for path in config.root.glob(pattern):
            relative = path.relative_to(config.root).as_posix()
            folders = relative.split("/")[:-1]
            if not path.is_file() or any(SKIPPED_FOLDER.match(name) for name in folders):
                continue
            if not _excluded(relative, excludes):
                found.add(path)
    return sorted(found)
