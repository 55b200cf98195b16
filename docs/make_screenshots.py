"""Regenerate the README's screenshot of the page: `python docs/make_screenshots.py`.

Runs `latchwatch check examples/sparse_tap_row.py --tech demo --html ...` and renders the
page in headless Chromium (Debian's `chromium`) into docs/page-sparse-tap-row.png; the
same for examples/pad_driver_open_ring.py with the sheet potential map shown.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests" / "integration"))

from browser import screenshot  # noqa: E402  (the tests' Chromium helper, one definition)

SHOTS = {
    "page-sparse-tap-row.png": ("examples/sparse_tap_row.py", ""),
    "page-pad-driver-open-ring.png": ("examples/pad_driver_open_ring.py", "hide=m-tapdist&show=m-sheet0"),
}


def main() -> None:
    exe = Path(sys.executable).with_name("latchwatch")
    command = str(exe) if exe.exists() else shutil.which("latchwatch")
    with tempfile.TemporaryDirectory() as tmp:
        for name, (script, fragment) in SHOTS.items():
            page = Path(tmp) / "page.html"
            subprocess.run([command, "check", script, "--tech", "demo", "--html", str(page)], cwd=ROOT,
                           capture_output=True, check=False)
            screenshot(page, ROOT / "docs" / name, fragment, width=1400, height=760)
            print(f"docs/{name}")


if __name__ == "__main__":
    main()
