"""Code actions on latchwatch diagnostics: suppression comments (docs/suppression.md),
and the command that writes the page of the current document (server/pictures/) and
opens it with window/showDocument."""

from __future__ import annotations

import asyncio
import hashlib
import os
from dataclasses import replace
from pathlib import Path

from lsprotocol import types
from pygls.uris import from_fs_path, to_fs_path

from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.server.config.trust import is_trusted
from latchwatch.server.lsp import convert
from latchwatch.server.lsp.settings import document_settings
from latchwatch.server.pictures.page import write_page
from latchwatch.server.pictures.scene import capture
from latchwatch.server.runs import batch, plan
from latchwatch.server.runs.pipeline import read_text_or_none
from latchwatch.server.runs.suppression import add_suppression

SHOW_PAGE = "latchwatch.showPage"
PAGE_TITLE = "Show the layout page (latchwatch)"


def suppression_actions(ls, params: types.CodeActionParams) -> list[types.CodeAction]:
    """Per latchwatch diagnostic in range: suppress its rule on its line; per line: suppress
    every latchwatch finding there (docs/suppression.md)."""
    uri = params.text_document.uri
    document = ls.workspace.get_text_document(uri)
    lines = document.lines
    wanted = _ours(ls, params)
    actions, every_done = [], set()
    for diagnostic in wanted:
        line, rule = diagnostic.range.start.line, diagnostic.code
        if rule not in RULES_BY_ID or line >= len(lines):
            continue
        for chosen, title in ((rule, f"Suppress {rule} on this line"),
                              (None, "Suppress every latchwatch finding on this line")):
            if chosen is None and line in every_done:
                continue
            every_done.add(line) if chosen is None else None
            try:
                new_text = add_suppression(lines[line], chosen)
            except ValueError as error:
                ls.log(f"no suppression for line {line + 1}: {error}")
                break
            end = types.Position(line, convert.line_length(lines[line].rstrip("\r\n"), ls.encoding))
            edit = types.TextEdit(range=types.Range(types.Position(line, 0), end), new_text=new_text.rstrip("\r\n"))
            actions.append(types.CodeAction(
                title=title, kind=types.CodeActionKind.QuickFix, diagnostics=[diagnostic],
                edit=types.WorkspaceEdit(changes={uri: [edit]}), is_preferred=chosen is not None))
    return actions


def _ours(ls, params: types.CodeActionParams) -> list[types.Diagnostic]:
    """The latchwatch diagnostics of the request; some clients send no context: ours on the requested lines."""
    wanted = [d for d in (params.context.diagnostics or []) if d.source == convert.SOURCE]
    if not wanted:
        first, last = params.range.start.line, params.range.end.line
        wanted = [d for d in ls.diagnostics_of(params.text_document.uri) if first <= d.range.start.line <= last]
    return wanted


def page_actions(ls, params: types.CodeActionParams) -> list[types.CodeAction]:
    """One action on lines with latchwatch findings: write and open the document's page."""
    if not any(d.code in RULES_BY_ID for d in _ours(ls, params)):
        return []
    uri = params.text_document.uri
    return [types.CodeAction(title=PAGE_TITLE, diagnostics=_ours(ls, params),
                             command=types.Command(title=PAGE_TITLE, command=SHOW_PAGE, arguments=[uri]))]


def page_file(path: Path, editor_page: str | None, project_page: Path | None, cache: Path) -> Path:
    """Where the page of ``path`` goes: the editor setting (``{stem}`` replaced), the
    project's ``html``, else a file per document in the cache folder."""
    if editor_page:
        chosen = Path(os.path.expanduser(editor_page.replace("{stem}", path.stem)))
        return chosen if chosen.is_absolute() else path.parent / chosen
    if project_page is not None:
        return project_page
    digest = hashlib.sha256(str(path).encode()).hexdigest()[:10]
    return cache / "latchwatch" / "pages" / f"{path.stem}-{digest}.html"


def _cache_folder() -> Path:
    base = os.environ.get("XDG_CACHE_HOME", "")
    return Path(base) if os.path.isabs(base) else Path.home() / ".cache"


async def show_page(ls, args) -> dict:
    """The command: check the document (its corners, as the diagnostics do) with drawings,
    write its page and ask the client to open it outside the editor. Returns {"uri": ...}."""
    uri = args[0] if isinstance(args, (list, tuple)) and args else args
    if not isinstance(uri, str) or uri not in ls.versions:
        raise ValueError(f"{SHOW_PAGE}: expected the URI of an open document, got {uri!r}")
    path = Path(to_fs_path(uri))
    editor = await ls.settings_for(uri)
    settings = document_settings(path, editor, ls.workspace_folder_of(path), ls.techs)
    if not is_trusted(path, editor.trusted_folders):
        raise ValueError(f"{path}: the folder is not trusted, so latchwatch runs no script there")
    sweeps = plan.configured_sweeps(settings.project, only=path)
    text = ls.workspace.get_text_document(uri).source
    buffers = {to_fs_path(d.uri): d.source for d in ls.workspace.text_documents.values()}
    check = replace(settings.check, draw=capture)

    def run():
        results = batch.check_script(path, check, sweeps, source=text,
                                     read_source=lambda f: buffers.get(f) or read_text_or_none(f))
        report = batch.report_of([r for r in results or [] if r is not None], check)
        target = page_file(path, editor.page_path, settings.project.html, _cache_folder())
        return write_page(report, target, base=settings.root)

    written = await asyncio.get_running_loop().run_in_executor(ls.runs, run)
    page_uri = from_fs_path(str(written))
    ls.log(f"latchwatch page of {path.name}: {written}", types.MessageType.Info)
    await ls.window_show_document_async(types.ShowDocumentParams(uri=page_uri, external=True))
    return {"uri": page_uri}

