"""From paths to a report: one function shared by the command line and the language
server, so both run the same pipeline."""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path

from latchwatch.analyzers.model.findings import Finding, Severity
from latchwatch.analyzers.model.run_outcome import LAYOUT_SUFFIXES, RunOutcome, ScriptFailure
from latchwatch.analyzers.technology.model import Technology
from latchwatch.server.config.files import file_problem, read_text
from latchwatch.server.config.limits import DEFAULT_LIMITS, Limits
from latchwatch.server.report.model import RunSummary
from latchwatch.server.runs.suppression import apply_suppressions
from latchwatch.server.sandbox.runner import read_layout_file, run_script

SCRIPT_SUFFIXES = (".py",)


@dataclass(frozen=True)
class CheckSettings:
    """Everything a check needs besides the paths: technology, interpreter, limits, rules."""
    tech: Technology
    python: str | None = None
    timeout: float = 10.0
    select: tuple[str, ...] = ()
    ignore: tuple[str, ...] = ()
    disable: tuple[str, ...] = ()
    severity: dict[str, Severity] = field(default_factory=dict)
    top: str | None = None
    devices: bool = False
    project_root: Path | None = None
    require_sandbox: bool = False  # a missing sandbox protection is an error (SandboxUnavailable), not a fallback
    pass_env: tuple[str, ...] = ()  # environment variables the scripts also see (project `env`, `--env`)
    hosted: bool = False  # runs are forks of corner hosts (server/sandbox/hosts.py): many runs, the same settings
    limits: Limits = DEFAULT_LIMITS  # the project's [limits]: files, layout budget, analysis memory and time
    # Turns each checked top (its CheckContext and findings) into a drawing kept with the run (server/pictures/).
    draw: Callable | None = field(default=None, compare=False)


def is_checkable(path: Path) -> bool:
    """True for a script or layout file latchwatch can check."""
    return path.suffix.lower() in SCRIPT_SUFFIXES + LAYOUT_SUFFIXES


def expand_paths(paths: Iterable[Path], excluded: Callable[[Path], bool] = lambda p: False) -> list[Path]:
    """Files as given; folders walked for scripts and layouts (hidden folders skipped)."""
    out: list[Path] = []
    for path in paths:
        if path.is_dir():
            for root, dirs, files in os.walk(path):
                dirs[:] = sorted(d for d in dirs if not d.startswith(".") and d != "__pycache__")
                for name in sorted(files):
                    candidate = Path(root) / name
                    if is_checkable(candidate) and not excluded(candidate):
                        out.append(candidate)
        else:
            out.append(path)
    return out


def run_path(path: Path, settings: CheckSettings, source: str | None = None, cancel=None) -> RunOutcome:
    """Run a script, or read a layout file, into a RunOutcome; a path that is no regular
    file within the size limit is a failed run that says so (nothing starts)."""
    layout_file = path.suffix.lower() in LAYOUT_SUFFIXES
    # An editor's buffer is the script's source; a layout is read from disk all the same.
    refused = _refusal(path, settings.limits) if source is None or layout_file else None
    if refused is not None:
        return RunOutcome(script=str(path), status="error", seconds=0.0, layout=None,
                          failure=ScriptFailure("error", None, refused), output="", sandbox={})
    if layout_file:  # read in a child too: gdstk can crash on a corrupt file
        kind = "oas" if path.suffix.lower() in (".oas", ".oasis") else "gds"
        return read_layout_file(path, kind, python=settings.python, timeout=max(settings.timeout, 60.0),
                                cancel=cancel, require_sandbox=settings.require_sandbox)
    return run_script(path, source=source, python=settings.python, timeout=settings.timeout,
                      project_root=settings.project_root, cancel=cancel, require_sandbox=settings.require_sandbox,
                      hosted=settings.hosted, pass_env=settings.pass_env)


def _refusal(path: Path, limits: Limits) -> str | None:
    try:
        return file_problem(path, limits.file_bytes, limits.file_hint())
    except OSError:
        return None  # the run itself reports a file it cannot read


def import_analysis() -> None:
    """Import the analysis (the rules, and numpy, shapely and scipy behind them): a third of
    a second that the command line spends while its first scripts run, not after them."""
    import latchwatch.server.runs.analysis  # noqa: F401


def check_run(outcome: RunOutcome, settings: CheckSettings, read_source=None,
              cancel=None) -> tuple[list[Finding], list, RunSummary, list] | None:
    """The findings, devices, summary and drawings (with ``settings.draw``) of one run under
    the settings (suppression comments applied), checked in an analysis process under the
    [limits] (server/runs/analysis.py). None when ``cancel`` was set during the check."""
    from latchwatch.analyzers.check import CheckOptions, select_rules
    from latchwatch.server.runs.analysis import analyse

    rules = select_rules(settings.select or None, settings.ignore, settings.disable)
    options = CheckOptions(
        project_root=str(settings.project_root) if settings.project_root else None,
        top=settings.top, exact_devices=settings.devices, budget=settings.limits.budget(),
    )
    result = analyse(outcome, settings.tech, options, settings.limits, rules=rules, severity=settings.severity,
                     want_devices=settings.devices, cancel=cancel, on_top=settings.draw)
    if result is None:
        return None
    findings = apply_suppressions(result.findings, read_source or read_text_or_none)
    summary = RunSummary(script=outcome.script, corner=outcome.corner, status=result.status,
                         seconds=round(outcome.seconds, 3), cells=result.cells, shapes=result.shapes,
                         sandbox=outcome.sandbox, tops=tuple(result.tops))
    return findings, result.devices or [], summary, result.per_top


def read_text_or_none(file: str | Path, limits: Limits = DEFAULT_LIMITS) -> str | None:
    """The file's text (undecodable bytes replaced), or None when it cannot be read or is
    no regular file within the size limit (server/config/files.py)."""
    try:
        return read_text(file, limits.file_bytes)
    except OSError:  # InputFileError among them
        return None
