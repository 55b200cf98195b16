"""Technology files on disk: reading TOML, resolving ``extends``, the built-in
presets, and the ``latchwatch tech list | show | check`` commands (docs/command-line.md, docs/technology.md).

Validation itself is latchwatch.analyzers.technology; this module only finds and
parses files and turns every problem into a TechnologyError naming the file.
"""

from __future__ import annotations

import difflib
import re
import sys
from importlib import resources
from pathlib import Path

from latchwatch.analyzers.technology.derived import unparse
from latchwatch.analyzers.technology.model import (
    ELECTRICAL_UNITS,
    Electrical,
    Technology,
    TechnologyError,
    technology_from_mapping,
)
from latchwatch.analyzers.technology.rule_tables import RELAXED_MARKER, NearPadLimit, RelaxedArea

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on 3.10 only
    import tomli as tomllib

_PRESETS = resources.files("latchwatch.server.config") / "technologies"
_TOML_POSITION = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")


def builtin_names() -> list[str]:
    """Names of the built-in technologies."""
    return sorted(p.name[: -len(".toml")] for p in _PRESETS.iterdir()
                  if p.name.endswith(".toml"))


def load_technology(name_or_path: str, base_dir: Path | None = None) -> Technology:
    """A built-in technology by name, or a technology file (relative to ``base_dir``,
    default the working directory), with its ``extends`` chain resolved."""
    return _load(name_or_path, base_dir, referrer=None, chain=())


def _load(ref: str, base_dir: Path | None, referrer: str | None,
          chain: tuple[tuple[object, str], ...]) -> Technology:
    source, identity, path = _locate(ref, base_dir, referrer)
    if any(identity == seen for seen, _ in chain):
        cycle = " -> ".join([label for _, label in chain] + [source])
        raise TechnologyError(chain[-1][1], "extends", "a chain of extends without a cycle",
                              got_text=repr(cycle))
    raw = (_PRESETS / f"{ref}.toml").read_bytes() if path is None else _read(path, source)
    data = _parse(raw, source)
    base = None
    if "extends" in data:
        parent = data["extends"]
        if not isinstance(parent, str) or not parent:
            raise TechnologyError(source, "extends", "a built-in technology name or a path "
                                  "to a .toml file", parent)
        here = path.parent if path is not None else base_dir
        base = _load(parent, here, referrer=source, chain=chain + ((identity, source),))
    return technology_from_mapping(data, source, base)


def _locate(ref: str, base_dir: Path | None, referrer: str | None
            ) -> tuple[str, object, Path | None]:
    """(source label, identity for cycle checks, file path or None for a built-in)."""
    names = builtin_names()
    if ref in names:
        return f"built-in {ref}", ("built-in", ref), None
    path = Path(ref)
    if not path.is_absolute() and base_dir is not None:
        path = base_dir / path
    if path.is_file():
        return str(path), path.resolve(), path
    expected = f"a built-in technology ({', '.join(names)}) or an existing technology file"
    close = difflib.get_close_matches(ref, names, n=1)
    if referrer is not None:
        raise TechnologyError(referrer, "extends", expected, ref,
                              got_text=f"{ref!r} (no such file: {path})",
                              suggestion=close[0] if close else None)
    raise TechnologyError(str(path), "", expected, got_text="no such file",
                          suggestion=close[0] if close else None)


def _read(path: Path, source: str) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise TechnologyError(source, "", "a readable technology file",
                              got_text=exc.strerror or str(exc)) from None


def _parse(raw: bytes, source: str) -> dict:
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise TechnologyError(source, "", "a UTF-8 encoded TOML file",
                              got_text=f"an undecodable byte at offset {exc.start}") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        reason, line, column = _syntax_error(exc, text)
        raise TechnologyError(source, "", "valid TOML", got_text=f"a syntax error: {reason}",
                              line=line, column=column) from None


def _syntax_error(exc: Exception, text: str) -> tuple[str, int, int]:
    message = str(exc.args[0]) if exc.args else str(exc)
    found = _TOML_POSITION.search(message)
    if found:
        return message[: found.start()], int(found.group(1)), int(found.group(2))
    # "(at end of document)": point just past the last character.
    reason = message.replace("(at end of document)", "").strip()
    lines = text.rstrip("\n").split("\n")
    return reason or "unexpected end of file", len(lines), len(lines[-1]) + 1


def describe_technology(tech: Technology) -> str:
    """The resolved technology as readable text (for ``latchwatch tech show``)."""
    out = [f"{tech.name}: {tech.description}" if tech.description else tech.name,
           f"source: {tech.source}", "", "layers (role: gds layer/datatype)"]
    out += [f"  {role:<11} {pair[0]}/{pair[1]}" for role, pair in tech.layers.items()]
    out += [f"  {role:<11} = {unparse(expr)}" for role, expr in tech.derived.items()]
    if tech.labels:
        out += ["", "labels (conductor: text layer/texttype)"]
        out += [f"  {role:<11} " + ", ".join(f"{layer}/{texttype}" for layer, texttype in pairs)
                for role, pairs in tech.labels.items()]
    if tech.connectivity:
        out += ["", "connectivity (lower, cut, upper)"]
        out += [f"  {lower} - {cut} - {upper}" for lower, cut, upper in tech.connectivity]
    nets = [(kind, patterns) for kind, patterns in
            (("power", tech.power), ("ground", tech.ground), ("pads", tech.pads)) if patterns]
    if nets:
        out += ["", "nets"] + [f"  {kind:<11} {', '.join(p)}" for kind, p in nets]
    out += ["", "rules"]
    if not tech.rules:
        out.append("  (no rule limits set)")
    for rule_id, table in tech.rules.items():
        out.append(f"  {rule_id}")
        for key, value in table.items():
            if key == "by_spacing":
                out.append("    by_spacing (well-to-diffusion spacing: limit)")
                out += [f"      >= {row.min_spacing:.2f} um: {row.limit:.2f} um" for row in value]
            elif isinstance(value, NearPadLimit):
                other = "N+" if key == "near_pad_p" else "P+"
                out.append(f"    {key:<10} {value.limit:.2f} um within {value.within:.2f} um of pad-connected {other}")
            elif isinstance(value, RelaxedArea):
                out.append(f"    {key:<10} {value.limit:.2f} um in the {RELAXED_MARKER} area, "
                           f"{value.pad_clearance:.2f} um or more from pad-connected diffusion")
            elif isinstance(value, bool):
                out.append(f"    {key:<10} {'yes' if value else 'no'}")
            elif isinstance(value, str):  # double = "ndiff" or "pdiff"
                out.append(f"    {key:<10} {value} only")
            else:
                out.append(f"    {key:<10} {value:.2f} um")
    out += ["", "electrical"]
    defaults = vars(Electrical())
    for key, value in vars(tech.electrical).items():
        shown = "not set" if value is None else f"{value:.3g} {ELECTRICAL_UNITS[key]}"
        if value is not None and value == defaults[key]:
            shown += " (the default)"
        out.append(f"  {key:<18} {shown}")
    return "\n".join(out) + "\n"


def tech_list_command(out) -> int:
    """`latchwatch tech list`: each built-in technology with its description."""
    for name in builtin_names():
        out.write(f"{name:<10} {load_technology(name).description}\n")
    return 0


def tech_show_command(name: str, out, err=None) -> int:
    """`latchwatch tech show NAME`: one technology, resolved, with its units."""
    try:
        tech = load_technology(name)
    except TechnologyError as exc:
        (err or sys.stderr).write(f"{exc}\n")
        return 2
    out.write(describe_technology(tech))
    return 0


def tech_check_command(path: str, out, err) -> int:
    """`latchwatch tech check FILE`: validate a technology file; exit 2 naming the key on an error."""
    try:
        tech = load_technology(path)
    except TechnologyError as exc:
        err.write(f"{exc}\n")
        return 2
    out.write(f"{tech.source}: ok: technology {tech.name!r}, {len(tech.layers)} layers, "
              f"{len(tech.rules)} rule tables\n")
    return 0
