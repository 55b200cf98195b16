"""The page: one self-contained HTML file (inline SVG, CSS and script; no fetches) with
every drawing of a report, a selector between drawings (runs, parameter corners, tops),
layer toggles, the findings beside the layout, and the maps.

Small drawings are written as static SVG paths. A drawing of more than STATIC_SHAPES
shapes gets, per layer, a raster overview (its merged region) and its shapes packed
(server/pictures/svg.py); the script draws the shapes in view once few enough are.
"""

from __future__ import annotations

import html
import json
from importlib import resources
from pathlib import Path

from latchwatch.analyzers.model.findings import Finding
from latchwatch.server.pictures import palette
from latchwatch.server.pictures import svg as s
from latchwatch.server.pictures.scene import Drawing, finding_key
from latchwatch.server.report.model import Report, corner_label, for_display

STATIC_SHAPES = 20_000  # up to this many shapes a drawing is static SVG
DETAIL_SHAPES = 60_000  # the script draws the shapes in view when at most this many are
MARGIN = 0.08  # of the extent, around the initial view


def _asset(name: str) -> str:
    return resources.files("latchwatch.server.pictures").joinpath(name).read_text(encoding="utf-8")


def _esc(text) -> str:
    return html.escape(str(text), quote=True)


def initial_view(extent) -> tuple[float, float, float, float]:
    """The SVG viewBox (x, y, width, height) showing ``extent`` with a margin (y negated)."""
    x0, y0, x1, y1 = extent
    pad = max(x1 - x0, y1 - y0) * MARGIN or 1.0
    return (x0 - pad, -(y1 + pad), x1 - x0 + 2 * pad, y1 - y0 + 2 * pad)


def _layer_group(n: int, index: int, layer, static: bool, extent, packed: dict) -> str:
    fill, opacity, stroke = palette.style_of(layer.role, index)
    hidden = " off" if layer.role in palette.HIDDEN_ROLES else ""
    fill = fill.replace(")", f"-{n})") if fill.startswith("url(") else fill
    head = (f'<g class="layer{hidden}" data-layer="{_esc(layer.key)}" fill="{fill}" fill-opacity="{opacity}" '
            f'stroke="{stroke}" vector-effect="non-scaling-stroke">')
    if static:
        d = s.rect_path(layer.rects) + s.polygon_path(layer.polygons)
        return f'{head}<path d="{d}"/></g>'
    mask = s.overview_mask(layer.rects, layer.polygons, extent)
    colour = palette.rgb(stroke if fill.startswith(("url", "none")) else fill)
    x0, y0, x1, y1 = extent
    packed[layer.key] = {"r": s.pack_rects(layer.rects), "p": s.pack_polygons(layer.polygons),
                         "n": layer.count}
    uri = s.png_data_uri(s.mask_image(mask, colour, palette.OVERVIEW_ALPHA))
    return (f'{head}<image class="overview" href="{uri}" x="{x0}" y="{-y1}" width="{x1 - x0}" height="{y1 - y0}" '
            f'preserveAspectRatio="none"/><path class="detail" d=""/></g>')


def _map_group(m) -> tuple[str, str]:
    """(the map's image, its labels): the labels go above the layers, under the same toggle."""
    x0, y0, x1, y1 = m.box
    labels = "".join(f'<text class="maplabel" x="{x}" y="{-y}">{_esc(t)}</text>' for x, y, t in m.labels)
    hidden = "" if m.key == "m-tapdist" else " off"
    image = (f'<g class="layer map{hidden}" data-layer="{m.key}"><image href="{s.png_data_uri(m.rgba)}" x="{x0}" '
             f'y="{-y1}" width="{x1 - x0}" height="{y1 - y0}" preserveAspectRatio="none" opacity="0.8"/></g>')
    return image, f'<g class="layer{hidden}" data-layer="{m.key}">{labels}</g>' if labels else ""


def _finding_group(k: int, f: Finding, px: float) -> str:
    """A finding's marks; ``px`` is the layout size of a screen pixel at the initial view
    (the script resizes the marks on every zoom)."""
    colour = palette.SEVERITY_COLOUR[f.severity.label]
    parts = []
    if f.bbox:
        x0, y0, x1, y1 = f.bbox
        parts.append(f'<rect class="fbox" x="{x0}" y="{-y1}" width="{x1 - x0}" height="{y1 - y0}" stroke="{colour}"/>')
    if f.location:
        x, y = f.location
        for r in f.related:
            if r.location:
                rx, ry = r.location
                parts.append(f'<line class="reach" x1="{x}" y1="{-y}" x2="{rx}" y2="{-ry}" stroke="{palette.REACH_COLOUR}"/>'
                             f'<rect class="tapmark" data-x="{rx}" data-y="{-ry}" x="{rx - 5 * px}" y="{-ry - 5 * px}" '
                             f'width="{10 * px}" height="{10 * px}" fill="{palette.REACH_COLOUR}"/>')
        label = f"{f.value:.2f} {f.unit}" if f.value is not None and f.unit == "um" else ""
        parts.append(f'<circle class="halo" cx="{x}" cy="{-y}" r="{8.5 * px}"/><circle class="marker" cx="{x}" '
                     f'cy="{-y}" r="{6 * px}" fill="{colour}"/><text class="flabel" x="{x}" y="{-y}" font-size="{12 * px}" '
                     f'stroke-width="{3 * px}">'
                     f'{_esc(label)}</text>')
    return f'<g class="finding" data-finding="{k}">{"".join(parts)}</g>'


def finding_box(f: Finding) -> tuple[float, float, float, float] | None:
    """What clicking a finding zooms to: its box, its point and the related points."""
    points = [(f.bbox[0], f.bbox[1]), (f.bbox[2], f.bbox[3])] if f.bbox else []
    points += [f.location] if f.location else []
    points += [r.location for r in f.related if r.location]
    if not points:
        return None
    xs, ys = [p[0] for p in points], [p[1] for p in points]
    return (min(xs), min(ys), max(xs), max(ys))


def _finding_item(k: int, f: Finding) -> str:
    where = f"{f.file}:{f.line}" if f.file and f.line else (f.file or "")
    box = finding_box(f)
    data = f' data-box="{" ".join(str(v) for v in box)}"' if box and f.location else ""
    return (f'<li class="item sev-{f.severity.label}" data-finding="{k}"{data}><b>{_esc(f.rule)}</b> '
            f'<span class="sev">{f.severity.label}</span><br>{_esc(f.message)}<br><code>{_esc(where)}</code></li>')


def _scene(n: int, drawing: Drawing, findings: list[Finding], label: str, packed: dict) -> tuple[str, str]:
    """(the SVG of one drawing, its side panel)."""
    static = drawing.shapes <= STATIC_SHAPES
    px = initial_view(drawing.extent)[2] / 1000
    mine: dict = {}
    groups = [_layer_group(n, i, layer, static, drawing.extent, mine) for i, layer in enumerate(drawing.layers)]
    pairs = [_map_group(m) for m in drawing.maps]
    maps, map_labels = [image for image, _ in pairs], [labels for _, labels in pairs]
    marks = [_finding_group(k, f, px) for k, f in enumerate(findings)]
    if mine:
        packed[str(n)] = mine
    view = " ".join(f"{v:g}" for v in initial_view(drawing.extent))
    hidden = "" if n == 0 else " hidden"
    svg = (f'<svg class="scene{hidden}" id="scene-{n}" data-scene="{n}" viewBox="{view}" data-home="{view}" '
           f'preserveAspectRatio="xMidYMid meet" xmlns="http://www.w3.org/2000/svg">{_defs(n, px)}'
           f'{"".join(groups[:_bodies(drawing)])}{"".join(maps)}{"".join(groups[_bodies(drawing):])}'
           f'{"".join(map_labels)}<g class="findings">{"".join(marks)}</g></svg>')
    toggles = "".join(
        f'<label><input type="checkbox" data-layer="{_esc(key)}"{"" if off else " checked"}> '
        f'<i class="swatch" style="background:{_swatch(role, i)}"></i>{_esc(name)}</label>'
        for i, (key, name, role, off) in enumerate(_toggles(drawing)))
    legends = "".join(_legend(m) for m in drawing.maps)
    items = "".join(_finding_item(k, f) for k, f in enumerate(findings)) or "<li>no findings on this drawing</li>"
    panel = (f'<div class="panel{hidden}" data-scene="{n}"><h2>{_esc(label)}</h2><p class="count">'
             f'{drawing.shapes} shapes{"" if static else " (overview at far zoom, shapes when zoomed in)"}</p>'
             f'<h3>Findings</h3><ol class="findings">{items}</ol><h3>Layers</h3><div class="toggles">{toggles}</div>'
             f'<h3>Maps</h3>{legends}</div>')
    return svg, panel


def _bodies(drawing: Drawing) -> int:
    """How many of the drawing's first layers are bodies (the maps go above them)."""
    return sum(1 for layer in drawing.layers if layer.role in ("deep_nwell", "pwell", "nwell"))


def _toggles(drawing: Drawing):
    """(key, name, role, initially off) of every layer and map of a drawing."""
    for layer in drawing.layers:
        yield layer.key, layer.name, layer.role, layer.role in palette.HIDDEN_ROLES
    for m in drawing.maps:
        yield m.key, m.name, m.key, m.key != "m-tapdist"


def _swatch(role: str | None, index: int) -> str:
    if role and role.startswith("m-"):
        return "linear-gradient(90deg,#ecf6f0,#266c8c,#fcb040,#c42460)"
    fill, _, stroke = palette.style_of(role, index)
    return stroke if fill.startswith(("url", "none")) else fill


def _legend(m) -> str:
    keys = "".join(f'<span><i class="swatch" style="background:rgb{c}"></i>{_esc(t)}</span>' for c, t in m.legend)
    return f'<div class="legend"><b>{_esc(m.name)}</b> {keys}<br><small>{_esc(m.note)}</small></div>'


# Tap hatching, per drawing (ids are unique on the page); the script keeps it 6 pixels wide at every zoom.
HATCHES = (("n", 45, "#c9dcf5", "#1f57a8"), ("p", -45, "#f6dcc8", "#b4531a"), ("bare", 0, "#eeeeee", "#6a6a6a"))


def _defs(n: int, px: float) -> str:
    patterns = "".join(
        f'<pattern id="hatch-{kind}-{n}" class="hatch" data-angle="{angle}" width="6" height="6" '
        f'patternUnits="userSpaceOnUse" patternTransform="rotate({angle}) scale({px})"><rect width="6" height="6" '
        f'fill="{back}"/><rect width="2.5" height="6" fill="{front}"/></pattern>' for kind, angle, back, front in HATCHES)
    return f"<defs>{patterns}</defs>"


def _label(report: Report, run: int, drawing: Drawing, several_tops: bool) -> str:
    summary = report.runs[run]
    parts = [summary.script or "layout"]
    if summary.function:
        parts.append(f"{summary.function}({corner_label(summary.corner)})")
    if several_tops:
        parts.append(f"top {drawing.top}")
    return " · ".join(parts)


def render_page(report: Report, base: Path | None = None) -> str:
    """The page of a report whose runs carry drawings (Report.drawings)."""
    shown = for_display(report, base)
    scenes, panels, options, packed, drawn = [], [], [], {}, set()
    n = 0
    for run, drawings in enumerate(report.drawings):
        corner = report.runs[run].corner or None
        for drawing in drawings:
            mine = [f for f in shown.findings if (f.corner or None) == corner and finding_key(f) in drawing.finding_keys]
            drawn.update(id(f) for f in mine)
            label = _label(shown, run, drawing, len(drawings) > 1)
            svg, panel = _scene(n, drawing, mine, label, packed)
            scenes.append(svg)
            panels.append(panel)
            options.append(f'<option value="{n}">{_esc(label)}</option>')
            n += 1
    loose = [f for f in shown.findings if id(f) not in drawn]
    counts = ", ".join(f"{v} {k}" for k, v in shown.summary().items())
    selector = (f'<label>drawing <select id="scene">{"".join(options)}</select></label>' if n > 1 else "")
    others = "".join(_finding_item(-1, f) for f in loose)
    extra = f'<div class="loose"><h3>Not drawn (no geometry)</h3><ol class="findings">{others}</ol></div>' if loose else ""
    empty = "" if n else '<p class="empty">No layout was drawn: no run produced geometry.</p>'
    config = json.dumps({"detail": DETAIL_SHAPES, "packed": packed}, separators=(",", ":"))
    return (f'<!doctype html>\n<html lang="en"><head><meta charset="utf-8"><title>latchwatch: {_esc(counts)}</title>'
            f'<meta name="viewport" content="width=device-width"><style>{_asset("page.css")}</style></head><body>'
            f'<header><b>latchwatch</b> <span class="tech">technology {_esc(shown.technology)}</span> '
            f'<span class="counts">{_esc(counts)}</span> {selector}<span class="hint">wheel: zoom, drag: pan, '
            f'double-click: whole layout</span></header><aside id="side">{"".join(panels)}{extra}{empty}</aside>'
            f'<main id="view">{"".join(scenes)}</main>'
            f'<script type="application/json" id="lw-config">{config}</script><script>{_asset("page.js")}</script>'
            f'</body></html>\n')


def write_page(report: Report, path: Path, base: Path | None = None) -> Path:
    """Write the page of ``report`` to ``path`` (folders created); returns the path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(render_page(report, base), encoding="utf-8")
    return path
