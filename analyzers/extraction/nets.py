"""Net names, supply classes and pad-connected devices (docs/technology.md [labels], [nets]).

A label on a ``[labels]`` text layer names the net of the conductor of that role under
its origin (a point on the conductor's edge counts). Label text is matched against the
``power``, ``ground`` and ``pads`` glob patterns of ``[nets]`` with ``fnmatchcase``
(case-sensitive, as label text is). A net that carries two different supply names
(VDD and VSS, or VDD and VDD2) is a short between supplies; ``conflicts`` lists them.

A device diffusion is pad-connected when one of its terminals is on a net whose name
matches ``pads``, or when it shares area with the ``io_marker`` layer.

When the layout has no label on a ``[labels]`` layer, every net is unnamed and no rule
can use one: the conductor graph is then not built at all (nets cost nothing there).
"""

from __future__ import annotations

from dataclasses import dataclass
from fnmatch import fnmatchcase

import numpy as np
import shapely

from latchwatch.analyzers.extraction.connectivity import NDIFF, PDIFF, Connectivity, connect
from latchwatch.analyzers.extraction.layers import layer_shapes
from latchwatch.analyzers.layout import geometry as g

DEVICE_CODES = {"n": NDIFF, "p": PDIFF}
def matches(text: str, patterns) -> bool:
    """True when ``text`` matches one of the glob ``patterns`` (case-sensitive)."""
    return any(fnmatchcase(text, p) for p in patterns)


@dataclass
class LayoutNets:
    """The net graph of a labelled layout: which labels landed on which nets, and the names and supply classes."""
    conn: Connectivity | None  # None when the layout labels nothing
    label_index: np.ndarray  # flat label indices that landed on a conductor
    label_net: np.ndarray  # the net each of them names
    names: dict[int, tuple[str, ...]]  # net -> its distinct label texts, sorted
    power: np.ndarray  # bool per net: a name matches [nets] power
    ground: np.ndarray
    pad: np.ndarray
    supply_names: tuple[str, ...]  # every supply name the layout uses
    conflicts: list[tuple[int, int, int]]  # (net, label, other label) with two supply names

    def net_of(self, kind_code: int) -> tuple[np.ndarray, np.ndarray]:
        """(piece index, net) of every conductor of one diffusion kind."""
        if self.conn is None:
            return np.zeros(0, np.int64), np.zeros(0, np.int64)
        return self.conn.of_diffusion(kind_code)

    classes: dict[str, tuple[bool, bool, bool]]  # label text -> (power, ground, pad)

    def display_name(self, net: int) -> str | None:
        """The name a net is shown by: a pad name, else a supply name, else the first."""
        names = self.names.get(int(net))
        if not names:
            return None
        for which in (2, 0, 1):
            for name in names:
                if self.classes[name][which]:
                    return name
        return names[0]


def _placed_labels(flat, tech, conn: Connectivity) -> tuple[np.ndarray, np.ndarray]:
    """(label index, net) for every label on a [labels] layer that lies on a conductor
    of its role; a label over two touching shapes names their one net once."""
    hits_label, hits_net = [], []
    for role, pairs in tech.labels.items():
        if role not in conn.roles:
            continue
        on_layer = np.flatnonzero(_on_text_layers(flat, pairs))
        rows = np.flatnonzero(conn.conductors.role == conn.roles.index(role))
        if len(on_layer) == 0 or len(rows) == 0:
            continue
        tree = shapely.STRtree(conn.conductors.geoms[rows])
        li, ci = tree.query(shapely.points(flat.label_xy[on_layer]), predicate="intersects")
        hits_label.append(on_layer[li])
        hits_net.append(conn.net[rows[ci]])
    if not hits_label:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    pairs = np.unique(np.column_stack([np.concatenate(hits_label), np.concatenate(hits_net)]), axis=0)
    return pairs[:, 0], pairs[:, 1]


def has_labels(flat, tech) -> bool:
    """True when the flattened layout has a label on one of the technology's label layers."""
    return any(_on_text_layers(flat, pairs).any() for pairs in tech.labels.values())


def _on_text_layers(flat, pairs) -> np.ndarray:
    """A bool per label of the flattened layout: on one of the (layer, texttype) pairs."""
    hit = np.zeros(len(flat.label_layer), dtype=bool)
    for layer, texttype in pairs:
        hit |= (flat.label_layer == layer) & (flat.label_texttype == texttype)
    return hit


def layout_nets(ex, tech) -> LayoutNets:
    """Name the nets of a layout from its labels; without labels no graph is built."""
    flat = ex.flat
    if not has_labels(flat, tech):
        none = np.zeros(0, bool)
        return LayoutNets(None, np.zeros(0, np.int64), np.zeros(0, np.int64), {}, none, none, none, (), [], {})
    conn = connect(ex, tech)
    label_index, label_net = _placed_labels(flat, tech, conn)
    text = flat.label_text[label_index] if len(label_index) else np.empty(0, dtype=object)
    distinct = sorted(set(text.tolist()))
    cls = {t: (matches(t, tech.power), matches(t, tech.ground), matches(t, tech.pads)) for t in distinct}
    power, ground, pad = (np.zeros(conn.n_nets, bool) for _ in range(3))
    names: dict[int, set[str]] = {}
    first_label: dict[tuple[int, str], int] = {}
    for li, net, t in zip(label_index.tolist(), label_net.tolist(), text.tolist(), strict=False):
        names.setdefault(net, set()).add(t)
        first_label.setdefault((net, t), li)
        p, gr, pd = cls[t]
        power[net] |= p
        ground[net] |= gr
        pad[net] |= pd
    conflicts = []
    for net, texts in names.items():
        supplies = sorted(t for t in texts if cls[t][0] or cls[t][1])
        if len(supplies) >= 2:
            conflicts.append((net, first_label[(net, supplies[0])], first_label[(net, supplies[1])]))
    supply_names = tuple(t for t in distinct if cls[t][0] or cls[t][1])
    return LayoutNets(conn, label_index, label_net, {k: tuple(sorted(v)) for k, v in names.items()},
                      power, ground, pad, supply_names, conflicts, cls)


def nets(ctx) -> LayoutNets:
    """The layout's nets, computed once per check context."""
    return ctx.memo("nets", lambda: layout_nets(ctx.extraction, ctx.tech))


def pad_connected(ctx) -> dict[str, np.ndarray]:
    """Per kind ("n": N+ device diffusions, "p": P+), a bool per piece: pad-connected."""

    def compute():
        ex, tech, ln = ctx.extraction, ctx.tech, nets(ctx)
        marker, _ = layer_shapes(ex.flat, tech, "io_marker")
        out = {}
        for kind, pieces in (("n", ex.ndiff), ("p", ex.pdiff)):
            flags = g.area_overlap_any(pieces.geoms, marker) if len(marker) else np.zeros(len(pieces), bool)
            piece, net = ln.net_of(DEVICE_CODES[kind])
            if len(piece) and ln.pad.any():
                flags[piece[ln.pad[net]]] = True
            out[kind] = flags
        return out

    return ctx.memo("pad-connected", compute)


def device_net_names(ctx, kind: str) -> list[str | None]:
    """Per device piece of ``kind``: the names of the labelled nets of its terminals,
    sorted and comma-separated, or None when none is named (the devices table's ``net``)."""
    ln = nets(ctx)
    pieces = ctx.extraction.ndiff if kind == "n" else ctx.extraction.pdiff
    out: list[str | None] = [None] * len(pieces)
    piece, net = ln.net_of(DEVICE_CODES[kind])
    if len(piece) == 0 or not ln.names:
        return out
    named = np.zeros(ln.conn.n_nets, dtype=bool)
    named[list(ln.names)] = True
    keep = named[net]
    per_piece: dict[int, set[str]] = {}
    for p, n in zip(piece[keep].tolist(), net[keep].tolist(), strict=False):
        per_piece.setdefault(p, set()).add(ln.display_name(n))
    for p, found in per_piece.items():
        out[p] = ",".join(sorted(found))
    return out
