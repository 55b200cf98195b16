"""The technology model (docs/technology.md): layer roles, connectivity, nets, rule limits
and electrical parameters, validated from an already-parsed mapping.

Reading TOML files and resolving ``extends`` belong to latchwatch.server.config.techfiles;
this module only checks and converts a mapping, so every error it raises names
the file it was told the mapping came from, the full dotted key and what was
expected.
"""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from types import MappingProxyType
from typing import Any

from latchwatch.analyzers.electrical.mobility import MAX_DOPING, MIN_DOPING, UM_PER_CM, sheet_resistance
from latchwatch.analyzers.technology import derived as derived_layers
from latchwatch.analyzers.technology.rule_tables import RELAXED_MARKER, SpacingLimit, check_rules, plain_rules

REQUIRED_LAYERS = ("nwell", "active", "poly", "nplus", "pplus", "contact")
OPTIONAL_LAYERS = ("metal1", "via1", "metal2", "pwell", "deep_nwell", "tap", "io_marker", RELAXED_MARKER)
_METAL = re.compile(r"metal[1-9][0-9]*")
_VIA = re.compile(r"via[1-9][0-9]*")
_LAYER_ROLES_TEXT = ", ".join(REQUIRED_LAYERS + OPTIONAL_LAYERS) + ", metalN or viaN"
_PAIR_TEXT = "a [gds_layer, datatype] pair of two non-negative integers"

TOP_LEVEL_KEYS = (
    "name", "description", "extends", "layers", "labels", "connectivity", "nets", "rules",
    "electrical",
)
NET_KEYS = ("power", "ground", "pads")


def is_cut_role(role: str) -> bool:
    """True for layer roles that connect conductors: contact and viaN."""
    return role == "contact" or _VIA.fullmatch(role) is not None


def is_conductor_role(role: str) -> bool:
    """True for layer roles that carry current: active, tap, poly and metalN."""
    return role in ("active", "tap", "poly") or _METAL.fullmatch(role) is not None


def _is_layer_role(role: str) -> bool:
    return role in REQUIRED_LAYERS or role in OPTIONAL_LAYERS or is_cut_role(role) or (
        is_conductor_role(role))


class TechnologyError(Exception):
    """A technology file that cannot be used, with where and why.

    ``str(e)`` is ``f"{file}: {key}: expected {expected}, got {got!r}"``; ``key`` is
    empty for whole-file problems, ``line``/``column`` are set for TOML syntax
    errors, and unknown keys add a did-you-mean.
    """

    def __init__(self, file: str, key: str, expected: str, got: Any = None, *,
                 got_text: str | None = None, suggestion: str | None = None,
                 line: int | None = None, column: int | None = None):
        self.file = file
        self.key = key
        self.expected = expected
        self.got = got
        self.got_text = got_text
        self.suggestion = suggestion
        self.line = line
        self.column = column
        super().__init__(str(self))

    def __str__(self) -> str:
        where = self.file if self.line is None else f"{self.file}:{self.line}:{self.column}"
        head = f"{where}: {self.key}: " if self.key else f"{where}: "
        got = self.got_text if self.got_text is not None else _show(self.got)
        text = f"{head}expected {self.expected}, got {got}"
        if self.suggestion:
            text += f"; did you mean {self.suggestion!r}?"
        return text


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


@dataclass(frozen=True)
class Electrical:
    """Parameters of the physics estimate; unset sheet values mean "not known"."""

    vbe_on: float = 0.7  # V; common practice in latch-up work (docs/physics.md)
    nwell_sheet: float | None = None  # ohm/sq
    psub_sheet: float | None = None  # ohm/sq, the substrate treated as a sheet
    injection_current: float = 0.1  # A a pad-connected device must withstand
    pwell_sheet: float | None = None  # ohm/sq, e.g. a p-well isolated by a deep n-well
    deep_nwell_sheet: float | None = None  # ohm/sq
    psub_resistivity: float | None = None  # ohm cm, bulk substrate
    # A a core (not pad-connected) device must withstand; no standard sets it, see the
    # shunt-resistance rule's documentation for how the default was chosen.
    core_current: float = 1e-4
    sheet_grid: float | None = None  # um, largest cell of the sheet model's grid; None: adaptive
    # Doping (cm^-3) and depth (um) of a uniformly doped layer: the sheet resistance then
    # follows from the Masetti mobility model (analyzers/electrical/mobility.py) when *_sheet is unset.
    nwell_doping: float | None = None
    nwell_depth: float | None = None
    pwell_doping: float | None = None
    pwell_depth: float | None = None
    psub_doping: float | None = None
    psub_depth: float | None = None  # also turns psub_resistivity into a sheet
    # The trigger analysis (analyzers/electrical/carriers.py holds the defaults and their sources).
    electron_diffusion_length: float | None = None  # um, electrons in the p-body
    hole_diffusion_length: float | None = None  # um, holes in an n-well
    electron_lifetime: float | None = None  # s; with the doping gives the length when it is unset
    hole_lifetime: float | None = None  # s
    temperature: float = 25.0  # C, at which vbe_on, the sheets and the lengths apply

    def sheet(self, body: str) -> float | None:
        """Sheet resistance (ohm/sq) of "nwell", "pwell" or "psub": the given sheet value,
        else resistivity from doping (or psub_resistivity) over the depth, else None."""
        given = getattr(self, f"{body}_sheet")
        if given is not None:
            return given
        doping, depth = getattr(self, f"{body}_doping"), getattr(self, f"{body}_depth")
        if depth is None:
            return None
        if doping is not None:
            return sheet_resistance(doping, depth, "n" if body == "nwell" else "p")
        if body == "psub" and self.psub_resistivity is not None:
            return self.psub_resistivity / (depth / UM_PER_CM)
        return None


ELECTRICAL_KEYS = tuple(f.name for f in fields(Electrical))
# The unit of each [electrical] key, as shown to users.
ELECTRICAL_UNITS = {
    "vbe_on": "V", "nwell_sheet": "ohm/sq", "psub_sheet": "ohm/sq", "injection_current": "A",
    "pwell_sheet": "ohm/sq", "deep_nwell_sheet": "ohm/sq", "psub_resistivity": "ohm cm", "core_current": "A",
    "sheet_grid": "um", "nwell_doping": "cm^-3", "nwell_depth": "um", "pwell_doping": "cm^-3", "pwell_depth": "um",
    "psub_doping": "cm^-3", "psub_depth": "um", "electron_diffusion_length": "um",
    "hole_diffusion_length": "um", "electron_lifetime": "s", "hole_lifetime": "s", "temperature": "C",
}


@dataclass(frozen=True)
class Technology:
    """A validated technology: layers, labels, connectivity, nets, rule values and electrical values."""
    name: str
    description: str
    source: str  # file path or "built-in NAME"
    layers: Mapping[str, tuple[int, int]]
    labels: Mapping[str, tuple[tuple[int, int], ...]]  # per conductor role, its text layers
    connectivity: tuple[tuple[str, str, str], ...]
    power: tuple[str, ...]
    ground: tuple[str, ...]
    pads: tuple[str, ...]
    rules: Mapping[str, Mapping[str, object]]
    electrical: Electrical
    # Roles given as expressions (analyzers/technology/derived.py).
    derived: Mapping[str, derived_layers.Expr] = field(default_factory=lambda: MappingProxyType({}))

    def __hash__(self) -> int:  # the mapping fields are unhashable; equal ones share these
        return hash((self.name, self.source))

    def layer(self, role: str) -> tuple[int, int] | None:
        """The drawn GDS layer of a role (None for a derived or absent one)."""
        return self.layers.get(role)

    def has_layer(self, role: str) -> bool:
        """The technology names this role, drawn or derived."""
        return role in self.layers or role in self.derived

    def has_spacing_table(self) -> bool:
        return bool(self.rules.get("tap-distance", {}).get("by_spacing"))

    def tap_distance_limit(self, kind: str, spacing: float | None = None) -> float | None:
        """Largest allowed distance (um) from a device diffusion to a tap of its body.

        ``kind`` is "n" (N+ device diffusion in the p-body) or "p" (P+ device
        diffusion in an n-well); ``spacing`` is the distance to the opposite well, or
        None when none lies within range. A ``by_spacing`` row wins when the spacing
        is known (rows are kept by descending ``min_spacing``, so the first row the
        spacing reaches applies); otherwise ``limit_n``/``limit_p``, then ``limit``.
        A technology with only a table treats "no opposite well in range" as its
        widest row, and a spacing below every row gets the table's strictest limit.
        """
        if kind not in ("n", "p"):
            raise ValueError(f"kind: expected 'n' or 'p', got {kind!r}")
        table = self.rules.get("tap-distance", {})
        rows: tuple[SpacingLimit, ...] = table.get("by_spacing", ())
        if rows and spacing is not None:
            for row in rows:
                if spacing >= row.min_spacing:
                    return row.limit
        plain = table.get(f"limit_{kind}", table.get("limit"))
        if plain is not None:
            return plain
        if rows:
            return rows[0].limit if spacing is None else min(row.limit for row in rows)
        return None

    def to_mapping(self) -> dict:
        """The technology as a plain mapping of file keys (what ``extends`` merges onto)."""
        data: dict[str, Any] = {
            "name": self.name,
            "description": self.description,
            "layers": {**{role: list(pair) for role, pair in self.layers.items()},
                       **{role: derived_layers.unparse(expr) for role, expr in self.derived.items()}},
            "labels": {role: [list(pair) for pair in pairs] for role, pairs in self.labels.items()},
            "connectivity": {"stack": [list(link) for link in self.connectivity]},
            "nets": {"power": list(self.power), "ground": list(self.ground),
                     "pads": list(self.pads)},
            "rules": plain_rules(self.rules),
            "electrical": {k: getattr(self.electrical, k) for k in ELECTRICAL_KEYS
                           if getattr(self.electrical, k) is not None},
        }
        return data


def technology_from_mapping(data: dict, source: str, base: Technology | None = None
                            ) -> Technology:
    """Validate a parsed technology file; with ``base`` (the technology named by
    ``extends``) the file's keys override the base's, tables merging key by key."""
    check = _Checker(source)
    data = check.table(data, "")
    check.known_keys(data, "", TOP_LEVEL_KEYS)
    if "extends" in data:
        check.string(data["extends"], "extends", "a built-in technology name or a path")
        if base is None:
            raise TechnologyError(source, "extends", "the technology it names to be resolved "
                                  "by the file loader (base=)", data["extends"])
    if base is not None:
        data = _merge(base.to_mapping(), data)
        data.pop("extends", None)

    name = check.string(data.get("name"), "name", "a non-empty technology name")
    description = data.get("description", "")
    if not isinstance(description, str):
        raise TechnologyError(source, "description", "a string", description)

    layers = check.layers(data.get("layers"))
    derived = check.derived_roles(data.get("layers"), layers)
    roles = {**layers, **derived}  # what labels and connectivity may name
    labels = check.labels(data.get("labels", {}), roles)
    connectivity = check.connectivity(data.get("connectivity", {}), roles)
    nets = check.table(data.get("nets", {}), "nets")
    check.known_keys(nets, "nets", NET_KEYS)
    patterns = {k: check.strings(nets.get(k, []), f"nets.{k}") for k in NET_KEYS}
    rules = {rule_id: MappingProxyType(table)
             for rule_id, table in check_rules(check, data.get("rules", {}), roles).items()}
    electrical = check.electrical(data.get("electrical", {}))
    return Technology(
        name=name, description=description, source=source,
        layers=MappingProxyType(layers), labels=MappingProxyType(labels),
        connectivity=connectivity,
        power=patterns["power"], ground=patterns["ground"], pads=patterns["pads"],
        rules=MappingProxyType(rules), electrical=electrical, derived=MappingProxyType(derived),
    )


def _merge(base: dict, override: dict) -> dict:
    merged = dict(base)
    for key, value in override.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict):
            merged[key] = _merge(merged[key], value)
        else:
            merged[key] = value
    return merged


def _dotted(prefix: str, key: str) -> str:
    return f"{prefix}.{key}" if prefix else key


class _Checker:
    """Type checks that name ``file`` and the dotted key in every error."""

    def __init__(self, file: str):
        self.file = file

    def fail(self, key: str, expected: str, got: Any, **extra) -> TechnologyError:
        return TechnologyError(self.file, key, expected, got, **extra)

    def table(self, value: Any, key: str) -> dict:
        if not isinstance(value, dict):
            raise self.fail(key or "(file)", "a table", value)
        return value

    def known_keys(self, table: dict, prefix: str, allowed, is_allowed=None,
                   expected: str | None = None) -> None:
        for key in table:
            if key in allowed or (is_allowed is not None and is_allowed(key)):
                continue
            close = difflib.get_close_matches(str(key), list(allowed), n=1)
            raise self.fail(_dotted(prefix, str(key)), expected or "one of " + ", ".join(allowed),
                            key, got_text=f"the unknown key {key!r}",
                            suggestion=close[0] if close else None)

    def required(self, table: dict, prefix: str, key: str, expected: str) -> Any:
        if key not in table:
            raise self.fail(_dotted(prefix, key), expected, None,
                            got_text="nothing")
        return table[key]

    def string(self, value: Any, key: str, expected: str) -> str:
        if value is None:
            raise self.fail(key, expected, None, got_text="nothing")
        if not isinstance(value, str) or not value.strip():
            raise self.fail(key, expected, value)
        return value

    def strings(self, value: Any, key: str) -> tuple[str, ...]:
        expected = "a list of non-empty glob patterns"
        if not isinstance(value, list):
            raise self.fail(key, expected, value)
        for i, item in enumerate(value):
            if not isinstance(item, str) or not item:
                raise self.fail(f"{key}[{i}]", "a non-empty glob pattern", item)
        return tuple(value)

    def number(self, value: Any, key: str, *, allow_zero: bool = False) -> float:
        expected = "a non-negative number" if allow_zero else "a positive number"
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if not ok or not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
            raise self.fail(key, expected, value)
        return float(value)

    def celsius(self, value: Any, key: str) -> float:
        ok = isinstance(value, (int, float)) and not isinstance(value, bool) and -273.15 < value <= 400
        if not ok:
            raise self.fail(key, "a temperature in degrees Celsius above -273.15 and up to 400", value)
        return float(value)

    def pair(self, value: Any, key: str) -> tuple[int, int]:
        ok = (isinstance(value, list) and len(value) == 2
              and all(isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in value))
        if not ok:
            raise self.fail(key, _PAIR_TEXT, value)
        return (value[0], value[1])

    def declared_role(self, role: Any, key: str, layers: dict, expected: str) -> str:
        if not isinstance(role, str) or role not in layers:
            close = difflib.get_close_matches(str(role), list(layers), n=1)
            raise self.fail(key, f"{expected} declared in [layers] ({', '.join(layers)})",
                            role, suggestion=close[0] if close else None)
        return role

    def layers(self, value: Any) -> dict[str, tuple[int, int]]:
        if value is None:
            raise self.fail("layers", "a [layers] table with "
                            + ", ".join(REQUIRED_LAYERS), None, got_text="nothing")
        table = self.table(value, "layers")
        self.known_keys(table, "layers", REQUIRED_LAYERS + OPTIONAL_LAYERS
                        + ("metal3", "via2", "metal4", "via3"), _is_layer_role,
                        "a layer role: " + _LAYER_ROLES_TEXT)
        for role in REQUIRED_LAYERS:
            self.required(table, "layers", role, _PAIR_TEXT + " (a required role)")
        layers: dict[str, tuple[int, int]] = {}
        owner: dict[tuple[int, int], str] = {}
        for role, raw in table.items():
            if isinstance(raw, str):
                continue  # a derived role: derived_roles() reads it
            pair = self.pair(raw, f"layers.{role}")
            if pair in owner:
                raise self.fail(f"layers.{role}", f"a layer pair not already given to "
                                f"layers.{owner[pair]}", raw)
            owner[pair] = role
            layers[role] = pair
        return layers

    def derived_roles(self, value: Any, layers: dict) -> dict[str, derived_layers.Expr]:
        """The [layers] roles given as expressions: each parses, names only roles of
        [layers] (or L/D pairs), and no role is derived from itself."""
        table = {role: raw for role, raw in self.table(value, "layers").items() if isinstance(raw, str)}
        derived: dict[str, derived_layers.Expr] = {}
        for role, text in table.items():
            try:
                derived[role] = derived_layers.parse(text, f"layers.{role}")
            except derived_layers.ExpressionError as e:
                raise self.fail(e.key, f"{e.expected} at character {e.position + 1}", text) from None
        known = list(layers) + list(derived)
        for role, expr in derived.items():
            for name in sorted(derived_layers.references(expr)):
                if name not in known:
                    close = difflib.get_close_matches(name, known, n=1)
                    raise self.fail(f"layers.{role}", f"roles of [layers] in the expression ({', '.join(known)})",
                                    name, suggestion=close[0] if close else None)
        for role in derived:
            self._no_cycle(derived, [role])
        return derived

    def _no_cycle(self, derived: dict, path: list[str]) -> None:
        """A depth-first walk from path[0]; meeting a role already on the path is a cycle."""
        for ref in sorted(derived_layers.references(derived[path[-1]])):
            if ref in path:
                raise self.fail(f"layers.{path[0]}", "an expression that does not depend on itself",
                                None, got_text=" -> ".join([*path, ref]))
            if ref in derived:
                self._no_cycle(derived, [*path, ref])

    def labels(self, value: Any, layers: dict) -> dict[str, tuple[tuple[int, int], ...]]:
        table = self.table(value, "labels")
        labels = {}
        for role, raw in table.items():
            key = f"labels.{role}"
            kind = "a conductor role (active, tap, poly or metalN)"
            self.declared_role(role, key, layers, kind)
            if not is_conductor_role(role):
                raise self.fail(key, kind, role)
            # One text layer, or several (a label purpose and a pin purpose, say).
            many = isinstance(raw, list) and bool(raw) and all(isinstance(item, list) for item in raw)
            labels[role] = (tuple(self.pair(item, f"{key}[{i}]") for i, item in enumerate(raw)) if many
                            else (self.pair(raw, key),))
        return labels

    def connectivity(self, value: Any, layers: dict) -> tuple[tuple[str, str, str], ...]:
        table = self.table(value, "connectivity")
        self.known_keys(table, "connectivity", ("stack",))
        stack = table.get("stack", [])
        shape = "a list of [lower, cut, upper] role triples"
        if not isinstance(stack, list):
            raise self.fail("connectivity.stack", shape, stack)
        links = []
        for i, link in enumerate(stack):
            key = f"connectivity.stack[{i}]"
            if not isinstance(link, list) or len(link) != 3:
                raise self.fail(key, "a [lower, cut, upper] triple of layer roles", link)
            for j, role in enumerate(link):
                cut = j == 1
                kind = ("a cut role (contact or viaN)" if cut
                        else "a conductor role (active, tap, poly or metalN)")
                self.declared_role(role, f"{key}[{j}]", layers, kind)
                if not (is_cut_role(role) if cut else is_conductor_role(role)):
                    raise self.fail(f"{key}[{j}]", kind, role)
            links.append(tuple(link))
        return tuple(links)

    def electrical(self, value: Any) -> Electrical:
        table = self.table(value, "electrical")
        self.known_keys(table, "electrical", ELECTRICAL_KEYS)
        values = {k: self.celsius(v, f"electrical.{k}") if k == "temperature" else self.number(v, f"electrical.{k}")
                  for k, v in table.items()}
        for body in ("nwell", "pwell", "psub"):
            doping, depth = f"{body}_doping", f"{body}_depth"
            if doping in values and not MIN_DOPING <= values[doping] <= MAX_DOPING:
                raise self.fail(f"electrical.{doping}", f"a doping in cm^-3 from {MIN_DOPING:.0e} to "
                                f"{MAX_DOPING:.0e} (the range of the Masetti mobility model)", table[doping])
            if doping in values and depth not in values:
                raise self.fail(f"electrical.{depth}", f"the depth in um of the layer that "
                                f"electrical.{doping} describes", None, got_text="nothing")
            partner = doping in values or (body == "psub" and "psub_resistivity" in values)
            if depth in values and not partner:
                wanted = f"electrical.{doping}" + (" or electrical.psub_resistivity" if body == "psub" else "")
                raise self.fail(f"electrical.{doping}", f"{wanted} beside electrical.{depth}", None,
                                got_text="nothing")
        return Electrical(**values)
