"""The page writer in process (server/pictures/): what it draws, where, and that it fetches nothing."""

from __future__ import annotations

import base64
import json
import zlib
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import shapely

from latchwatch.analyzers.check import CheckOptions, check_outcome
from latchwatch.analyzers.rules import RULES
from latchwatch.server.config.project import ConfigError, find_project_config
from latchwatch.server.config.techfiles import load_technology
from latchwatch.server.lsp.actions import page_file
from latchwatch.server.lsp.settings import EditorSettings, merge
from latchwatch.server.pictures import page, palette, svg
from latchwatch.server.pictures.maps import DISTANCE_RAMP, ramp
from latchwatch.server.pictures.scene import capture
from latchwatch.server.report.model import Report, RunSummary

from builders import ACTIVE, CONTACT, NPLUS, NWELL, PPLUS, CellBuilder, layout, outcome

TECH = load_technology("demo", Path.cwd())


def far_cell() -> CellBuilder:
    """FAR_SCRIPT's geometry (tests/builders.py): a 30 um P+ diffusion, its n-tap at the left
    end (x -3..-1), so the farthest point (30, 0) lies 31 um from the tap (analytic)."""
    return (CellBuilder("TOP").rect(NWELL, -5, -5, 40, 10).rect(PPLUS, 0, 0, 30, 4).rect(ACTIVE, 0, 0, 30, 4)
            .rect(NPLUS, -3, 0, -1, 4).rect(ACTIVE, -3, 0, -1, 4).rect(CONTACT, -2.5, 1.5, -1.5, 2.5))


def report_of(cell: CellBuilder) -> Report:
    drawings = []
    result = check_outcome(outcome(layout(cell)), TECH, CheckOptions(),
                           on_top=lambda ctx, found: drawings.append(capture(ctx, found)))
    run = RunSummary("test.py", None, "ok", 0.0, 1, 6, {})
    return Report("demo", (run,), tuple(result.findings), None, RULES, (tuple(drawings),))


class Elements(HTMLParser):
    """Every start tag with its attributes, and the text of the scripts."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.scripts: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_script = tag == "script"

    def handle_endtag(self, tag):
        self._in_script = False

    def handle_data(self, data):
        if self._in_script:
            self.scripts.append(data)

    def find(self, tag, **attrs):
        return [a for t, a in self.tags if t == tag and all(a.get(k.replace("_", "-")) == v for k, v in attrs.items())]


def parsed(text: str) -> Elements:
    p = Elements()
    p.feed(text)
    p.close()
    return p


def test_page_draws_layers_the_finding_and_its_reach():
    text = page.render_page(report_of(far_cell()))
    p = parsed(text)
    assert text.startswith("<!doctype html>")
    (scene,) = p.find("svg")
    layers = {a["data-layer"] for a in p.find("g") if "data-layer" in a}
    assert {"1/0", "2/0", "4/0", "5/0", "6/0", "x-pdiff", "x-ntap", "m-tapdist"} <= layers
    (marker,) = [a for t, a in p.tags if t == "circle" and a.get("class") == "marker"]
    # The farthest point of the diffusion: x = 30, on its bottom or top edge (y negated in SVG).
    assert float(marker["cx"]) == pytest.approx(30) and -float(marker["cy"]) in (pytest.approx(0), pytest.approx(4))
    assert marker["fill"] == palette.SEVERITY_COLOUR["error"]
    (reach,) = [a for t, a in p.tags if t == "line" and a.get("class") == "reach"]
    assert float(reach["x2"]) == pytest.approx(-1)  # the tap's nearest edge
    (item,) = [a for t, a in p.tags if t == "li" and "item" in a.get("class", "")]
    x0, y0, x1, y1 = map(float, item["data-box"].split())
    assert (x0, x1) == (pytest.approx(-1), pytest.approx(30))
    assert scene["viewbox"] == scene["data-home"]


def test_page_fetches_nothing():
    text = page.render_page(report_of(far_cell()))
    p = parsed(text)
    assert not [t for t, a in p.tags if t in ("link", "iframe", "img") or "src" in a]
    hrefs = [a["href"] for t, a in p.tags if "href" in a]
    assert hrefs and all(h.startswith("data:image/png;base64,") for h in hrefs)
    assert text.count("http") == text.count("http://www.w3.org/2000/svg")


def test_tap_distance_map_shades_the_analytic_distance():
    (drawing,) = report_of(far_cell()).drawings[0]
    (field,) = [m for m in drawing.maps if m.key == "m-tapdist"]
    x0, y0, x1, y1 = field.box
    h, w, _ = field.rgba.shape

    def pixel(x, y):
        return field.rgba[int((y1 - y) / (y1 - y0) * h), int((x - x0) / (x1 - x0) * w), :3]

    # In the n-well at (20, 2): 21 um right of the tap edge at x = -1 (analytic), over the 20 um limit.
    assert pixel(20, 2).tolist() == pytest.approx(ramp(np.array([21 / 20]), DISTANCE_RAMP)[0].tolist(), abs=12)
    # Inside the tap: distance 0.
    assert pixel(-2, 2).tolist() == ramp(np.array([0.0]), DISTANCE_RAMP)[0].tolist()
    # At (10, 2), 11 um away: within the limit, a different colour from beyond it.
    assert pixel(10, 2).tolist() == pytest.approx(ramp(np.array([11 / 20]), DISTANCE_RAMP)[0].tolist(), abs=12)


def test_large_drawings_pack_their_shapes_and_draw_an_overview(monkeypatch):
    monkeypatch.setattr(page, "STATIC_SHAPES", 0)
    text = page.render_page(report_of(far_cell()))
    p = parsed(text)
    assert [a for a in p.tags if a[0] == "image" and a[1].get("class") == "overview"]
    config = json.loads(next(s for s in p.scripts if s.lstrip().startswith("{")))
    packed = config["packed"]["0"]["2/0"]  # active: the diffusion and the tap
    deltas = np.frombuffer(zlib.decompress(base64.b64decode(packed["r"])), np.int32).reshape(-1, 4)
    rows = np.cumsum(deltas, axis=0)
    # x0, -y1, width, height in nanometres.
    assert sorted(rows.tolist()) == sorted([[-3000, -4000, 2000, 4000], [0, -4000, 30000, 4000]])


def test_overview_mask_paints_rectangles_and_keeps_small_shapes():
    mask = svg.overview_mask(np.array([[0, 0, 50, 100], [99.9, 0, 99.95, 0.05]]), np.empty(0, object), (0, 0, 100, 100))
    h, w = mask.shape
    assert mask[:, : w // 2].all() and not mask[: h - 1, w // 2: w - 1].any()
    assert mask[h - 1, w - 1]  # a shape smaller than a pixel still marks its pixel
    ring = shapely.Polygon([(60, 60), (90, 60), (90, 90), (60, 90)], [[(70, 70), (80, 70), (80, 80), (70, 80)]])
    with_hole = svg.overview_mask(np.zeros((0, 4)), np.array([ring], object), (0, 0, 100, 100))
    assert with_hole[int(h * 0.35), int(w * 0.65)] and not with_hole[int(h * 0.25), int(w * 0.75)]


def test_path_data_and_png():
    assert svg.rect_path(np.array([[0.5, 1.0, 2.0, 3.25]])) == "M0.5 -3.25h1.5v2.25h-1.5z"
    uri = svg.png_data_uri(np.zeros((2, 3, 4), np.uint8))
    data = base64.b64decode(uri.split(",", 1)[1])
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and int.from_bytes(data[16:20], "big") == 3  # width in IHDR


def test_project_key_and_editor_setting(tmp_path):
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\nhtml = "out/page.html"\n')
    assert find_project_config(tmp_path).html == tmp_path / "out" / "page.html"
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\nhtml = "out/page.txt"\n')
    with pytest.raises(ConfigError, match="html: expected a path of an .html file"):
        find_project_config(tmp_path)
    settings, problems = merge(EditorSettings(), {"pagePath": "pages/{stem}.html"}, allow_trust=False)
    assert problems == [] and settings.page_path == "pages/{stem}.html"
    script = tmp_path / "cell.py"
    assert page_file(script, settings.page_path, None, tmp_path / "cache") == tmp_path / "pages" / "cell.html"
    assert page_file(script, None, tmp_path / "p.html", tmp_path / "cache") == tmp_path / "p.html"
    assert page_file(script, None, None, tmp_path / "cache").parent == tmp_path / "cache" / "latchwatch" / "pages"
