"""Headless Chromium for the page tests and docs/make_screenshots.py: a screenshot of a
page, and a small PNG reader (the test environment has no imaging library)."""

from __future__ import annotations

import shutil
import subprocess
import tempfile
import zlib
from pathlib import Path

import numpy as np

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
WIDTH, HEIGHT = 1400, 900
# The drawing area of the page (server/pictures/page.css): right of the 340 px side panel, below the 40 px header.
VIEW_LEFT, VIEW_TOP = 340, 40


def _chromium(page: Path, fragment: str, width: int, height: int, *action: str) -> str:
    if CHROMIUM is None:
        raise RuntimeError("chromium is not installed (Debian: apt-get install chromium)")
    url = Path(page).resolve().as_uri() + (f"#{fragment}" if fragment else "")
    with tempfile.TemporaryDirectory() as profile:
        run = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                              "--force-device-scale-factor=1", f"--user-data-dir={profile}",
                              f"--window-size={width},{height}", "--virtual-time-budget=6000", *action, url],
                             capture_output=True, text=True, timeout=180, check=True)
    return run.stdout


def screenshot(page: Path, png: Path, fragment: str = "", width: int = WIDTH, height: int = HEIGHT) -> Path:
    """Render ``page`` (with ``#fragment``) in headless Chromium into ``png``."""
    _chromium(page, fragment, width, height, f"--screenshot={png}")
    return png


def rendered_dom(page: Path, fragment: str = "", width: int = WIDTH, height: int = HEIGHT) -> str:
    """The page's DOM after its script ran, as HTML text."""
    return _chromium(page, fragment, width, height, "--dump-dom")


def read_png(path: Path) -> np.ndarray:
    """(h, w, 3) uint8 RGB of an 8-bit RGB or RGBA PNG (the five PNG row filters undone)."""
    data = Path(path).read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n", f"{path}: not a PNG"
    pos, chunks, header = 8, [], None
    while pos < len(data):
        length = int.from_bytes(data[pos:pos + 4], "big")
        kind, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + length]
        if kind == b"IHDR":
            header = body
        elif kind == b"IDAT":
            chunks.append(body)
        pos += 12 + length
    width, height = int.from_bytes(header[0:4], "big"), int.from_bytes(header[4:8], "big")
    depth, colour = header[8], header[9]
    assert depth == 8 and colour in (2, 6), f"{path}: only 8-bit RGB/RGBA PNGs are read here"
    channels = 3 if colour == 2 else 4
    raw = np.frombuffer(zlib.decompress(b"".join(chunks)), np.uint8).reshape(height, 1 + width * channels)
    out = np.zeros((height, width * channels), np.int64)
    previous = np.zeros(width * channels, np.int64)
    for row in range(height):
        kind, line = raw[row, 0], raw[row, 1:].astype(np.int64)
        if kind == 0:
            current = line
        elif kind == 2:
            current = (line + previous) % 256
        elif kind in (1, 3, 4):
            current = _sequential(kind, line, previous, channels)
        else:
            raise AssertionError(f"{path}: unknown PNG filter {kind}")
        out[row] = current
        previous = current
    return out.reshape(height, width, channels)[:, :, :3].astype(np.uint8)


def _sequential(kind: int, line: np.ndarray, up: np.ndarray, channels: int) -> np.ndarray:
    """Sub (1), Average (3) and Paeth (4): each byte depends on the one to its left."""
    if kind == 1:
        return np.cumsum(line.reshape(-1, channels), axis=0).ravel() % 256
    out = [0] * len(line)
    values, above = line.tolist(), up.tolist()
    for i, v in enumerate(values):
        a = out[i - channels] if i >= channels else 0
        b = above[i]
        if kind == 3:
            out[i] = (v + (a + b) // 2) % 256
            continue
        c = above[i - channels] if i >= channels else 0
        p = a + b - c
        pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
        out[i] = (v + (a if pa <= pb and pa <= pc else b if pb <= pc else c)) % 256
    return np.array(out, np.int64)


def to_pixel(view: tuple[float, float, float, float], x: float, y: float, width: int = WIDTH,
             height: int = HEIGHT) -> tuple[int, int]:
    """The screen pixel (column, row) of layout point (x, y) for an SVG viewBox ``view``
    filling the drawing area with preserveAspectRatio xMidYMid meet (SVG 1.1, 7.8)."""
    area_w, area_h = width - VIEW_LEFT, height - VIEW_TOP
    vx, vy, vw, vh = view
    scale = min(area_w / vw, area_h / vh)
    left = VIEW_LEFT + (area_w - vw * scale) / 2
    top = VIEW_TOP + (area_h - vh * scale) / 2
    return int(left + (x - vx) * scale), int(top + (-y - vy) * scale)
