"""The page through `latchwatch check --html` and headless Chromium: it parses, and on the
screenshot the finding marker sits at its coordinates, the distance line and the heat map
are drawn, and a layer toggle changes pixels. Chromium is Debian's (.ci/run installs it)."""

from __future__ import annotations

import re
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import gdstk
import numpy as np
import pytest
from browser import CHROMIUM, read_png, rendered_dom, screenshot, to_pixel
from test_examples import latchwatch

from builders import GENERATOR
from locations import ROOT

ERROR_RGB = (0xF0, 0x14, 0x7C)  # palette.SEVERITY_COLOUR["error"]
REACH_RGB = (0x5A, 0x18, 0x9A)  # palette.REACH_COLOUR
needs_chromium = pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (.ci/run installs Debian's)")


class Tags(HTMLParser):
    def __init__(self, text: str):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def all(self, tag: str, cls: str | None = None) -> list[dict]:
        return [a for t, a in self.tags if t == tag and (cls is None or cls in (a.get("class") or "").split())]


def write_page(paths: list[str], page: Path, cwd: Path, *more: str) -> Tags:
    run = subprocess.run([latchwatch(), "check", *paths, "--tech", "demo", "--html", str(page), *more],
                         cwd=cwd, capture_output=True, text=True, timeout=300)
    assert run.returncode in (0, 1), run.stderr
    assert f"page written to {page}" in run.stderr
    return Tags(page.read_text(encoding="utf-8"))


def near(pixel, rgb, tolerance=18) -> bool:
    return all(abs(int(p) - c) <= tolerance for p, c in zip(pixel, rgb, strict=True))


@pytest.fixture(scope="module")
def sparse(tmp_path_factory):
    page = tmp_path_factory.mktemp("sparse") / "sparse.html"
    return page, write_page(["examples/sparse_tap_row.py"], page, ROOT)


def test_sparse_tap_row_page_marks_the_far_pmos(sparse):
    _, tags = sparse
    (marker,) = tags.all("circle", "marker")
    # examples/sparse_tap_row.py: the last PMOS is inverter 7 of the second group, at
    # x = 2 TAP_W + 13 INV_W = 43 in the row, active 0.5..2.5 and 6.0..8.2: its far corner (45.5, 6.0).
    assert (float(marker["cx"]), -float(marker["cy"])) == (45.5, 6.0)
    (item,) = tags.all("li", "item")
    assert "sev-error" in item["class"].split()
    assert [a for a in tags.all("g") if a.get("data-layer") == "m-tapdist"]
    assert len(tags.all("line", "reach")) == 1


@needs_chromium
def test_screenshot_shows_marker_distance_line_and_heat_map(sparse, tmp_path):
    page, tags = sparse
    (scene,) = tags.all("svg", "scene")
    view = tuple(map(float, scene["viewbox"].split()))
    shot = read_png(screenshot(page, tmp_path / "shown.png"))
    assert len(np.unique(shot.reshape(-1, 3), axis=0)) > 30, "the page looks blank"
    (marker,) = tags.all("circle", "marker")
    col, row = to_pixel(view, float(marker["cx"]), -float(marker["cy"]))
    assert near(shot[row, col], ERROR_RGB), f"no marker colour at ({col}, {row}): {shot[row, col]}"
    (reach,) = tags.all("line", "reach")
    ends = [to_pixel(view, float(reach[f"x{k}"]), -float(reach[f"y{k}"])) for k in (1, 2)]
    along = [(int(ends[0][0] + t * (ends[1][0] - ends[0][0])), int(ends[0][1] + t * (ends[1][1] - ends[0][1])))
             for t in np.linspace(0.3, 0.7, 60)]
    assert any(near(shot[r, c], REACH_RGB, 40) for c, r in along), "no distance line between the point and the tap"
    hidden = read_png(screenshot(page, tmp_path / "hidden.png", "hide=m-tapdist"))
    assert (hidden != shot).any(axis=2).sum() > 1000, "switching the heat map off changed nothing"
    # In the n-well right of the last PMOS, (45.8, 10.4): 21.3 um from the second group's tap
    # (its active ends at x = 24.5, y = 9.7), beyond the 20 um limit, so shaded warm (orange, blue low);
    # at (12, 10.4), 10.5 um from the first tap, within it: the cool shade (blue above red).
    c, r = to_pixel(view, 45.8, 10.4)
    assert int(shot[r, c][2]) < int(hidden[r, c][2]) - 60 and shot[r, c][0] > shot[r, c][2]
    c, r = to_pixel(view, 12.0, 10.4)
    assert shot[r, c][2] > shot[r, c][0]


FAR_GDS = [((-5, -5), (40, 10), 1), ((0, 0), (30, 4), 5), ((0, 0), (30, 4), 2), ((-3, 0), (-1, 4), 4),
           ((-3, 0), (-1, 4), 2), ((-2.5, 1.5), (-1.5, 2.5), 6)]  # tests/builders.py FAR_SCRIPT


@pytest.mark.parametrize("suffix", [".gds", ".oas"])
def test_page_of_a_layout_file(tmp_path, suffix):
    lib = gdstk.Library()
    cell = lib.new_cell("TOP")
    for a, b, layer in FAR_GDS:
        cell.add(gdstk.rectangle(a, b, layer=layer))
    layout = tmp_path / f"far{suffix}"
    lib.write_gds(str(layout)) if suffix == ".gds" else lib.write_oas(str(layout))
    page = tmp_path / "far.html"
    tags = write_page([layout.name], page, tmp_path)
    (marker,) = tags.all("circle", "marker")
    assert float(marker["cx"]) == 30.0  # the far end of the 30 um diffusion (analytic)
    if CHROMIUM is None or suffix == ".oas":
        return
    (scene,) = tags.all("svg", "scene")
    shot = read_png(screenshot(page, tmp_path / "far.png"))
    col, row = to_pixel(tuple(map(float, scene["viewbox"].split())), 30.0, -float(marker["cy"]))
    assert near(shot[row, col], ERROR_RGB)


def test_corners_share_one_page_with_a_selector(tmp_path):
    (tmp_path / "gen.py").write_text(GENERATOR)
    page = tmp_path / "corners.html"
    tags = write_page(["gen.py"], page, tmp_path, "--sweep", "finger_array", "--param", "fingers=4,16")
    options = tags.all("option")
    assert len(options) == 2 and len(tags.all("svg", "scene")) == 2
    text = page.read_text(encoding="utf-8")
    assert "fingers=4" in text and "fingers=16" in text


@needs_chromium
def test_large_drawing_draws_the_shapes_in_view_when_zoomed_in(tmp_path):
    # The far diffusion with poly squares (0.4 um, pitch 1 um) over it, and a 160 x 160 block of
    # them far away: more shapes than a drawing writes as static SVG (page.STATIC_SHAPES).
    lib = gdstk.Library()
    cell = lib.new_cell("TOP")
    for a, b, layer in FAR_GDS:
        cell.add(gdstk.rectangle(a, b, layer=layer))
    near = [(x, y) for x in range(-5, 40) for y in range(-5, 10)]
    block = [(200 + i, j) for i in range(160) for j in range(160)]
    for x, y in near + block:
        cell.add(gdstk.rectangle((x, y), (x + 0.4, y + 0.4), layer=3))
    lib.write_gds(str(tmp_path / "many.gds"))
    page = tmp_path / "many.html"
    tags = write_page(["many.gds"], page, tmp_path)
    assert tags.all("image", "overview") and not any(a.get("d") for a in tags.all("path", "detail"))
    (item,) = tags.all("li", "item")
    # Clicking a finding zooms to its box grown by 35 % of its larger side plus 0.5 um (page.js zoomTo).
    x0, y0, x1, y1 = map(float, item["data-box"].split())
    pad = max(x1 - x0, y1 - y0) * 0.35 + 0.5
    view = (x0 - pad, -y1 - pad, x1 - x0 + 2 * pad, y1 - y0 + 2 * pad)
    dom = rendered_dom(page, "finding=0")
    (scene,) = Tags(dom).all("svg", "scene")
    assert tuple(map(float, scene["viewbox"].split())) == pytest.approx(view)
    (poly,) = re.findall(r'<g class="layer" data-layer="3/0"[^>]*>(?:(?!</g>).)*?<path class="detail" d="([^"]*)"', dom, re.S)
    # One subpath per square touching the view (x from view[0], y negated in SVG).
    touching = sum(1 for x, y in near + block if x <= view[0] + view[2] and x + 0.4 >= view[0]
                   and -(y + 0.4) <= view[1] + view[3] and -y >= view[1])
    assert poly.count("M") == touching
