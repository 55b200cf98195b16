"""The show-page command end to end: a code action on a finding offers it, executing it
writes the document's page and asks the client to open it outside the editor."""

from __future__ import annotations

import ast
from html.parser import HTMLParser
from pathlib import Path

from lsprotocol import types
from pygls.uris import to_fs_path

from lsp_client import LOOP_LINE, make_project, trusted


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.findings = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "li" and "item" in (attrs.get("class") or ""):
            self.findings.append(attrs)


def _command(action) -> types.Command:
    """The command of a code action. This client's converter reads a CodeAction that
    carries a command as a Command (the union's first match) whose ``command`` is the
    inner Command's dict as text; the server sent a proper CodeAction."""
    inner = action.command
    if isinstance(inner, types.Command):
        return inner
    if isinstance(inner, str) and inner.startswith("{"):
        return types.Command(**ast.literal_eval(inner))
    return action


async def test_code_action_command_writes_and_opens_the_page(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    page = tmp_path / "pages" / "{stem}.html"
    result = await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj", pagePath=str(page)))
    assert "latchwatch.showPage" in result.capabilities.execute_command_provider.commands
    uri = s.open(script)
    published = await s.published_for(uri, version=1, where=lambda p: len(p.diagnostics) == 1)
    line = types.Range(types.Position(LOOP_LINE, 0), types.Position(LOOP_LINE, 0))
    actions = await s.client.text_document_code_action_async(types.CodeActionParams(
        text_document=types.TextDocumentIdentifier(uri), range=line,
        context=types.CodeActionContext(diagnostics=published.diagnostics)))
    (offer,) = [_command(a) for a in actions if a.command is not None]
    assert offer.title == "Show the layout page (latchwatch)"
    answer = await s.client.workspace_execute_command_async(types.ExecuteCommandParams(
        command=offer.command, arguments=offer.arguments))
    written = tmp_path / "pages" / "cell.html"
    assert Path(to_fs_path(answer["uri"])) == written
    (params,) = s.client.shown_documents  # pytest-lsp's client records window/showDocument
    assert params.external is True and Path(to_fs_path(params.uri)) == written
    parser = _Tags()
    parser.feed(written.read_text(encoding="utf-8"))
    # The two failing diffusions of the loop (lsp_client.CELL), each with its marker.
    assert len(parser.findings) == 2


async def test_no_page_offered_on_a_line_without_findings(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj"))
    uri = s.open(script)
    await s.published_for(uri, version=1, where=lambda p: len(p.diagnostics) == 1)
    first = types.Range(types.Position(0, 0), types.Position(0, 0))
    actions = await s.client.text_document_code_action_async(types.CodeActionParams(
        text_document=types.TextDocumentIdentifier(uri), range=first, context=types.CodeActionContext(diagnostics=[])))
    assert not [a for a in actions or [] if a.command is not None]
