"""The report record every output format renders: runs, findings, optional device
table and the rule catalogue the run used (docs/report-json.md, docs/sarif.md)."""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path

from latchwatch.analyzers.layout.tops import CheckedTop
from latchwatch.analyzers.model.findings import Device, Finding, Severity
from latchwatch.analyzers.rules.base import Rule


@dataclass(frozen=True)
class RunSummary:
    """One script run (or one layout file read): what ran and under which protections."""

    script: str
    corner: dict | None
    status: str  # "ok", or what stopped it ("error", "timeout", "limit")
    seconds: float
    cells: int
    shapes: int
    sandbox: dict  # as the sandbox reports it, e.g. {"network": "blocked", ...}
    function: str | None = None  # the generator function a corner or preview called
    tops: tuple[CheckedTop, ...] = ()  # the cells checked as tops, and why


@dataclass(frozen=True)
class Report:
    """A check's runs, findings and devices, ready for any writer."""
    technology: str
    runs: tuple[RunSummary, ...]
    findings: tuple[Finding, ...]
    devices: tuple[Device, ...] | None  # None unless the device table was asked for
    rules: tuple[Rule, ...]
    # Per run (aligned with ``runs``), the drawings of its checked tops when pictures were asked for.
    drawings: tuple[tuple, ...] = ()

    def summary(self) -> dict:
        counts = {severity.label: 0 for severity in sorted(Severity, reverse=True)}
        for finding in self.findings:
            counts[finding.severity.label] += 1
        return counts


def display_path(file: str | None, base: Path | None = None) -> str | None:
    """``file`` relative to ``base`` (default: the working directory) when it lies
    inside it; otherwise unchanged. Relative paths are taken as already relative."""
    if file is None or not os.path.isabs(file):
        return file
    base_text = os.path.abspath(base if base is not None else os.getcwd())
    absolute = os.path.abspath(file)
    try:
        if os.path.commonpath([absolute, base_text]) != base_text:
            return file
    except ValueError:  # different drives on Windows
        return file
    return Path(os.path.relpath(absolute, base_text)).as_posix()


def _localize_finding(finding: Finding, base: Path | None) -> Finding:
    return replace(
        finding,
        file=display_path(finding.file, base),
        stack=tuple(replace(f, file=display_path(f.file, base)) for f in finding.stack),
        placements=tuple(replace(p, file=display_path(p.file, base)) for p in finding.placements),
        related=tuple(replace(r, file=display_path(r.file, base)) for r in finding.related),
    )


def for_display(report: Report, base: Path | None = None) -> Report:
    """The report as every format prints it: paths relative to ``base`` where inside
    it, findings in docs/report-json.md order (sorted after the paths are shortened, so the
    order is the one the reader sees)."""
    findings = sorted((_localize_finding(f, base) for f in report.findings), key=Finding.sort_key)
    runs = tuple(replace(r, script=display_path(r.script, base),
                         tops=tuple(replace(t, file=display_path(t.file, base)) for t in r.tops))
                 for r in report.runs)
    devices = None
    if report.devices is not None:
        devices = tuple(replace(d, file=display_path(d.file, base)) for d in report.devices)
    return replace(report, runs=runs, findings=tuple(findings), devices=devices)


def corner_label(corner: dict | None, names: list[str] | None = None) -> str:
    """``fingers=16, w=0.5``, with only ``names`` when given (the parameters that vary)."""
    corner = corner or {}
    shown = [n for n in (names or corner) if n in corner] or list(corner)
    return ", ".join(f"{n}={corner[n]!r}" for n in shown) or "its defaults"
