"""`latchwatch serve` end to end, driven by pytest-lsp's client over stdio.

Each test starts a real server with a private XDG_CONFIG_HOME (the user's trust store
is never touched) and a project folder holding a latchwatch.toml with the demo
technology (tap-distance limit 20 um, invented; docs/technology.md).
"""

from __future__ import annotations

import asyncio
import json
import re
import select
import stat
import subprocess
import time
import uuid
from pathlib import Path

from lsprotocol import types
from pygls.uris import from_fs_path

from lsp_client import (
    CELL,
    CLEAN,
    FAILING,
    LOOP_LINE,
    SERVER,
    TAP_LINE,
    capabilities,
    make_project,
    trusted,
    wait_until,
)
from procs import processes_with as running_processes_with


async def test_open_publishes_merged_diagnostic_with_related_information(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    result = await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj"))
    assert result.capabilities.diagnostic_provider is None  # this client did not ask for pull
    uri = s.open(script)
    published = await s.published_for(uri, version=1)
    (diagnostic,) = published.diagnostics
    assert diagnostic.range.start.line == LOOP_LINE
    assert (diagnostic.source, diagnostic.code) == ("latchwatch", "tap-distance")
    assert diagnostic.severity == types.DiagnosticSeverity.Error
    assert diagnostic.message.startswith("2 of 3 P+ diffusions drawn here; worst: P+ diffusion is 37.00 um")
    assert "others: 23.00 um" in diagnostic.message
    assert diagnostic.code_description.href.startswith("file://")
    doc = Path(diagnostic.code_description.href[len("file://"):])
    assert doc.read_text().startswith("tap-distance (error)")
    related = {(r.location.uri, r.location.range.start.line, r.message.split(" at ")[0])
               for r in diagnostic.related_information}
    assert (uri, TAP_LINE, "nearest n-well tap") in related


async def test_edit_updates_and_close_clears(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj"))
    uri = s.open(script)
    await s.published_for(uri, version=1, where=lambda p: len(p.diagnostics) == 1)
    # Move the third diffusion from x=28 to x=8: the three now abut or overlap (0..8, 8..16,
    # 14..22), one diffusion whose farthest point is 23 um from the tap.
    loop_text = "for x in (0, 14, 28):"
    s.edit_line(uri, 2, LOOP_LINE - 1, loop_text.index("28"), loop_text.index("28") + 2, "8")
    published = await s.published_for(uri, version=2)
    (diagnostic,) = published.diagnostics
    assert diagnostic.message.startswith("P+ diffusion is 23.00 um")
    s.edit_line(uri, 3, LOOP_LINE - 1, loop_text.index("14"), loop_text.index("14") + 2, "4")
    assert (await s.published_for(uri, version=3)).diagnostics == []
    s.client.text_document_did_close(types.DidCloseTextDocumentParams(types.TextDocumentIdentifier(uri)))
    await wait_until(lambda: s.last(uri).version is None, what="clearing on close")
    assert s.last(uri).diagnostics == []


async def test_unsaved_buffer_runs_under_its_real_name(tmp_path, session):
    # The file on disk is clean; the buffer differs. Siblings stay importable.
    folder = tmp_path / "proj"
    script = make_project(folder, CLEAN)
    (folder / "spacing.py").write_text("XS = (0, 14, 28)\n")
    buffer = CELL.replace("import gdstk\n", "import gdstk\nfrom spacing import XS\n")
    s = session()
    await s.start(folder, options=trusted(folder))
    uri = s.open(script, text=buffer)
    (diagnostic,) = (await s.published_for(uri, version=1)).diagnostics
    assert diagnostic.range.start.line == LOOP_LINE + 1


def slow_script(token: str) -> str:
    """Sleeps, with a marker process named ``token``: a child is started (or forked) before its
    script is known, so its own command line cannot name the script."""
    return f"import subprocess, time\nsubprocess.Popen(['sh', '-c', 'sleep 30; true', {token!r}])\ntime.sleep(30)\n"


async def test_stale_result_loses_the_race_and_its_child_is_killed(tmp_path, session):
    token = f"slow_{uuid.uuid4().hex}"
    slow = slow_script(token) + FAILING
    script = make_project(tmp_path / "proj", slow, name=f"{token}.py")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj", timeout=60))
    uri = s.open(script)
    await wait_until(lambda: running_processes_with(token), what="the slow child to start")
    s.replace_all(uri, 2, slow, CLEAN)
    published = await s.published_for(uri, version=2)
    assert published.diagnostics == []
    await wait_until(lambda: not running_processes_with(token), timeout=5, what="the superseded child to die")
    assert all(p.version != 1 for p in s.published if p.uri == uri)


async def test_closing_during_a_run_kills_the_child(tmp_path, session):
    token = f"slow_{uuid.uuid4().hex}"
    script = make_project(tmp_path / "proj", slow_script(token), name=f"{token}.py")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj", timeout=60))
    uri = s.open(script)
    await wait_until(lambda: running_processes_with(token), what="the slow child to start")
    s.client.text_document_did_close(types.DidCloseTextDocumentParams(types.TextDocumentIdentifier(uri)))
    await wait_until(lambda: not running_processes_with(token), timeout=5, what="the child to die on close")


async def test_pull_diagnostics_with_result_ids(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    result = await s.start(tmp_path / "proj", caps=capabilities(pull=True), options=trusted(tmp_path / "proj"))
    assert result.capabilities.diagnostic_provider.identifier == "latchwatch"
    uri = s.open(script)
    report = await s.client.text_document_diagnostic_async(
        types.DocumentDiagnosticParams(text_document=types.TextDocumentIdentifier(uri)))
    assert report.kind == "full" and report.result_id
    assert [d.range.start.line for d in report.items] == [LOOP_LINE]
    again = await s.client.text_document_diagnostic_async(types.DocumentDiagnosticParams(
        text_document=types.TextDocumentIdentifier(uri), previous_result_id=report.result_id))
    assert again.kind == "unchanged" and again.result_id == report.result_id
    await s.published_for(uri, version=1)  # push stays on


async def test_hover_on_a_line_that_drew_diffusions(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj"))
    uri = s.open(script)
    await s.published_for(uri, version=1)
    hover = await s.client.text_document_hover_async(types.HoverParams(
        text_document=types.TextDocumentIdentifier(uri), position=types.Position(LOOP_LINE, 8)))
    text = hover.contents.value
    assert "**3 P+ diffusions** drawn on this line" in text
    assert "worst 37.00 um, best 9.00 um (limit 20.00 um)" in text
    nothing = await s.client.text_document_hover_async(types.HoverParams(
        text_document=types.TextDocumentIdentifier(uri), position=types.Position(0, 0)))
    assert nothing is None


async def test_code_actions_suppress_the_rule_or_everything(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj"))
    uri = s.open(script)
    (diagnostic,) = (await s.published_for(uri, version=1)).diagnostics
    actions = await s.client.text_document_code_action_async(types.CodeActionParams(
        text_document=types.TextDocumentIdentifier(uri), range=diagnostic.range,
        context=types.CodeActionContext(diagnostics=[diagnostic])))
    titles = [a.title for a in actions]
    assert titles == ["Suppress tap-distance on this line", "Suppress every latchwatch finding on this line",
                      "Show the layout page (latchwatch)"]  # the last runs a command (test_lsp_page.py)
    line = FAILING.splitlines()[LOOP_LINE]
    (edit,) = actions[0].edit.changes[uri]
    assert edit.range.start == types.Position(LOOP_LINE, 0) and edit.range.end == types.Position(LOOP_LINE, len(line))
    assert edit.new_text == line + "  # latchwatch: ignore[tap-distance]"
    assert actions[1].edit.changes[uri][0].new_text == line + "  # latchwatch: ignore"
    # Applying the edit to the buffer suppresses the finding.
    s.edit_line(uri, 2, LOOP_LINE, 0, len(line), edit.new_text)
    assert (await s.published_for(uri, version=2)).diagnostics == []


async def test_untrusted_folder_runs_nothing_until_trusted(tmp_path, session, env):
    raising = FAILING + "raise RuntimeError('this must not run')\n"
    script = make_project(tmp_path / "proj", raising)
    s = session()
    await s.start(tmp_path / "proj", options={"latchwatch": {"debounce": 50}})
    uri = s.open(script)
    (notice,) = (await s.published_for(uri, version=1)).diagnostics
    assert notice.severity == types.DiagnosticSeverity.Information and notice.range.start.line == 0
    assert f"latchwatch trust {tmp_path / 'proj'}" in notice.message
    # A project file cannot grant trust: it is rejected, and nothing still runs.
    (tmp_path / "proj" / "latchwatch.toml").write_text('tech = "demo"\ntrusted = true\n')
    s.client.text_document_did_save(types.DidSaveTextDocumentParams(types.TextDocumentIdentifier(uri)))
    await asyncio.sleep(0.5)
    assert [d.code for d in s.last(uri).diagnostics] == ["trust"]
    (tmp_path / "proj" / "latchwatch.toml").write_text('tech = "demo"\n')
    subprocess.run(SERVER[:-1] + ["trust", str(tmp_path / "proj")], env=env, check=True, capture_output=True)
    s.client.text_document_did_save(types.DidSaveTextDocumentParams(types.TextDocumentIdentifier(uri)))
    published = await s.published_for(uri, where=lambda p: any(d.code == "script-error" for d in p.diagnostics))
    (error,) = published.diagnostics  # a script that raised has no layout to check
    assert error.range.start.line == len(FAILING.splitlines()) and "this must not run" in error.message


async def test_settings_from_configuration_and_changes(tmp_path, session):
    proj = tmp_path / "proj"
    script = make_project(proj, FAILING + "print('hello from the cell')\n")
    s = session()
    await s.start(proj, caps=capabilities(configuration=True), options=trusted(proj),
                  configuration={"": {"severity": {"tap-distance": "warning"}}})
    uri = s.open(script)
    (diagnostic,) = (await s.published_for(uri, version=1)).diagnostics
    assert diagnostic.severity == types.DiagnosticSeverity.Warning  # editor setting over the default
    await wait_until(lambda: any("hello from the cell" in m.message for m in s.client.log_messages),
                     what="the script's output in the log")
    s.client.set_configuration({"disable": ["tap-distance"]}, section="latchwatch")
    s.client.workspace_did_change_configuration(types.DidChangeConfigurationParams(
        settings={"latchwatch": {"disable": ["tap-distance"]}}))
    await s.published_for(uri, version=1, where=lambda p: p.diagnostics == [])


async def test_save_only_mode_waits_for_save(tmp_path, session):
    script = make_project(tmp_path / "proj")
    s = session()
    await s.start(tmp_path / "proj", options=trusted(tmp_path / "proj", runOn="save"))
    uri = s.open(script)
    await s.published_for(uri, version=1)
    s.replace_all(uri, 2, FAILING, CLEAN)
    await asyncio.sleep(1.0)
    assert s.last(uri).version == 1
    s.client.text_document_did_save(types.DidSaveTextDocumentParams(types.TextDocumentIdentifier(uri)))
    assert (await s.published_for(uri, version=2)).diagnostics == []


async def test_multi_root_folders_use_their_own_project_files(tmp_path, session):
    one = make_project(tmp_path / "one")
    two = make_project(tmp_path / "two", extra_config='severity = { tap-distance = "info" }\n')
    s = session()
    folders = [types.WorkspaceFolder(from_fs_path(str(tmp_path / n)), n) for n in ("one", "two")]
    await s.start(tmp_path, folders=folders, options={"latchwatch": {"trustedFolders": [str(tmp_path)]}})
    uri_one, uri_two = s.open(one), s.open(two)
    (first,) = (await s.published_for(uri_one, version=1)).diagnostics
    (second,) = (await s.published_for(uri_two, version=1)).diagnostics
    assert first.severity == types.DiagnosticSeverity.Error
    assert second.severity == types.DiagnosticSeverity.Information


async def test_finding_in_a_helper_module_shows_at_the_call(tmp_path, session):
    proj = tmp_path / "proj"
    helper_lines = [
        "import gdstk",
        "",
        "",
        "def strip(cell):",
        "    for x in (0, 14, 28):",
        "        cell.add(gdstk.rectangle((x, 0), (x + 8, 4), layer=2))",
        "        cell.add(gdstk.rectangle((x - 0.2, -0.2), (x + 8.2, 4.2), layer=5))",
    ]
    make_project(proj, "\n".join(helper_lines) + "\n", name="helper.py")
    main = "\n".join(FAILING.splitlines()[:8] + ["import helper", "helper.strip(cell)"]) + "\n"
    script = proj / "main.py"
    script.write_text(main)
    s = session()
    await s.start(proj, options=trusted(proj))
    uri = s.open(script)
    (here,) = (await s.published_for(uri, version=1)).diagnostics
    assert here.range.start.line == 9 and here.message.startswith("drawn at helper.py:6 through this call")
    helper_uri = from_fs_path(str(proj / "helper.py"))
    (there,) = (await s.published_for(helper_uri)).diagnostics
    assert there.range.start.line == 5


async def test_utf8_position_encoding_when_the_client_asks(tmp_path, session):
    script = make_project(tmp_path / "proj", FAILING.replace(
        "    cell.add(gdstk.rectangle((x, 0)", "    µ = 1; cell.add(gdstk.rectangle((x, 0)"))
    s = session()
    result = await s.start(tmp_path / "proj", caps=capabilities(encodings=["utf-8"]), options=trusted(tmp_path / "proj"))
    assert result.capabilities.position_encoding == "utf-8"
    uri = s.open(script)
    (diagnostic,) = (await s.published_for(uri, version=1)).diagnostics
    line = script.read_text().splitlines()[LOOP_LINE]
    # The range starts at `cell.add`, which follows a 2-byte character.
    assert diagnostic.range.start.character == len(line[:line.index("cell.add")].encode("utf-8"))


async def test_long_runs_report_progress(tmp_path, session):
    script = make_project(tmp_path / "proj", "import time\ntime.sleep(1.6)\n" + FAILING)
    s = session()
    await s.start(tmp_path / "proj", caps=capabilities(progress=True), options=trusted(tmp_path / "proj"))
    uri = s.open(script)
    await s.published_for(uri, version=1)
    await wait_until(lambda: any(isinstance(r[-1], types.WorkDoneProgressEnd)
                                 for r in s.client.progress_reports.values() if r), what="progress end")
    (reports,) = [r for r in s.client.progress_reports.values() if r]
    assert isinstance(reports[0], types.WorkDoneProgressBegin) and "cell.py" in reports[0].message


# --- bad input on the wire, below the client library --------------------------------

def frame(body: bytes) -> bytes:
    return b"Content-Length: %d\r\n\r\n" % len(body) + body


def read_message(stream, timeout: float = 10.0) -> dict:
    deadline = time.monotonic() + timeout
    header = b""
    while not header.endswith(b"\r\n\r\n"):
        if not select.select([stream], [], [], max(0.0, deadline - time.monotonic()))[0]:
            raise AssertionError("no answer from the server")
        header += stream.read(1)
    length = int(header.split(b"Content-Length:")[1].split(b"\r\n")[0])
    return json.loads(stream.read(length))


def read_response(stream, msg_id) -> dict:
    while True:
        message = read_message(stream)
        if "method" not in message and message.get("id") == msg_id:
            return message


def test_malformed_messages_get_error_responses(tmp_path, env):
    server = subprocess.Popen(SERVER, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                              env=env, bufsize=0)
    try:
        def send(payload):
            return server.stdin.write(frame(payload if isinstance(payload, bytes) else json.dumps(payload).encode()))
        send({"jsonrpc": "2.0", "id": 1, "method": "initialize",
              "params": {"processId": None, "rootUri": None, "capabilities": {}}})
        assert "capabilities" in read_response(server.stdout, 1)["result"]
        send(b"{this is not json")
        assert read_response(server.stdout, None)["error"]["code"] == -32700  # JSON-RPC 2.0: parse error
        send([1, 2, 3])
        assert read_response(server.stdout, None)["error"]["code"] == -32600  # invalid request
        send({"jsonrpc": "2.0", "id": 2, "method": "latchwatch/noSuchMethod", "params": {}})
        assert read_response(server.stdout, 2)["error"]["code"] == -32601  # method not found
        send({"jsonrpc": "2.0", "id": 3, "method": "textDocument/hover", "params": {"position": "nowhere"}})
        assert read_response(server.stdout, 3)["error"]["code"] == -32602  # invalid params
        send({"jsonrpc": "2.0", "id": 4, "method": "textDocument/hover", "params": {
            "textDocument": {"uri": "file:///nowhere/never-opened.py"}, "position": {"line": 0, "character": 0}}})
        assert read_response(server.stdout, 4)["result"] is None
        # Notifications cannot be answered; the server must just survive them.
        send({"jsonrpc": "2.0", "method": "textDocument/didChange", "params": {
            "textDocument": {"uri": "file:///nowhere/never-opened.py", "version": 2},
            "contentChanges": [{"text": "x = 1\n"}]}})
        send({"jsonrpc": "2.0", "method": "textDocument/didOpen", "params": {"textDocument": 42}})
        send({"jsonrpc": "2.0", "method": "$/unknownNotification", "params": {}})
        send({"jsonrpc": "2.0", "id": 6, "method": "textDocument/hover", "params": {
            "textDocument": {"uri": "file:///nowhere/never-opened.py"}, "position": {"line": 0, "character": 0}}})
        assert read_response(server.stdout, 6)["result"] is None
        send({"jsonrpc": "2.0", "id": 5, "method": "shutdown"})
        assert read_response(server.stdout, 5)["result"] is None
        send({"jsonrpc": "2.0", "method": "exit"})
        assert server.wait(timeout=10) == 0
    finally:
        if server.poll() is None:
            server.kill()


def _initialize(token=None) -> bytes:
    params = {"processId": None, "rootUri": None, "capabilities": {}}
    if token is not None:
        params["initializationOptions"] = {"token": token}
    return frame(json.dumps({"jsonrpc": "2.0", "id": 1, "method": "initialize", "params": params}).encode())


def _tcp_exchange(port: int, message: bytes) -> tuple[dict, bool]:
    """Send one message; (the reply, whether the server then closed the connection)."""
    import socket

    with socket.create_connection(("127.0.0.1", port), timeout=10) as connection:
        connection.sendall(message)
        stream = connection.makefile("rb", buffering=0)
        reply = read_response(stream, 1)
        connection.settimeout(2)
        try:
            closed = connection.recv(1) == b""
        except TimeoutError:
            closed = False
    return reply, closed


def test_tcp_serves_loopback_only_and_only_a_client_with_the_token(tmp_path, env):
    # issue 14: any local process could otherwise send trustedFolders and a python setting.
    runtime = tmp_path / "runtime"
    env = {**env, "XDG_RUNTIME_DIR": str(runtime)}
    env.pop("LATCHWATCH_TCP_TOKEN", None)
    refused = subprocess.run(SERVER + ["--tcp", "0.0.0.0:0"], env=env, capture_output=True, text=True, timeout=60)
    assert refused.returncode == 2 and "not a loopback address" in refused.stderr
    server = subprocess.Popen(SERVER + ["--tcp", "127.0.0.1:0"], env=env, stderr=subprocess.PIPE, text=True)
    try:
        announced = server.stderr.readline()
        match = re.search(r"listening on 127\.0\.0\.1:(\d+); a client presents the token in (\S+) \(mode 0600\)",
                          announced)
        assert match, announced
        port, token_file = int(match[1]), Path(match[2])
        assert stat.S_IMODE(token_file.stat().st_mode) == 0o600 and token_file.parent == runtime / "latchwatch"
        token = token_file.read_text().strip()
        for attempt in (_initialize(), _initialize("x" * len(token)),
                        frame(b'{"jsonrpc": "2.0", "id": 1, "method": "shutdown"}')):
            reply, closed = _tcp_exchange(port, attempt)
            assert reply["error"]["code"] == -32600 and "token" in reply["error"]["message"] and closed
        reply, _closed = _tcp_exchange(port, _initialize(token))
        assert reply["result"]["serverInfo"]["name"] == "latchwatch"
        assert server.wait(timeout=20) == 0  # the client went away: the server ends, as on stdio
        assert not token_file.exists()
    finally:
        server.kill()
        server.wait()


async def test_a_run_that_cannot_start_is_a_notice_and_the_server_lives(tmp_path, session):
    proj = tmp_path / "proj"
    script = make_project(proj, extra_config=f'python = "{tmp_path / "no-such-python"}"\n')
    s = session()
    await s.start(proj, options=trusted(proj))
    uri = s.open(script)
    (notice,) = (await s.published_for(uri, version=1)).diagnostics
    assert notice.code == "configuration" and "no-such-python" in notice.message
    (proj / "latchwatch.toml").write_text('tech = "demo"\n')
    s.client.text_document_did_save(types.DidSaveTextDocumentParams(types.TextDocumentIdentifier(uri)))
    await s.published_for(uri, version=1, where=lambda p: [d.code for d in p.diagnostics] == ["tap-distance"])
