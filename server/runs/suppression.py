"""Suppression comments (docs/suppression.md).

``# latchwatch: ignore[rule-id, rule-id]`` or ``# latchwatch: ignore`` (every rule)
at the end of a line suppresses every finding whose stack passes through that
line. Only real comments count: the source is tokenized, so the same text inside a
string literal does nothing. The marker may follow another comment on the same line
(``# noqa  # latchwatch: ignore[tap-distance]``) but must end the line.
"""

from __future__ import annotations

import io
import re
import tokenize
from collections.abc import Callable, Iterable

from latchwatch.analyzers.model.findings import Finding
from latchwatch.analyzers.model.run_outcome import is_layout_file

MARKER = re.compile(r"#\s*latchwatch:\s*ignore(?:\[(?P<rules>[^\]]*)\])?\s*\Z")

Suppressions = dict[int, "frozenset[str] | None"]


def _comments(text: str) -> Iterable[tuple[int, int, str]]:
    """(line, column, text) of every comment. A source that stops tokenizing (an
    unclosed bracket while the user types) keeps the comments before that point."""
    tokens = tokenize.generate_tokens(io.StringIO(text).readline)
    try:
        for token in tokens:
            if token.type == tokenize.COMMENT:
                yield token.start[0], token.start[1], token.string
    except (tokenize.TokenError, SyntaxError):
        return


def _parse_rules(listed: str | None) -> frozenset[str] | None:
    if listed is None:
        return None
    return frozenset(rule.strip() for rule in listed.split(",") if rule.strip())


def suppressions_in_source(text: str) -> Suppressions:
    """Line (1-based) -> the rule ids suppressed there, or None for every rule."""
    found: Suppressions = {}
    for line, _column, comment in _comments(text):
        match = MARKER.search(comment)
        if match is None:
            continue
        rules = _parse_rules(match.group("rules"))
        if rules is None or rules:  # an empty "ignore[]" names no rule
            found[line] = rules
    return found


def _suppressed_at(table: Suppressions, first: int, last: int, rule: str) -> bool:
    for line in range(first, last + 1):
        if line in table and (table[line] is None or rule in table[line]):
            return True
    return False


def apply_suppressions(
    findings: Iterable[Finding], read_source: Callable[[str], str | None]
) -> list[Finding]:
    """The findings not suppressed by a comment on any line of their stack (or on the
    anchor line when there is no stack). A frame spanning several lines (a call
    written over several lines) is suppressed by a comment on any of them."""
    tables: dict[str, Suppressions] = {}

    def table_for(file: str) -> Suppressions:
        if file not in tables:
            # Comments live in Python source; a layout file is never read for them.
            text = None if is_layout_file(file) else read_source(file)
            tables[file] = suppressions_in_source(text) if text is not None else {}
        return tables[file]

    kept = []
    for finding in findings:
        spans = [(f.file, f.line, f.end_line) for f in finding.stack]
        if finding.file is not None and finding.line is not None:
            spans.append((finding.file, finding.line, finding.end_line))
        if not any(
            _suppressed_at(table_for(file), line, max(line, end or line), finding.rule)
            for file, line, end in spans
        ):
            kept.append(finding)
    return kept


def add_suppression(line_text: str, rule: str | None) -> str:
    """``line_text`` with the suppression comment for ``rule`` (None: every rule),
    merged into an existing marker or appended. The line ending is kept.

    One line cannot be tokenized reliably on its own (it may sit inside an open
    bracket), so the marker is looked for directly: text ending a line that reads as
    the marker is a comment unless the line is inside a multi-line string, where the
    editor offers no fix anyway (no shape is drawn from there)."""
    body = line_text.rstrip("\r\n")
    ending = line_text[len(body):]
    code = body.rstrip()
    match = MARKER.search(body)
    if match is not None:
        existing = _parse_rules(match.group("rules"))
        if existing is None or rule in existing:
            return line_text  # a bare ignore, or the rule already listed
        written = [r.strip() for r in match.group("rules").split(",") if r.strip()]
        rules = None if rule is None else written + [rule]
        return body[: match.start()] + _marker(rules) + ending
    if code.endswith("\\"):
        raise ValueError("cannot add a comment to a line continued with a backslash")
    return f"{code}  {_marker(None if rule is None else [rule])}{ending}"


def _marker(rules: list[str] | None) -> str:
    return "# latchwatch: ignore" if rules is None else f"# latchwatch: ignore[{', '.join(rules)}]"
