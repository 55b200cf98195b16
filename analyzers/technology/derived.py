"""Derived layers: a layer role given as a boolean expression over drawn layers.

In a technology file a role is either drawn, ``nwell = [31, 0]``, or derived from other
roles, ``nplus = "active not pplus"``. The expression language:

    expr   := term ("or" term)*
    term   := factor (("and" | "not") factor)*      a not b: the parts of a outside b
    factor := ROLE | L/D | "(" expr ")"
            | "grow" "(" expr "," DISTANCE ")" | "shrink" "(" expr "," DISTANCE ")"

ROLE is another role of [layers] (drawn or derived), ``L/D`` a GDS layer and datatype
that need no role (``81/14``), DISTANCE a non-negative number in layout units (um).
``and`` and ``not`` bind tighter than ``or``; both are left-associative.

>>> parse("active not pplus", "layers.nplus")
Op(kind='not', left=Ref(name='active'), right=Ref(name='pplus'))
>>> parse("grow(7/0, 0.5) or tap", "layers.x")
Op(kind='or', left=Sized(kind='grow', operand=Pair(layer=7, datatype=0), distance=0.5), right=Ref(name='tap'))
"""

from __future__ import annotations

import re
from dataclasses import dataclass


@dataclass(frozen=True)
class Ref:
    """Another role of the technology."""
    name: str


@dataclass(frozen=True)
class Pair:
    """A drawn GDS layer/datatype named in the expression itself."""
    layer: int
    datatype: int


@dataclass(frozen=True)
class Op:
    """``left and right``, ``left or right`` or ``left not right``."""
    kind: str
    left: Expr
    right: Expr


@dataclass(frozen=True)
class Sized:
    """``grow(operand, distance)`` or ``shrink(operand, distance)``."""
    kind: str
    operand: Expr
    distance: float


Expr = Ref | Pair | Op | Sized


class ExpressionError(ValueError):
    """A derived-layer expression that cannot be read: what was expected, and at which character."""

    def __init__(self, key: str, text: str, position: int, expected: str):
        self.key, self.text, self.position, self.expected = key, text, position, expected
        found = text[position:].split(" ")[0] or "the end"
        super().__init__(f"{key}: expected {expected} at character {position + 1} of {text!r}, got {found!r}")


_TOKEN = re.compile(r"\s*(?:(?P<pair>\d+/\d+)|(?P<number>\d+(?:\.\d*)?|\.\d+)|(?P<word>[A-Za-z_][A-Za-z0-9_]*)"
                    r"|(?P<punct>[(),]))")
_KEYWORDS = {"and", "or", "not", "grow", "shrink"}


def _tokens(text: str, key: str) -> list[tuple[str, str, int]]:
    out, pos = [], 0
    while pos < len(text):
        if text[pos:].strip() == "":
            break
        match = _TOKEN.match(text, pos)
        if not match:
            raise ExpressionError(key, text, pos + len(text[pos:]) - len(text[pos:].lstrip()),
                                  "a role, a L/D layer, a number, 'and', 'or', 'not', 'grow', 'shrink' or a bracket")
        kind = match.lastgroup
        value = match.group(kind)
        out.append((kind, value, match.start(kind)))
        pos = match.end()
    out.append(("end", "", len(text)))
    return out


class _Parser:
    def __init__(self, text: str, key: str):
        self.text, self.key = text, key
        self.tokens = _tokens(text, key)
        self.at = 0

    def peek(self):
        return self.tokens[self.at]

    def take(self, value: str | None = None, kind: str | None = None, expected: str = ""):
        token = self.peek()
        if (value is not None and token[1] != value) or (kind is not None and token[0] != kind):
            raise ExpressionError(self.key, self.text, token[2], expected or repr(value))
        self.at += 1
        return token

    def expr(self) -> Expr:
        left = self.term()
        while self.peek()[1] == "or":
            self.at += 1
            left = Op("or", left, self.term())
        return left

    def term(self) -> Expr:
        left = self.factor()
        while self.peek()[1] in ("and", "not"):
            kind = self.take()[1]
            left = Op(kind, left, self.factor())
        return left

    def factor(self) -> Expr:
        kind, value, position = self.peek()
        if kind == "pair":
            self.at += 1
            layer, datatype = (int(v) for v in value.split("/"))
            return Pair(layer, datatype)
        if kind == "word" and value in ("grow", "shrink"):
            self.at += 1
            self.take("(")
            operand = self.expr()
            self.take(",")
            distance = float(self.take(kind="number", expected="a distance in um")[1])
            self.take(")")
            return Sized(value, operand, distance)
        if kind == "word" and value not in _KEYWORDS:
            self.at += 1
            return Ref(value)
        if value == "(":
            self.at += 1
            inner = self.expr()
            self.take(")")
            return inner
        raise ExpressionError(self.key, self.text, position, "a role, a L/D layer, grow(...), shrink(...) or '('")


def parse(text: str, key: str) -> Expr:
    """The expression tree of ``text``; ``key`` names it in errors (``layers.nplus``)."""
    parser = _Parser(text, key)
    tree = parser.expr()
    parser.take(kind="end", expected="'and', 'or', 'not' or the end")
    return tree


def references(expr: Expr) -> set[str]:
    """The roles an expression names."""
    if isinstance(expr, Ref):
        return {expr.name}
    if isinstance(expr, Op):
        return references(expr.left) | references(expr.right)
    if isinstance(expr, Sized):
        return references(expr.operand)
    return set()


def pairs(expr: Expr) -> set[tuple[int, int]]:
    """The L/D layers an expression names directly."""
    if isinstance(expr, Pair):
        return {(expr.layer, expr.datatype)}
    if isinstance(expr, Op):
        return pairs(expr.left) | pairs(expr.right)
    if isinstance(expr, Sized):
        return pairs(expr.operand)
    return set()


def unparse(expr: Expr) -> str:
    """The expression as a technology file writes it (fully bracketed where it nests).

    >>> unparse(parse("a not (b or c)", "k")), unparse(parse("(a or b) and c not d", "k"))
    ('a not (b or c)', '(a or b) and c not d')
    """
    if isinstance(expr, Ref):
        return expr.name
    if isinstance(expr, Pair):
        return f"{expr.layer}/{expr.datatype}"
    if isinstance(expr, Sized):
        return f"{expr.kind}({unparse(expr.operand)}, {expr.distance:g})"

    # "or" binds loosest; the right side of "not" (and of a mixed chain) keeps its brackets.
    left_bracket = isinstance(expr.left, Op) and expr.left.kind == "or" and expr.kind != "or"
    right_bracket = isinstance(expr.right, Op) and not (expr.right.kind == expr.kind and expr.kind != "not")
    left, right = unparse(expr.left), unparse(expr.right)
    return f"{f'({left})' if left_bracket else left} {expr.kind} {f'({right})' if right_bracket else right}"
