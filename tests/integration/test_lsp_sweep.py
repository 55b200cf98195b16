"""Parameter corners in the editor, end to end through `latchwatch serve`: the
configured corners of the open document run with work-done progress and merge into
one diagnostic per line, worst corner first; a file that only defines generator
functions is previewed. The generator and its figures are those of tests/server/test_sweep.py
(demo technology, 20 um tap-distance limit, invented)."""

from __future__ import annotations

import textwrap

from lsprotocol import types

from builders import DIFFUSION_LINE, GENERATOR, RAISE_LINE
from lsp_client import capabilities, trusted, wait_until

SWEEP = textwrap.dedent('''\
    [[sweep]]
    script = "fingers.py"
    function = "finger_array"
    params = { fingers = [0, 4, 16, 20], w = [2.0] }
    ''')


def make(folder, config_extra="", script=GENERATOR):
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "latchwatch.toml").write_text('tech = "demo"\n' + config_extra)
    path = folder / "fingers.py"
    path.write_text(script)
    return path


async def test_configured_corners_merge_worst_first_with_progress(tmp_path, session):
    # Each corner sleeps, so the run outlasts the 1 s before progress is shown.
    slow = GENERATOR.replace("import gdstk\n", "import time\nimport gdstk\ntime.sleep(0.8)\n", 1)
    script = make(tmp_path / "proj", SWEEP, slow)
    s = session()
    await s.start(tmp_path / "proj", caps=capabilities(progress=True), options=trusted(tmp_path / "proj"))
    uri = s.open(script)
    published = await s.published_for(uri, version=1, timeout=60)
    by_line = {d.range.start.line + 1: d for d in published.diagnostics}
    assert set(by_line) == {DIFFUSION_LINE + 2, RAISE_LINE + 2}  # two lines added above
    tap = by_line[DIFFUSION_LINE + 2]
    assert tap.message.startswith("at fingers=20, 2 of 4 corners: P+ transistor diffusion is 31.50 um")
    assert tap.message.endswith("; also at fingers=16")
    assert tap.code == "tap-distance" and tap.severity == types.DiagnosticSeverity.Error
    assert by_line[RAISE_LINE + 2].message == (
        "at fingers=0, 1 of 4 corners: script raised ValueError: fingers must be at least 1, got 0")
    await wait_until(lambda: any(isinstance(r[-1], types.WorkDoneProgressEnd)
                                 for r in s.client.progress_reports.values() if r), what="progress end")
    (reports,) = [r for r in s.client.progress_reports.values() if r]
    messages = [r.message for r in reports if isinstance(r, (types.WorkDoneProgressBegin, types.WorkDoneProgressReport))]
    assert any(m.endswith("of 4 corners") for m in messages), messages
    hover = await s.client.text_document_hover_async(types.HoverParams(
        types.TextDocumentIdentifier(uri), types.Position(DIFFUSION_LINE + 1, 8)))
    assert hover.contents.value.startswith("**at fingers=20**, the worst of 4 corners on this line")


async def test_a_file_of_generator_functions_is_previewed(tmp_path, session):
    script = make(tmp_path / "proj")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj"))
    uri = s.open(script)
    (diagnostic,) = (await s.published_for(uri, version=1, timeout=60)).diagnostics
    assert diagnostic.range.start.line + 1 == DIFFUSION_LINE
    assert diagnostic.message.startswith("in wide_pair(): P+ transistor diffusion is 25.50 um")
