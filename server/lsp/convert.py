"""Findings to LSP diagnostics and hovers (docs/provenance.md, docs/language-server.md). Pure conversion, no I/O:
source lines come in through ``read_line``.

- Findings that share an anchor line and a rule become one diagnostic: "2 of 5 P+
  diffusions drawn here ...", the worst figure first, the others listed after it.
- A finding anchored in another file is published for that file, and also in the
  checked document at its outermost frame there (the call that led to the drawing).
- relatedInformation: the nearest tap at the line that drew it, the call sites, the
  reference placements.
- Columns: frames carry 1-based columns in code points (server/child/job.py converts
  CPython's UTF-8 byte offsets); they are converted to the negotiated position
  encoding, UTF-16 unless the client chose another.
- Several runs of one document (parameter corners, previewed functions) merge per
  anchor line: the worst corner's diagnostic, prefixed "at fingers=16, 1 of 3
  corners: ...", naming only the parameters that vary.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass

from lsprotocol import types
from pygls.uris import from_fs_path

from latchwatch.analyzers.electrical.shunt import si
from latchwatch.analyzers.electrical.trigger import describe_injection
from latchwatch.analyzers.model.findings import Device, Finding, Severity
from latchwatch.server.report.model import corner_label
from latchwatch.server.report.terminal import terminal_safe

SOURCE = "latchwatch"
MAX_RELATED = 30  # per diagnostic; a loop over hundreds of shapes must not flood the editor
MAX_OTHER_FIGURES = 5
DEVICE_RULES = {"tap-distance": "figure", "floating-well": "count", "shunt-resistance": "figure",
                "injection-bias": "figure"}
KIND_NOUNS = {"pdiff": "P+ diffusion", "ndiff": "N+ diffusion"}
TAP_NAMES = {"pdiff": "n-well tap", "ndiff": "substrate tap"}

SEVERITIES = {
    Severity.ERROR: types.DiagnosticSeverity.Error,
    Severity.WARNING: types.DiagnosticSeverity.Warning,
    Severity.INFO: types.DiagnosticSeverity.Information,
}

ReadLine = Callable[[str, int], "str | None"]  # (file, 1-based line) -> its text


# --- positions -------------------------------------------------------------------

def encode_column(line_text: str, offset: int, encoding: str) -> int:
    """A 0-based offset in code points into ``line_text`` as a 0-based column in
    ``encoding`` ("utf-8", "utf-16" or "utf-32", the LSP position encodings)."""
    prefix = line_text[:max(0, offset)]
    if encoding == types.PositionEncodingKind.Utf32:
        return len(prefix)
    if encoding == types.PositionEncodingKind.Utf8:
        return len(prefix.encode("utf-8"))
    return len(prefix.encode("utf-16-le")) // 2


def line_length(line_text: str, encoding: str) -> int:
    """The length of a line in the client's position encoding."""
    return encode_column(line_text, len(line_text), encoding)


def _strip_eol(text: str | None) -> str:
    return (text or "").rstrip("\r\n")


def line_range(file: str, line: int, end_line: int | None, column: int | None, end_column: int | None,
               read_line: ReadLine, encoding: str) -> types.Range:
    """The LSP range of a frame (lines and columns 1-based, ``end_column`` exclusive);
    without columns the line from its first non-blank character to its end."""
    first = _strip_eol(read_line(file, line))
    last_line = end_line if end_line and end_line >= line else line
    last = first if last_line == line else _strip_eol(read_line(file, last_line))
    if column is None:
        start = encode_column(first, len(first) - len(first.lstrip()), encoding)
        end = types.Position(last_line - 1, line_length(last, encoding))
    else:
        start = encode_column(first, column - 1, encoding)
        stop = end_column - 1 if end_column is not None else len(last)
        end = types.Position(last_line - 1, encode_column(last, stop, encoding))
    begin = types.Position(line - 1, start)
    if (end.line, end.character) <= (begin.line, begin.character):
        end = types.Position(line - 1, max(line_length(first, encoding), start))
    return types.Range(begin, end)


# --- grouping ----------------------------------------------------------------------

@dataclass(frozen=True)
class Target:
    """Where a group of findings is shown: a file, a line and a rule."""
    file: str
    line: int  # 1-based
    rule: str


@dataclass
class Group:
    """Findings shown as one diagnostic, worst first."""
    target: Target
    findings: list[Finding]
    via: bool  # shown at a call site, the drawing line lies in another file
    frame: object | None  # the frame the range comes from (None: the finding's own columns)


def _outermost_frame_in(finding: Finding, file: str):
    frames = [f for f in finding.stack if f.file == file]
    return frames[-1] if frames else None


def _worst_key(finding: Finding):
    # No figure but a limit means "no tap at all": worse than any distance.
    value = finding.value
    if value is None:
        value = float("inf") if finding.limit is not None else float("-inf")
    return (-int(finding.severity), -value)


def group_findings(findings: Iterable[Finding], document: str) -> list[Group]:
    """Findings grouped per (file, line, rule); those drawn in another file also get a
    group at their outermost frame in ``document``."""
    groups: dict[tuple[Target, bool], Group] = {}

    def add(target: Target, finding: Finding, via: bool, frame) -> None:
        key = (target, via)
        if key not in groups:
            groups[key] = Group(target, [], via, frame)
        groups[key].findings.append(finding)

    for finding in findings:
        file, line = finding.file or document, finding.line or 1
        add(Target(file, line, finding.rule), finding, False, None)
        if file != document:
            outer = _outermost_frame_in(finding, document)
            if outer is not None:
                add(Target(document, outer.line, finding.rule), finding, True, outer)
    for group in groups.values():
        group.findings.sort(key=_worst_key)
    return sorted(groups.values(), key=lambda g: (g.target.file, g.target.line, g.target.rule, g.via))


class DeviceIndex:
    """Device rows by the line that drew them."""

    def __init__(self, devices: Iterable[Device]):
        self.by_line: dict[tuple[str, int], list[Device]] = {}
        for device in devices:
            if device.file is not None and device.line is not None:
                self.by_line.setdefault((device.file, device.line), []).append(device)

    def at(self, file: str, line: int) -> list[Device]:
        return self.by_line.get((file, line), [])


def _plural(noun: str, count: int) -> str:
    return noun if count == 1 else noun + "s"


def _count_phrase(group: Group, devices: DeviceIndex) -> str | None:
    """ "2 of 5 P+ diffusions drawn here" when the rule is about device diffusions and
    the device table knows how many were drawn through the anchor lines."""
    findings = group.findings
    if group.target.rule not in DEVICE_RULES:
        return None
    anchors = {(f.file, f.line) for f in findings}
    rows = [d for file, line in anchors for d in devices.at(file, line)]
    kinds = {f.device_kind for f in findings}
    if len(kinds) != 1 or None in kinds:
        return None
    kind = kinds.pop()
    drawn = sum(1 for d in rows if d.kind == kind)
    if drawn < len(findings):
        return None
    return f"{len(findings)} of {drawn} {_plural(KIND_NOUNS[kind], drawn)} drawn here"


def _figure(value: float, unit: str | None) -> str:
    """Lengths with 2 decimals (the unit follows the list); electrical values with 3
    significant figures and their unit (docs/performance.md)."""
    return f"{value:.2f}" if unit in (None, "um") else si(value, unit)


def group_message(group: Group, devices: DeviceIndex) -> str:
    """The diagnostic text of a group: the worst finding, counted against what the line drew."""
    findings = group.findings
    worst = findings[0]
    message = worst.message
    counted = _count_phrase(group, devices)
    if len(findings) == 1:
        if counted and not counted.startswith("1 of 1 "):
            message = f"{counted}: {message}"
    else:
        counted = counted or f"{len(findings)} shapes drawn here"
        message = f"{counted}; worst: {message}"
        others = [f.value for f in findings[1:] if f.value is not None]
        if others:
            listed = ", ".join(_figure(v, worst.unit) for v in others[:MAX_OTHER_FIGURES])
            more = ", ..." if len(others) > MAX_OTHER_FIGURES else ""
            unit = f" {worst.unit}" if worst.unit == "um" else ""
            message += f"; others: {listed}{more}{unit}"
    if group.via:
        message = f"drawn at {_short(worst.file)}:{worst.line} through this call: {message}"
    return message


def _short(path: str | None) -> str:
    return (path or "?").replace("\\", "/").rsplit("/", 1)[-1]


def _location(file: str, line: int, read_line: ReadLine, encoding: str) -> types.Location:
    return types.Location(uri=from_fs_path(file), range=line_range(file, line, None, None, None, read_line, encoding))


def related_information(group: Group, read_line: ReadLine, encoding: str) -> list[types.DiagnosticRelatedInformation]:
    """Related locations of a group (nearest tap, call sites, placements), each once."""
    seen, out = set(), []

    def add(file: str | None, line: int | None, message: str) -> None:
        if file is None or line is None or len(out) >= MAX_RELATED or (file, line, message) in seen:
            return
        seen.add((file, line, message))
        out.append(types.DiagnosticRelatedInformation(_location(file, line, read_line, encoding),
                                                      terminal_safe(message)))

    for finding in group.findings:
        if group.via:
            add(finding.file, finding.line, f"drawn here: {finding.message}")
        for related in finding.related:
            where = f" at ({related.location[0]:.2f}, {related.location[1]:.2f})" if related.location else ""
            add(related.file, related.line, f"{related.message}{where}")
        for caller in finding.stack[1:]:
            add(caller.file, caller.line, f"call site in {caller.function}")
        for placement in finding.placements:
            add(placement.file, placement.line, f"placed as {placement.instance} in {placement.cell}")
    return out


def to_diagnostic(group: Group, devices: DeviceIndex, read_line: ReadLine, encoding: str,
                  rule_href: Callable[[str], str | None]) -> types.Diagnostic:
    """The LSP diagnostic of a group of findings."""
    worst = group.findings[0]
    if group.frame is not None:
        f = group.frame
        rng = line_range(group.target.file, f.line, f.end_line, f.column, f.end_column, read_line, encoding)
    elif worst.file is not None and worst.line is not None:
        rng = line_range(worst.file, worst.line, worst.end_line, worst.column, worst.end_column, read_line, encoding)
    else:
        rng = line_range(group.target.file, group.target.line, None, None, None, read_line, encoding)
    href = rule_href(worst.rule)
    return types.Diagnostic(
        range=rng,
        message=terminal_safe(group_message(group, devices)),
        severity=SEVERITIES[max(f.severity for f in group.findings)],
        code=worst.rule,
        code_description=types.CodeDescription(href=href) if href else None,
        source=SOURCE,
        related_information=related_information(group, read_line, encoding) or None,
        data={"rule": worst.rule, "line": group.target.line, "count": len(group.findings)},
    )


def diagnostics_by_file(findings: Iterable[Finding], devices: Iterable[Device], document: str,
                        read_line: ReadLine, encoding: str = types.PositionEncodingKind.Utf16,
                        rule_href: Callable[[str], str | None] = lambda rule: None
                        ) -> dict[str, list[types.Diagnostic]]:
    """Diagnostics for every file the findings of one run of ``document`` touch; the
    document itself is always a key (an empty list clears it)."""
    index = DeviceIndex(devices)
    out: dict[str, list[types.Diagnostic]] = {document: []}
    for group in group_findings(findings, document):
        out.setdefault(group.target.file, []).append(to_diagnostic(group, index, read_line, encoding, rule_href))
    return out


# --- several runs: parameter corners -------------------------------------------------

@dataclass(frozen=True)
class RunFindings:
    """One run of a document: a corner of a sweep, a previewed function, or the plain run."""

    function: str | None  # the function called; None for the plain run
    corner: dict | None  # its keyword arguments ({} for its defaults)
    findings: tuple[Finding, ...] = ()
    devices: tuple[Device, ...] = ()


def _varying(corners: list[dict]) -> list[str]:
    names = list(dict.fromkeys(name for corner in corners for name in corner))
    return [n for n in names if len({repr(c.get(n)) for c in corners}) > 1]


class _Families:
    """Runs by the function they called: the corners of one sweep count together."""

    def __init__(self, runs: list[RunFindings]):
        self.runs = runs
        self.members: dict[str | None, list[int]] = {}
        for index, run in enumerate(runs):
            self.members.setdefault(run.function, []).append(index)
        self.names = {f: _varying([runs[i].corner or {} for i in members]) for f, members in self.members.items()}

    def label(self, index: int) -> str:
        run = self.runs[index]
        return corner_label(run.corner, self.names[run.function])

    def prefix(self, worst: int, hits: list[int]) -> str:
        """How the worst run is named, and how many runs of its family share the finding."""
        run = self.runs[worst]
        family = self.members[run.function]
        if len(family) > 1:
            mine = [i for i in hits if i in family]
            return f"at {self.label(worst)}, {len(mine)} of {len(family)} corners: "
        if len(self.members) > 1 and run.function is not None:
            arguments = corner_label(run.corner) if run.corner else ""
            return f"in {run.function}({'' if arguments == 'its defaults' else arguments}): "
        return ""

    def also(self, worst: int, hits: list[int]) -> str:
        family = self.members[self.runs[worst].function]
        others = [self.label(i) for i in hits if i != worst and i in family]
        if len(family) < 2 or not others:
            return ""
        more = ", ..." if len(others) > MAX_OTHER_FIGURES else ""
        return f"; also at {'; '.join(others[:MAX_OTHER_FIGURES])}{more}"


def diagnostics_for_runs(runs: Iterable[RunFindings], document: str, read_line: ReadLine,
                         encoding: str = types.PositionEncodingKind.Utf16,
                         rule_href: Callable[[str], str | None] = lambda rule: None
                         ) -> dict[str, list[types.Diagnostic]]:
    """Diagnostics for every run of ``document``: one run as diagnostics_by_file; several
    merged per anchor line and rule, the worst corner first."""
    runs = list(runs)
    if len(runs) <= 1:
        only = runs[0] if runs else RunFindings(None, None)
        return diagnostics_by_file(only.findings, only.devices, document, read_line, encoding, rule_href)
    families = _Families(runs)
    merged: dict[tuple[Target, bool], list[tuple[int, Group]]] = {}
    for index, run in enumerate(runs):
        for group in group_findings(run.findings, document):
            merged.setdefault((group.target, group.via), []).append((index, group))
    out: dict[str, list[types.Diagnostic]] = {document: []}
    for key in sorted(merged, key=lambda k: (k[0].file, k[0].line, k[0].rule, k[1])):
        hits = merged[key]
        worst, group = min(hits, key=lambda hit: (_worst_key(hit[1].findings[0]), hit[0]))
        diagnostic = to_diagnostic(group, DeviceIndex(runs[worst].devices), read_line, encoding, rule_href)
        indices = [index for index, _group in hits]
        diagnostic.message = families.prefix(worst, indices) + diagnostic.message + families.also(worst, indices)
        diagnostic.severity = SEVERITIES[max(f.severity for _i, g in hits for f in g.findings)]
        diagnostic.data = dict(diagnostic.data, runs=len(hits), corner=runs[worst].corner,
                               function=runs[worst].function)
        out.setdefault(key[0].file, []).append(diagnostic)
    return out


def hover_for_runs(file: str, line: int, runs: Iterable[RunFindings],
                   limits: Callable[[str], float | None]) -> str | None:
    """The hover of the run worst on this line (its findings, else its farthest tap),
    named as in the diagnostics; one run as hover_markdown."""
    runs = list(runs)
    if len(runs) == 1:
        return hover_markdown(file, line, runs[0].devices, runs[0].findings, limits)

    def badness(index: int):
        run = runs[index]
        here = [f for f in run.findings if f.file == file and f.line == line]
        distances = [d.tap_distance_um for d in DeviceIndex(run.devices).at(file, line)
                     if d.tap_distance_um is not None]
        return (min((_worst_key(f) for f in here), default=(1, 0.0)), -max(distances, default=float("-inf")), index)

    shown = [i for i in range(len(runs)) if hover_markdown(file, line, runs[i].devices, runs[i].findings, limits)]
    if not shown:
        return None
    worst = min(shown, key=badness)
    families = _Families(runs)
    text = hover_markdown(file, line, runs[worst].devices, runs[worst].findings, limits)
    family = families.members[runs[worst].function]
    if len(family) > 1:
        head = f"**at {families.label(worst)}**, the worst of {len(family)} corners on this line"
    else:
        head = f"**{runs[worst].function or 'the script'}** with {corner_label(runs[worst].corner)}"
    return f"{head}\n\n{text}"


def notice(message: str, severity=types.DiagnosticSeverity.Information, code: str | None = None,
           line_text: str = "", encoding: str = types.PositionEncodingKind.Utf16) -> types.Diagnostic:
    """A diagnostic on the first line that is about the run, not about a shape (an
    untrusted folder, a configuration error)."""
    end = types.Position(0, line_length(_strip_eol(line_text), encoding))
    return types.Diagnostic(range=types.Range(types.Position(0, 0), end), message=terminal_safe(message),
                            severity=severity, code=code, source=SOURCE)


# --- hover -------------------------------------------------------------------------

def hover_markdown(file: str, line: int, devices: Iterable[Device], findings: Iterable[Finding],
                   limits: Callable[[str], float | None]) -> str | None:
    """What the line drew: device diffusions per kind, how many, the worst nearest-tap
    distance against the limit, and the shunt figures when the estimate exists.
    ``limits(kind)`` is the technology's tap-distance limit for pdiff/ndiff."""
    rows = DeviceIndex(devices).at(file, line)
    here = [f for f in findings if f.file == file and f.line == line]
    if not rows and not here:
        return None
    parts = []
    for kind in ("pdiff", "ndiff"):
        of_kind = [d for d in rows if d.kind == kind]
        if not of_kind:
            continue
        noun = _plural(KIND_NOUNS[kind], len(of_kind))
        cells = sorted({d.cell for d in of_kind if d.cell})
        text = [f"**{len(of_kind)} {noun}** drawn on this line" + (f" (top cell {', '.join(cells)})" if cells else "")]
        distances = [d.tap_distance_um for d in of_kind if d.tap_distance_um is not None]
        limit = limits(kind)
        limit_text = f" (limit {limit:.2f} um)" if limit is not None else ""
        if distances:
            text.append(f"- nearest {TAP_NAMES[kind]}: worst {max(distances):.2f} um, best {min(distances):.2f} um{limit_text}")
        if len(distances) < len(of_kind):
            text.append(f"- {len(of_kind) - len(distances)} with no contacted {TAP_NAMES[kind]} in the body")
        shunts = [d.shunt_ohm for d in of_kind if d.shunt_ohm is not None]
        currents = [d.trigger_current_a for d in of_kind if d.trigger_current_a is not None]
        if shunts:
            text.append(f"- shunt resistance to the taps (estimate from a sheet model): up to "
                        f"{si(max(shunts), 'ohm')}" + (f", down to {si(min(shunts), 'ohm')}" if len(shunts) > 1 else ""))
        if currents:
            text.append(f"- current through it that forward-biases the junction: down to {si(min(currents), 'A')}")
        for d in of_kind:
            if d.injection is not None:
                text.append(f"- {describe_injection(d.injection)} (diffusion and sheet model)")
        if len(shunts) < len(of_kind):
            text.append(f"- {len(of_kind) - len(shunts)} without a shunt estimate (no contacted tap reachable, "
                        "or no sheet resistance for the body in the technology)")
        parts.append("\n".join(text))
    if here:
        rules = sorted({f.rule for f in here})
        parts.append(f"{len(here)} {_plural('finding', len(here))} here: {', '.join(rules)}")
    return "\n\n".join(parts)
