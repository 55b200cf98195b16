"""latchwatch's own colours and symbols for layers, findings and maps."""

from __future__ import annotations

# Per technology role (or extracted layer): fill, fill opacity, stroke. Bodies are pale
# washes, implants only outlines, conductors translucent, cuts solid.
ROLE_STYLE = {
    "deep_nwell": ("#d8cfe8", 0.35, "#8f7bb8"),
    "pwell": ("#f2dccb", 0.35, "#c49a76"),
    "nwell": ("#cfe3d3", 0.45, "#5f9b6c"),
    "nplus": ("none", 0.0, "#4b7bd0"),
    "pplus": ("none", 0.0, "#d07a4b"),
    "active": ("#b9a27a", 0.35, "#7d6843"),
    "tap": ("#a89064", 0.55, "#6d5a37"),
    "poly": ("#c8404a", 0.55, "#8e2a31"),
    "contact": ("#262a33", 0.95, "#111318"),
    "metal1": ("#6fa8dc", 0.30, "#3f78ac"),
    "via1": ("#3b3f4a", 0.9, "#1d1f25"),
    "metal2": ("#9d8fd6", 0.28, "#6a5cab"),
    "pad": ("#e8d36a", 0.30, "#a8932a"),
    # Extracted: device diffusions bold outlines, taps hatched.
    "x-pdiff": ("#e07b39", 0.22, "#b4531a"),
    "x-ndiff": ("#3f7fd9", 0.22, "#1f57a8"),
    "x-ntap": ("url(#hatch-n)", 1.0, "#1f57a8"),
    "x-ptap": ("url(#hatch-p)", 1.0, "#b4531a"),
    "x-bare": ("url(#hatch-bare)", 1.0, "#6a6a6a"),
    "x-pad": ("none", 0.0, "#00897b"),  # drawn as a thick outline (page.css)
}
# Layers the technology does not name, in turn.
SPARE_STYLES = (("#8fb3a0", 0.3, "#4f7362"), ("#b38fa9", 0.3, "#734f69"), ("#a9b38f", 0.3, "#69734f"),
                ("#8f9bb3", 0.3, "#4f5b73"))
# Drawn layers hidden until switched on (extraction shows what they mean).
HIDDEN_ROLES = ("nplus", "pplus", "metal1", "metal2", "via1", "pad")

SEVERITY_COLOUR = {"error": "#f0147c", "warning": "#f2a900", "info": "#2f6fed"}
REACH_COLOUR = "#5a189a"  # the line from the farthest point to the nearest tap, and the tap's mark
OVERVIEW_ALPHA = 150


def style_of(role: str | None, index: int) -> tuple[str, float, str]:
    """(fill, opacity, stroke) of a layer: its role's style, else a spare one."""
    return ROLE_STYLE.get(role or "", SPARE_STYLES[index % len(SPARE_STYLES)])


def rgb(colour: str) -> tuple[int, int, int]:
    """'#rrggbb' as a tuple; a pattern fill falls back to the stroke's colour at the caller."""
    return int(colour[1:3], 16), int(colour[3:5], 16), int(colour[5:7], 16)
