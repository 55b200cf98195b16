"""Where the suite finds the repository's own files (one definition for every test)."""

from pathlib import Path

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent
BENCH = TESTS / "bench"
DATA = TESTS / "data"
EXAMPLES = ROOT / "examples"
EDITOR_CONFIGS = ROOT / "editor-configs"
