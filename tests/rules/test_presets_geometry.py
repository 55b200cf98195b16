"""Each preset's published tap-distance limit, reproduced on geometry: a diffusion whose
farthest point is exactly at the limit passes, 0.01 um beyond fails."""

import pytest

from latchwatch.analyzers.check import CheckOptions, check_outcome
from latchwatch.server.config.techfiles import load_technology

from builders import CellBuilder, layout, outcome

# (preset, kind, published limit, where it is published)
PUBLISHED = [
    ("sg13g2", "p", 20.0, "SG13G2_os_layout_rules.pdf Rev 0.4, LU.a"),
    ("sg13g2", "n", 20.0, "SG13G2_os_layout_rules.pdf Rev 0.4, LU.b"),
    ("gf180mcu", "p", 20.0, "GF180MCU design manual, COMP rules DF.13 (3.3 V), stricter than LU.4 at x >= 2 um"),
    ("gf180mcu", "n", 20.0, "GF180MCU design manual, COMP rules DF.14 (3.3 V), stricter than LU.3 at x >= 2 um"),
    ("sky130", "p", 6.0, "skywater-pdk docs/rules, areaid.ld 81:14 description (implied 6 um)"),
    ("sky130", "n", 6.0, "skywater-pdk docs/rules, areaid.ld 81:14 description (implied 6 um)"),
]


def _cell(tech, kind, far_end):
    """A diffusion from x = 0 to x = far_end, its contacted tap 1 um wide ending at x = 0 minus a
    spacing of 0, both 1 um tall; the farthest point is at x = far_end, far_end from the tap."""
    tap_layer = tech.layer("tap") or tech.layer("active")
    c = CellBuilder("TOP")

    class Drawn:  # an implant the technology derives (sg13g2's N+) is not drawn, as the PDK's cells do
        def rect(self, layer, *box):
            if layer is not None:
                c.rect(layer, *box)
            return self

    def L(role):
        return tech.layer(role)
    if kind == "p":
        c.rect(L("nwell"), -10, -10, far_end + 10, 11)
        c.rect(L("pplus"), 0, 0, far_end, 1).rect(L("active"), 0, 0, far_end, 1)
        Drawn().rect(L("nplus"), -1, 0, 0, 1).rect(tap_layer, -1, 0, 0, 1)
    else:
        # N+ in the p-body, the n-well far away so the widest spacing row applies.
        c.rect(L("nwell"), -100, 100, -60, 140)
        Drawn().rect(L("nplus"), 0, 0, far_end, 1).rect(L("active"), 0, 0, far_end, 1)
        c.rect(L("pplus"), -1, 0, 0, 1).rect(tap_layer, -1, 0, 0, 1)
    c.rect(L("contact"), -0.7, 0.3, -0.3, 0.7)
    return c


@pytest.mark.parametrize("preset,kind,limit,source", PUBLISHED)
def test_published_limit_reproduced(preset, kind, limit, source):
    tech = load_technology(preset)
    assert tech.tap_distance_limit(kind, 1000.0 if kind == "n" else 5.0) == limit, source

    def findings(far_end):
        result = check_outcome(outcome(layout(_cell(tech, kind, far_end))), tech, CheckOptions())
        return [f for f in result.findings if f.rule == "tap-distance"]

    assert findings(limit) == [], f"exactly at the limit must pass ({source})"
    beyond = findings(limit + 0.01)
    assert len(beyond) == 1, f"0.01 um beyond must fail ({source})"
    assert beyond[0].value == pytest.approx(limit + 0.01, abs=1e-3)
    assert beyond[0].limit == limit
