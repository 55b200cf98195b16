"""End to end: every script of examples/ through the real `latchwatch check` command.

Each example is written to give exactly the findings of its scenario
(examples/README.md). Expected lines are found by searching the script for the
drawing line or a marker comment, never written down as numbers; expected figures
are derived from the coordinates in the script, as noted beside each check.
"""

from __future__ import annotations

import functools
import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from locations import ROOT

EXAMPLES = ROOT / "examples"


def latchwatch() -> str:
    beside = Path(sys.executable).with_name("latchwatch")
    found = str(beside) if beside.exists() else shutil.which("latchwatch")
    assert found, "the `latchwatch` console script is not installed (pip install -e .)"
    return found


def run_check(script: Path, cwd: Path) -> tuple[int, dict, str]:
    proc = subprocess.run(
        [latchwatch(), "check", str(script), "--tech", "demo", "--format", "json"],
        cwd=cwd, capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode in (0, 1), f"exit {proc.returncode}\n{proc.stderr}"
    return proc.returncode, json.loads(proc.stdout), proc.stderr


@functools.cache
def check_example(name: str) -> tuple[int, dict]:
    status, report, _ = run_check(Path("examples") / name, ROOT)
    return status, report


def line_of(name: str, fragment: str) -> int:
    """1-based number of the one line of examples/NAME that contains ``fragment``."""
    lines = (EXAMPLES / name).read_text(encoding="utf-8").splitlines()
    hits = [i + 1 for i, text in enumerate(lines) if fragment in text]
    assert len(hits) == 1, f"{name}: {fragment!r} is on lines {hits}, expected exactly one"
    return hits[0]


def frames(finding: dict) -> list[tuple[str, int, str]]:
    return [(f["file"], f["line"], f["function"]) for f in finding["stack"]]


def test_every_example_is_covered_here():
    scripts = sorted(p.name for p in EXAMPLES.glob("*.py"))
    assert scripts == sorted(
        ["inverter_row.py", "sparse_tap_row.py", "bias_resistor.py", "mirror_fingers.py",
         "latchup_test_structures.py", "switch_bank.py", "pad_driver.py", "pad_driver_open_ring.py",
         "pad_driver_no_ring.py"]
    )


def test_clean_inverter_row():
    status, report = check_example("inverter_row.py")
    assert report["findings"] == []
    assert status == 0
    run = report["runs"][0]
    assert run["status"] == "ok"
    # INV_X1, TAP, CLKBUF_ROW and CLKBUF_BLOCK.
    assert run["cells"] == 4
    assert report["summary"] == {"error": 0, "warning": 0, "info": 0}


def test_sparse_tap_row_flags_the_last_pmos():
    name = "sparse_tap_row.py"
    status, report = check_example(name)
    assert status == 1
    [finding] = report["findings"]
    file = f"examples/{name}"
    assert finding["rule"] == "tap-distance"
    assert finding["severity"] == "error"
    assert (finding["file"], finding["line"]) == (file, line_of(name, "box(cell, ACTIVE, 0.5, 6.0, 2.5, 8.2)  # PMOS"))
    assert frames(finding) == [
        (file, line_of(name, "box(cell, ACTIVE, 0.5, 6.0, 2.5, 8.2)"), "inverter"),
        (file, line_of(name, "inv, tap = inverter(), nwell_tap()"), "shift_register_row"),
        (file, line_of(name, "row, leaf_cells = shift_register_row("), "<module>"),
    ]
    # 14 bits in groups of 7: the second group's tap cell is at x = 2 + 7 * 3 = 23, and
    # its seventh inverter (column 6 of that array) is the one past the last tap.
    assert finding["placements"] == [{
        "file": file, "line": line_of(name, "row.add(gdstk.Reference(inv,"),
        "cell": "GAIN_SR_ROW", "instance": "SR_INV[6,0]",
    }]
    # Farthest point: the PMOS's lower right corner, x = 23 + 2 + 6 * 3 + 2.5 = 45.5,
    # y = 6.0. Nearest n-tap corner: (23 + 1.5, 8.8).
    assert finding["location"] == pytest.approx([45.5, 6.0], abs=1e-3)
    assert finding["value"] == pytest.approx(math.hypot(45.5 - 24.5, 8.8 - 6.0), abs=2e-3)
    assert finding["limit"] == 20.0  # demo.toml [rules.tap-distance] limit
    assert finding["bbox"] == pytest.approx([43.5, 6.0, 45.5, 8.2], abs=1e-6)
    [tap] = finding["related"]
    assert (tap["file"], tap["line"]) == (file, line_of(name, "box(cell, ACTIVE, 0.5, 8.8, 1.5, 9.7)"))
    assert tap["location"] == pytest.approx([24.5, 8.8], abs=1e-3)


def test_bias_resistor_well_floats():
    name = "bias_resistor.py"
    status, report = check_example(name)
    assert status == 1
    [finding] = report["findings"]
    file = f"examples/{name}"
    assert finding["rule"] == "floating-well"
    assert finding["severity"] == "error"
    assert finding["line"] == line_of(name, "box(cell, NWELL, x0 - 2.0, y0 - 2.0,")
    assert frames(finding) == [
        (file, finding["line"], "pplus_resistor"),
        (file, line_of(name, "pplus_resistor(top, 0.0, 0.0, legs=6, length=16.0)"), "<module>"),
    ]
    # Six legs of width 1 at pitch 2.5, 16 long, with a 2 um well margin.
    assert finding["bbox"] == pytest.approx([-2.0, -2.0, 6 * 2.5 - 1.5 + 2.0, 18.0], abs=1e-6)
    [device] = finding["related"]
    assert device["line"] == line_of(name, "box(cell, ACTIVE, x, y0, x + width, y0 + length)")


def test_mirror_centre_tap_has_no_contact():
    name = "mirror_fingers.py"
    status, report = check_example(name)
    assert status == 1  # a warning fails at the default --fail-on warning
    [finding] = report["findings"]
    file = f"examples/{name}"
    assert finding["rule"] == "uncontacted-tap"
    assert finding["severity"] == "warning"
    # The tap helper's own diffusion line is the one that draws on one layer only;
    # the call that asked for the centre strip is the next frame.
    assert frames(finding)[:2] == [
        (file, line_of(name, "box(cell, ACTIVE, x0, y0, x1, y1)"), "ntap"),
        (file, line_of(name, "# between the halves"), "mirror_pair"),
    ]
    assert finding["line"] == frames(finding)[0][1]
    # Each half is 0.8 + 8 * 1.3 = 11.2 long; the centre strip spans half + 0.5 .. half + 1.5.
    assert finding["bbox"] == pytest.approx([11.7, 0.0, 12.7, 4.0], abs=1e-6)


def test_latchup_test_structures_suppressed_on_the_calling_line():
    status, report = check_example("latchup_test_structures.py")
    assert report["findings"] == []
    assert status == 0


def test_latchup_test_structures_without_the_comment(tmp_path):
    """The same script without its suppression comment: the 30 um structure's two
    emitters are flagged, so the empty report above is the comment's doing."""
    name = "latchup_test_structures.py"
    text = (EXAMPLES / name).read_text(encoding="utf-8")
    marker = "  # latchwatch: ignore[tap-distance]"
    assert text.count(marker) == 1
    (tmp_path / name).write_text(text.replace(marker, ""), encoding="utf-8")
    status, report, _ = run_check(Path(name), tmp_path)
    assert status == 1
    findings = report["findings"]
    assert [f["rule"] for f in findings] == ["tap-distance", "tap-distance"]
    call = line_of(name, "x += pnpn_structure(chip, x, 30.0)")
    assert sorted(f["line"] for f in findings) == sorted(
        [line_of(name, "# N+ emitter"), line_of(name, "# P+ emitter")]
    )
    for f in findings:
        assert f["stack"][-1]["line"] == call
        # Emitter 2 wide, tap 30 from its near edge: 32 from its far edge.
        assert f["value"] == pytest.approx(32.0, abs=2e-3)


def test_switch_bank_raises_for_one_entry():
    name = "switch_bank.py"
    status, report = check_example(name)
    assert status == 1
    [finding] = report["findings"]
    file = f"examples/{name}"
    assert finding["rule"] == "script-error"
    assert finding["severity"] == "error"
    assert finding["line"] == line_of(name, "raise ValueError(")
    assert frames(finding) == [
        (file, finding["line"], "switch"),
        (file, line_of(name, "cell, length = switch(name, width, fingers)"), "<module>"),
    ]
    assert "ValueError" in finding["message"] and "SW8" in finding["message"]
    assert report["runs"][0]["status"] != "ok"


def run_devices(script: Path, cwd: Path) -> dict:
    proc = subprocess.run(
        [latchwatch(), "check", str(script), "--tech", "demo", "--format", "json", "--devices"],
        cwd=cwd, capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode in (0, 1), f"exit {proc.returncode}\n{proc.stderr}"
    return json.loads(proc.stdout)


def split_rule(report: dict, rule: str) -> list[dict]:
    """The findings of ``rule``; the rest are returned to the caller's report."""
    found = [f for f in report["findings"] if f["rule"] == rule]
    report["findings"] = [f for f in report["findings"] if f["rule"] != rule]
    return found


OUTPUT_TRANSISTOR = "box(cell, ACTIVE, x0, y0, x0 + DEVICE_W, y0 + DEVICE_H)  # output transistor"


def injections(name: str) -> dict[str, dict]:
    """The ``injection`` objects of the devices table, by device kind (one injector of each)."""
    rows = [d for d in run_devices(Path("examples") / name, ROOT)["devices"] if "injection" in d]
    assert sorted(d["kind"] for d in rows) == ["ndiff", "pdiff"]
    for d in rows:
        shares = d["injection"]["collected"]
        # Every injected carrier is collected or recombines: the shares add up to one.
        assert sum(c["fraction"] for c in shares) == pytest.approx(1.0, abs=1e-4)
        assert d["injection"]["current_a"] == 0.1  # demo.toml injection_current
        assert d["line"] == line_of(name, OUTPUT_TRANSISTOR)
    return {d["kind"]: {**d["injection"], "row_body": d["body"]} for d in rows}


def test_pad_driver_with_closed_rings_is_clean():
    name = "pad_driver.py"
    status, report = check_example(name)
    assert report["findings"] == []
    assert status == 0
    # The drains reach the PAD_SDO label through metal1, via1 and metal2; the sources the
    # rail labels through the ring metal: the devices table names both nets of each.
    devices = run_devices(Path("examples") / name, ROOT)["devices"]
    pads = [d for d in devices if d["net"]]
    assert sorted((d["kind"], d["net"]) for d in pads) == [("ndiff", "PAD_SDO,VSS"), ("pdiff", "PAD_SDO,VDD")]
    assert {d["line"] for d in pads} == {line_of(name, OUTPUT_TRANSISTOR)}
    # The outer rings collect what gets past the inner ones: nothing reaches a body with an
    # emitter in it (the n-well ring holds no P+ device, the P+ ring fences the substrate).
    found = injections(name)
    assert found["ndiff"]["worst_bias_v"] == 0 and found["pdiff"]["worst_bias_v"] == 0
    kinds = {c["kind"] for c in found["ndiff"]["collected"]}
    assert kinds == {"p-tap", "n-tap ring", "recombination"}


def test_pad_driver_open_ring_names_the_gap():
    name = "pad_driver_open_ring.py"
    status, report = check_example(name)
    assert status == 1
    report = json.loads(json.dumps(report))
    [bias] = split_rule(report, "injection-bias")
    # Single rings: the holes the PMOS injects get past its N+ ring into the substrate, and
    # the current reaches the pre-driver's NMOS (x = -36 + 6 .. -36 + 10) before a p-tap.
    assert (bias["line"], bias["unit"], bias["limit"]) == (line_of(name, OUTPUT_TRANSISTOR), "V", 0.7)
    assert bias["message"].startswith("P+ transistor diffusion: of 100 mA holes injected")
    assert "reaches the substrate psub" in bias["message"] and bias["value"] > 0.7
    [emitter] = bias["related"]
    assert emitter["line"] == line_of(name, "# pre-driver NMOS")
    assert -30.0 <= emitter["location"][0] <= -26.0
    found = injections(name)
    assert found["pdiff"]["worst_bias_v"] == pytest.approx(bias["value"], rel=1e-5)
    # The electrons that pass under and through the open P+ ring reach the pre-driver's
    # n-well too, but build less than vbe_on there at 25 C.
    wells = [c for c in found["ndiff"]["collected"] if c["kind"] == "n-well" and c.get("bias_v", 0) > 0]
    assert len(wells) == 1 and 0 < wells[0]["bias_v"] < 0.7 and wells[0]["current_a"] > 1e-4
    [finding] = report["findings"]
    file = f"examples/{name}"
    assert finding["rule"] == "io-guard-ring"
    assert finding["severity"] == "error"
    assert frames(finding) == [
        (file, line_of(name, "box(cell, ACTIVE, x0, y0, x0 + DEVICE_W, y0 + DEVICE_H)  # output transistor"),
         "output_transistor"),
        (file, line_of(name, "n_drain, n_bar = output_transistor(cell, NPLUS, 0.0, 0.0, gate_below=True)"),
         "sdo_driver"),
        (file, line_of(name, "lib.add(sdo_driver())"), "<module>"),
    ]
    # The gap: the gate bar at y = -2..-1 plus 0.2 um each side, in the left side of the
    # ring (x = -5..-3): 1.4 um wide, centred at (-4, -1.5).
    assert finding["value"] == pytest.approx(1.4, abs=1e-3)
    assert finding["location"] == pytest.approx([-4.0, -1.5], abs=0.05)
    assert "open P+ guard ring" in finding["message"] and "gap of 1.40 um at (-4.00, -1.50)" in finding["message"]
    assert finding["bbox"] == pytest.approx([0.0, 0.0, 13.0, 6.0], abs=1e-6)
    [ring] = finding["related"]
    assert (ring["file"], ring["line"]) == (file, line_of(name, "box(cell, ACTIVE, *side)  # ring side"))


def test_pad_driver_without_rings_is_flagged_both_ways():
    name = "pad_driver_no_ring.py"
    status, report = check_example(name)
    assert status == 1
    report = json.loads(json.dumps(report))
    biases = split_rule(report, "injection-bias")
    rings = split_rule(report, "io-guard-ring")
    assert report["findings"] == []
    line = line_of(name, OUTPUT_TRANSISTOR)
    assert sorted(f["message"].split(" ")[1] for f in rings) == ["N+", "P+"]  # "pad-connected N+ ..."
    assert sorted(f["message"].split(" ")[0] for f in biases) == ["N+", "P+"]
    found = injections(name)
    for f in biases:
        assert (f["line"], f["limit"]) == (line, 0.7) and f["value"] > 0.7
        kind = "ndiff" if f["message"].startswith("N+") else "pdiff"
        assert f["value"] == pytest.approx(found[kind]["worst_bias_v"], rel=1e-5)
    # Nothing collects the electrons first: a large share reaches the pre-driver's n-well
    # (the core), and the bias there is far above vbe_on too.
    pad_well = found["pdiff"]["row_body"]
    core = [c for c in found["ndiff"]["collected"] if c["kind"] == "n-well" and c["body"] != pad_well]
    assert len(core) == 1 and core[0]["current_a"] > 1e-3 and core[0]["bias_v"] > 0.7
