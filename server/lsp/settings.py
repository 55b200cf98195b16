"""Editor settings of the language server, and the check settings of one document.

Precedence (docs/project.md): editor settings over the project file over the defaults.
Editor settings arrive in initializationOptions, in workspace/didChangeConfiguration
and from workspace/configuration (section ``latchwatch``, asked per document so that
each folder of a multi-root workspace can differ); later sources override earlier
ones key by key.

``requireSandbox`` and the project file's ``require-sandbox`` are or'ed: either can make a
missing sandbox protection an error, neither can relax the other.

``trustedFolders`` is the one setting a project must not be able to supply, so it is
read only from initializationOptions, didChangeConfiguration and the unscoped
(user-level) workspace/configuration answer, never from a per-folder answer.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field, replace
from pathlib import Path

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.analyzers.technology.model import Technology
from latchwatch.server.config import techfiles
from latchwatch.server.config.project import (
    ConfigError,
    ProjectConfig,
    find_project_config,
    severity_overrides,
    severity_problem,
)
from latchwatch.server.config.trust import is_trusted
from latchwatch.server.runs.pipeline import CheckSettings
from latchwatch.server.sandbox.policy import pass_env_problem

SECTION = "latchwatch"
RUN_MODES = ("change", "save")
STRING_KEYS = {"tech": "tech", "python": "python", "ruleDocsUrl": "rule_docs_url", "pagePath": "page_path"}
DEFAULT_DEBOUNCE_MS = 500.0
DEFAULT_TIMEOUT = 10.0
KEYS = ("tech", "python", "timeout", "debounce", "runOn", "disable", "severity", "trustedFolders", "ruleDocsUrl",
        "requireSandbox", "env", "pagePath")


class SettingsError(Exception):
    """A setting, project file or technology that cannot be used; the message names it."""


@dataclass(frozen=True)
class EditorSettings:
    """Settings the editor sent; None where it sent none."""
    tech: str | None = None
    python: str | None = None
    timeout: float | None = None
    debounce_ms: float = DEFAULT_DEBOUNCE_MS
    run_on: str = "change"
    disable: tuple[str, ...] | None = None  # None: the project file decides
    severity: dict[str, Severity] = field(default_factory=dict)
    trusted_folders: tuple[str, ...] = ()
    rule_docs_url: str | None = None  # "{rule}" is replaced by the rule id
    require_sandbox: bool = False  # or'ed with the project file's `require-sandbox`: either can tighten
    env: tuple[str, ...] = ()  # environment variables the scripts also see, added to the project's `env`
    page_path: str | None = None  # where the show-page command writes; None: the project's `html`, else a cache file


def section_of(value) -> dict:
    """The ``latchwatch`` table of a settings object, which clients send either wrapped
    ({"latchwatch": {...}}) or bare."""
    if not isinstance(value, dict):
        return {}
    inner = value.get(SECTION)
    return inner if isinstance(inner, dict) else {k: v for k, v in value.items() if k in KEYS}


def merge(base: EditorSettings, raw: dict, allow_trust: bool) -> tuple[EditorSettings, list[str]]:
    """``base`` overridden by the keys of ``raw``; bad values are skipped and described."""
    values, problems = {}, []

    def bad(key: str, expected: str, got) -> None:
        problems.append(f"setting {SECTION}.{key}: expected {expected}, got {got!r}; ignored")

    for key, value in raw.items():
        if value is None:
            continue
        if key in STRING_KEYS:
            if isinstance(value, str) and value.strip():
                values[STRING_KEYS[key]] = value.strip()
            else:
                bad(key, "a non-empty string", value)
        elif key in ("timeout", "debounce"):
            if isinstance(value, (int, float)) and not isinstance(value, bool) and value >= (0 if key == "debounce" else 1e-9):
                values["timeout" if key == "timeout" else "debounce_ms"] = float(value)
            else:
                bad(key, "a positive number" + (" of milliseconds" if key == "debounce" else " of seconds"), value)
        elif key == "runOn":
            if value in RUN_MODES:
                values["run_on"] = value
            else:
                bad(key, " or ".join(repr(m) for m in RUN_MODES), value)
        elif key == "disable":
            if isinstance(value, list) and all(v in RULES_BY_ID for v in value):
                values["disable"] = tuple(value)
            else:
                bad(key, "a list of rule ids (`latchwatch rules` lists them)", value)
        elif key == "severity":
            if severity_problem(value, RULES_BY_ID) is None:
                values["severity"] = severity_overrides(value)
            else:
                bad(key, "a table of rule id = error|warning|info", value)
        elif key == "env":
            problem = (next(filter(None, map(pass_env_problem, value)), None) if isinstance(value, list)
                       else "a list of environment variable names, e.g. [\"PDK_ROOT\"]")
            if problem:
                bad(key, problem, value)
            else:
                values["env"] = tuple(dict.fromkeys(value))
        elif key == "requireSandbox":
            if isinstance(value, bool):
                values["require_sandbox"] = value
            else:
                bad(key, "true or false", value)
        elif key == "trustedFolders":
            if not allow_trust:
                continue
            if isinstance(value, list) and all(isinstance(v, str) for v in value):
                values["trusted_folders"] = tuple(v for v in value if v)
            else:
                bad(key, "a list of absolute folder paths", value)
    return replace(base, **values), problems


@dataclass(frozen=True)
class DocumentSettings:
    """What one run of one document needs."""

    check: CheckSettings
    project: ProjectConfig
    root: Path  # the folder trust is asked for, and where user frames live


class TechnologyCache:
    """Technologies by reference; a technology file is read again when it changes."""

    def __init__(self):
        self._cache: dict[tuple, Technology] = {}

    def load(self, reference: str, base: Path) -> Technology:
        """The technology a reference names, reloaded only when its file changed."""
        candidate = Path(reference) if os.path.isabs(reference) else base / reference
        stamp = candidate.stat().st_mtime_ns if candidate.is_file() else None
        key = (reference, str(base), stamp)
        if key not in self._cache:
            self._cache[key] = techfiles.load_technology(reference, base)
        return self._cache[key]


def trust_root(path: Path, workspace_folder: Path | None) -> Path:
    """The folder an untrusted document's notice asks to trust: its project's folder,
    else its workspace folder, else its own folder. Reading the project file runs nothing."""
    try:
        project = find_project_config(path)
    except ConfigError:
        project = ProjectConfig()
    return project.root or workspace_folder or path.parent


def document_settings(path: Path, editor: EditorSettings, workspace_folder: Path | None,
                      techs: TechnologyCache) -> DocumentSettings:
    """The check settings of the document at ``path``: its project file, then the
    editor settings on top. Raises ConfigError, TechnologyError or SettingsError."""
    project = find_project_config(path, known_rules=set(RULES_BY_ID))
    root = project.root or workspace_folder or path.parent
    if editor.tech is not None:
        tech_ref, base = editor.tech, workspace_folder or path.parent
    elif project.tech is not None:
        tech_ref, base = project.tech, project.root
    else:
        raise SettingsError(
            f"no technology for {path.name}: set `tech` in latchwatch.toml or [tool.latchwatch] of "
            f"pyproject.toml, or the editor setting {SECTION}.tech "
            f"(built-in: {', '.join(techfiles.builtin_names())})")
    if project.python and not editor.python and not is_trusted(project.source, editor.trusted_folders):
        # Trust is per folder: a trusted subfolder never runs the program an untrusted parent names.
        raise SettingsError(
            f"{project.source}: its `python` ({project.python}) is not used, because {project.root} is not "
            f"trusted (only a folder below it is); trust it with `latchwatch trust {project.root}`, or set the "
            f"editor setting {SECTION}.python")
    check = CheckSettings(
        tech=techs.load(tech_ref, base),
        python=editor.python or project.python,
        timeout=editor.timeout or project.timeout or DEFAULT_TIMEOUT,
        disable=editor.disable if editor.disable is not None else tuple(project.disable),
        severity={**project.severity, **editor.severity},
        devices=True,  # the hover and the "2 of 5" counts read the device table
        project_root=root,
        require_sandbox=editor.require_sandbox or project.require_sandbox,
        pass_env=tuple(dict.fromkeys([*project.env, *editor.env])), limits=project.limits,
        hosted=True,  # edits re-run the same document: a corner host's fork skips interpreter start and imports
    )
    return DocumentSettings(check, project, root)
