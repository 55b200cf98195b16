"""gdsfactory 7 (built on gdstk) through `latchwatch check --python`: a parametric cell
library with `@gf.cell` helpers, `<<` references moved after their insert, and an
instance array made by `add_array`, as a script and as the GDS file it writes.

They need an environment with gdsfactory 7: `.ci/run` builds `.venv-gf7` in the checkout
and names its interpreter in LATCHWATCH_GF7_PYTHON; without either these tests skip,
saying so. Build it by hand:

    python3 -m venv .venv-gf7 && .venv-gf7/bin/pip install 'gdsfactory==7.8.18'

The script is examples/gdsfactory/excitation_switches.py turned into gdsfactory 7's API
(add_array instead of add_ref with columns), so the expected figures are that example's.
"""

from __future__ import annotations

import subprocess

import pytest

from environments import check, framework_python, latchwatch_here, line_of
from locations import ROOT

GF7_PYTHON, SKIP_REASON = framework_python(
    "LATCHWATCH_GF7_PYTHON", ".venv-gf7",
    "import gdsfactory, gdstk, importlib.metadata as m; assert m.version('gdsfactory').startswith('7.')")
pytestmark = pytest.mark.skipif(SKIP_REASON is not None, reason=SKIP_REASON or "")

EXAMPLE = ROOT / "examples" / "gdsfactory" / "excitation_switches.py"
# gdsfactory 7 has no gpdk module (its generic PDK activates itself) and makes instance
# arrays with add_array; the rest of the example is the same in both versions.
GF9_TO_GF7 = (
    ("gf.gpdk.PDK.activate()", "pass"),
    ("c.add_ref(pmos_switch(), columns=count, rows=1, column_pitch=PITCH)",
     "c.add_array(pmos_switch(), columns=count, rows=1, spacing=(PITCH, 0))"),
    ('write_gds("excitation_switches.gds")', 'write_gds("switches.gds")'),
)


def gf7_script() -> str:
    text = EXAMPLE.read_text(encoding="utf-8")
    for gf9, gf7 in GF9_TO_GF7:
        assert gf9 in text, f"{EXAMPLE.name} no longer has {gf9!r}"
        text = text.replace(gf9, gf7)
    return text


SWITCHES = gf7_script()
# By hand: a group is 2 + 8 x 4 = 34 um wide. The second group's tap lies at x 34.25..35.75
# and its six switches at x = 36 + 4k; the far edge of the last one (k = 5, x 56..59) is
# 59 - 35.75 = 23.25 um from that tap, the nearest (examples/gdsfactory/README.md).
FAR_UM = 23.25
LIMIT_UM = 20.0  # demo technology


@pytest.fixture(scope="module")
def bank_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("gf7")
    (folder / "switches.py").write_text(SWITCHES, encoding="utf-8")
    return folder


def test_the_far_switch_fails_on_its_helper_line_with_the_array_member(bank_folder):
    report = check([latchwatch_here()], bank_folder, "--tech", "demo", "--python", GF7_PYTHON, "switches.py")
    assert report["runs"][0]["status"] == "ok"
    [top] = report["runs"][0]["tops"]
    assert (top["cell"], top["how"], top["line"]) == ("switch_bank", "written", line_of(SWITCHES, "write_gds"))
    [finding] = report["findings"]
    assert (finding["rule"], finding["value"], finding["limit"]) == ("tap-distance", pytest.approx(FAR_UM), LIMIT_UM)
    assert finding["line"] == line_of(SWITCHES, "# switch diffusion")  # in the pmos_switch helper
    [placement] = finding["placements"]
    assert placement["line"] == line_of(SWITCHES, "c.add_array(")
    assert placement["instance"] == "pmos_switch[5,0]"
    # All 14 switches are devices; the nearest 8 of the first group pass.
    assert len([d for d in report["devices"] if d["kind"] == "pdiff"]) == 14


def test_the_gds_it_writes_gives_the_same_finding(bank_folder):
    # Run by gdsfactory 7 itself (a checked script's writes stay in its sandbox).
    subprocess.run([GF7_PYTHON, "switches.py"], cwd=bank_folder, check=True, capture_output=True, timeout=300)
    report = check([latchwatch_here()], bank_folder, "--tech", "demo", "switches.gds")
    [finding] = report["findings"]
    assert (finding["rule"], finding["value"]) == ("tap-distance", pytest.approx(FAR_UM))
