"""The shapes of a layer role, drawn or derived (analyzers/technology/derived.py).

Every derived piece keeps the flat index of the drawn shape it was cut from, so that
findings on derived layers still land on the line that drew them: ``a and b`` and
``a not b`` keep the parts of a's shapes inside or outside the union of b; ``a or b``
is both sides' pieces; ``grow`` buffers each piece; ``shrink`` shrinks united pieces
(shrinking pieces one by one would open the seams between them) and gives each part the
drawn shape that drew most of it. Corners are kept square (mitred), as layout
sizing operations keep them.
"""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.layout import geometry as g
from latchwatch.analyzers.layout.flatten import FlatLayout
from latchwatch.analyzers.technology import derived as d
from latchwatch.analyzers.technology.model import Technology

Shapes = tuple[np.ndarray, np.ndarray]  # (polygons, flat shape index of each)


def layer_shapes(flat: FlatLayout, tech: Technology, role: str) -> Shapes:
    """The polygons of ``role`` in ``flat`` and the flat shape each came from (empty when
    the technology does not name the role). Derived roles are computed once per layout."""
    pair = tech.layer(role)
    if pair is not None:
        return _drawn(flat, pair)
    expr = tech.derived.get(role)
    if expr is None:
        return np.empty(0, dtype=object), np.zeros(0, np.int64)
    key = ("derived", tech.name, tech.source, role)
    if key not in flat.cache:
        flat.cache[key] = _evaluate(flat, tech, expr)
    return flat.cache[key]


def _drawn(flat: FlatLayout, pair: tuple[int, int]) -> Shapes:
    idx = flat.on_layer(pair)
    return flat.polygons_at(idx), idx


def _evaluate(flat: FlatLayout, tech: Technology, expr: d.Expr) -> Shapes:
    if isinstance(expr, d.Ref):
        return layer_shapes(flat, tech, expr.name)
    if isinstance(expr, d.Pair):
        return _drawn(flat, (expr.layer, expr.datatype))
    if isinstance(expr, d.Sized):
        return _sized(*_evaluate(flat, tech, expr.operand), expr.kind, expr.distance)
    (a, a_idx), (b, b_idx) = _evaluate(flat, tech, expr.left), _evaluate(flat, tech, expr.right)
    if expr.kind == "or":
        return np.concatenate([a, b]), np.concatenate([a_idx, b_idx])
    if len(a) == 0:
        return a, a_idx
    if expr.kind == "and":
        if len(b) == 0:
            return np.empty(0, dtype=object), np.zeros(0, np.int64)
        parts, owner = g.clip_to_union(a, b)
    else:  # "not"
        if len(b) == 0:
            return a, a_idx
        parts, owner = g.clip_outside(a, b)
    return parts, a_idx[owner]


def _sized(geoms: np.ndarray, idx: np.ndarray, kind: str, distance: float) -> Shapes:
    if len(geoms) == 0 or distance == 0:
        return geoms, idx
    if kind == "grow":
        return shapely.buffer(geoms, distance, join_style="mitre"), idx
    label = g.components(geoms, touching=True)
    united = g.union_groups(geoms, label, int(label.max()) + 1)
    shrunk, owner = g.explode(shapely.buffer(united, -distance, join_style="mitre"), np.arange(len(united)))
    order, starts = g.largest_first_by_group(geoms, label, np.arange(len(geoms)))
    return shrunk, idx[order[starts]][owner]
