"""The language server against a hostile or broken client, in raw bytes on a real
`latchwatch serve`'s stdin and stdout (issue 14, points 6 and 8): framing errors are
survived, shutdown and exit behave as the protocol says, a too-deep message is
answered, non-file documents are skipped quietly, and script text reaches the editor
without terminal control sequences. As root; nothing here depends on the user.
"""

from __future__ import annotations

import json
import os
import select
import subprocess
import time

from pygls.uris import from_fs_path

from lsp_client import SERVER, make_project

INITIALIZE = {"processId": None, "rootUri": None, "capabilities": {}}


def frame(message: dict, separator: bytes = b"\r\n") -> bytes:
    body = json.dumps(message).encode()
    return b"Content-Length: %d" % len(body) + separator + separator + body


def request(number: int, method: str, params=None) -> dict:
    return {"jsonrpc": "2.0", "id": number, "method": method, "params": params}


def notification(method: str, params=None) -> dict:
    return {"jsonrpc": "2.0", "method": method, "params": params}


HOVER = {"textDocument": {"uri": "file:///nowhere.py"}, "position": {"line": 0, "character": 0}}


class RawServer:
    """`latchwatch serve` fed bytes; its messages parsed as they arrive."""

    def __init__(self, cwd=None):
        self.process = subprocess.Popen(SERVER, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                        stderr=subprocess.PIPE, cwd=cwd)
        self.buffer = b""
        self.messages: list[dict] = []

    def send(self, data: bytes) -> None:
        self.process.stdin.write(data)
        self.process.stdin.flush()

    def _pump(self, timeout: float) -> None:
        ready, _, _ = select.select([self.process.stdout], [], [], timeout)
        if ready:
            chunk = os.read(self.process.stdout.fileno(), 1 << 16)
            self.buffer += chunk
        while b"\r\n\r\n" in self.buffer:
            head, rest = self.buffer.split(b"\r\n\r\n", 1)
            length = int(head.split(b"Content-Length: ")[1].split(b"\r\n")[0])
            if len(rest) < length:
                break
            self.messages.append(json.loads(rest[:length]))
            self.buffer = rest[length:]

    def wait_for(self, predicate, timeout: float = 30.0) -> dict:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            found = next((m for m in self.messages if predicate(m)), None)
            if found is not None:
                return found
            self._pump(0.1)
        raise AssertionError(f"no such message in {timeout} s; got {self.messages}")

    def answer(self, number: int, timeout: float = 30.0) -> dict:
        return self.wait_for(lambda m: m.get("id") == number and "method" not in m, timeout)

    def finish(self, timeout: float = 30.0) -> tuple[int, str]:
        self.process.stdin.close()
        code = self.process.wait(timeout)
        return code, self.process.stderr.read().decode()


def _started() -> RawServer:
    server = RawServer()
    server.send(frame(request(1, "initialize", INITIALIZE)))
    assert "result" in server.answer(1)
    server.send(frame(notification("initialized", {})))
    return server


def test_framing_errors_are_survived_and_the_server_answers_after_each():
    server = _started()
    broken = [
        b"Content-Length: -5\r\n\r\n{}",  # negative
        b"Content-Length: abc\r\n\r\n{}",  # not a number
        b"Content-Type: application/json\r\n\r\n{}",  # missing
        b"Content-Length: 2\r\n\r\n{\"jsonrpc\": \"2.0\"}",  # too small: the rest of the body follows as garbage
        b"Content-Length: 99999999999\r\n\r\n",  # over the size a message may have
    ]
    for number, bad in enumerate(broken, start=10):
        server.send(bad)
        server.send(frame(request(number, "textDocument/hover", HOVER)))
        assert server.answer(number)["result"] is None
    server.send(frame(request(20, "textDocument/hover", HOVER), separator=b"\n"))  # LF-only headers
    assert server.answer(20)["result"] is None
    body = json.dumps(request(21, "textDocument/hover", HOVER)).encode()
    next_frame = frame(request(22, "textDocument/hover", HOVER))
    server.send(b"Content-Length: %d\r\n\r\n" % (len(body) + 30) + body + next_frame)  # too large
    assert server.answer(22)["result"] is None  # the frame after it is read again
    server.send(frame(request(23, "shutdown")) + frame(notification("exit")))
    code, log = server.finish()
    assert code == 0 and "Traceback" not in log
    assert log.count("framing error") >= 4 and "skipping to the next Content-Length header" in log


def test_requests_after_shutdown_get_invalid_request_and_exit_is_0():
    server = _started()
    server.send(frame(request(2, "shutdown")))
    assert server.answer(2)["result"] is None
    server.send(frame(request(3, "textDocument/hover", HOVER)))
    error = server.answer(3)["error"]
    assert error["code"] == -32600 and "after shutdown" in error["message"]  # JSON-RPC 2.0: Invalid Request
    server.send(frame(notification("exit")))
    assert server.process.wait(30) == 0


def test_exit_without_shutdown_is_status_1():
    server = _started()
    server.send(frame(notification("exit")))
    assert server.process.wait(30) == 1  # LSP 3.17, exit notification: 1 without a shutdown before it


def test_a_deeply_nested_request_gets_an_error_answer_and_the_server_lives():
    server = _started()
    deep = ('{"jsonrpc": "2.0", "id": 7, "method": "textDocument/hover", "params": '
            + "[" * 100000 + "]" * 100000 + "}").encode()
    server.send(b"Content-Length: %d\r\n\r\n" % len(deep) + deep)
    assert server.answer(7)["error"]["code"] == -32600
    server.send(frame(request(8, "textDocument/hover", HOVER)))
    assert server.answer(8)["result"] is None
    server.send(frame(request(9, "shutdown")) + frame(notification("exit")))
    assert server.finish()[0] == 0


def test_non_file_documents_are_skipped_quietly_and_script_text_arrives_escaped(tmp_path):
    script = ("import sys\nprint('\\x1b]52;c;aGVsbG8=\\x07')\n"
              "raise ValueError('\\x1b[2J\\x9b31m')\n")
    path = make_project(tmp_path / "project", script=script, name="loud.py")
    server = RawServer()
    server.send(frame(request(1, "initialize", {**INITIALIZE, "initializationOptions": {
        "latchwatch": {"trustedFolders": [str(path.parent)], "debounce": 0}}})))
    server.answer(1)
    server.send(frame(notification("initialized", {})))
    for uri in ("untitled:Untitled-1", "vscode-notebook-cell:/x.ipynb#W0sZmlsZQ%3D%3D"):
        server.send(frame(notification("textDocument/didOpen", {"textDocument": {
            "uri": uri, "languageId": "python", "version": 1, "text": script}})))
    server.send(frame(notification("textDocument/didOpen", {"textDocument": {
        "uri": from_fs_path(str(path)), "languageId": "python", "version": 1, "text": script}})))
    published = server.wait_for(lambda m: m.get("method") == "textDocument/publishDiagnostics"
                                and m["params"]["uri"] == from_fs_path(str(path)) and m["params"]["diagnostics"], 60)
    (diagnostic,) = published["params"]["diagnostics"]
    assert diagnostic["code"] == "script-error" and "\\x1b[2J\\x9b31m" in diagnostic["message"]
    logged = server.wait_for(lambda m: m.get("method") == "window/logMessage"
                             and "script output" in m["params"]["message"])
    assert "\\x1b]52;c;aGVsbG8=\\x07" in logged["params"]["message"]
    server.send(frame(request(2, "shutdown")) + frame(notification("exit")))
    code, log = server.finish()
    everything = json.dumps(server.messages, ensure_ascii=False)
    assert code == 0 and "\x1b" not in everything and "\x9b" not in everything and "\x07" not in everything
    assert "TypeError" not in everything and "TypeError" not in log
    assert not any(m.get("method") == "textDocument/publishDiagnostics" and not m["params"]["uri"].startswith("file:")
                   for m in server.messages)


async def test_an_untitled_document_gets_nothing_while_a_file_beside_it_is_checked(tmp_path, session):
    """pytest-lsp's client: an untitled buffer is opened, edited, hovered and closed
    without a diagnostic or a log line about it; the file opened after it is checked."""
    from lsprotocol import types

    from lsp_client import trusted

    path = make_project(tmp_path / "project")
    client = session()
    await client.start(path.parent, options=trusted(path.parent))
    untitled = "untitled:Untitled-1"
    client.client.text_document_did_open(types.DidOpenTextDocumentParams(types.TextDocumentItem(
        uri=untitled, language_id="python", version=1, text=path.read_text())))
    client.replace_all(untitled, 2, path.read_text(), "x = 1\n")
    hover = await client.client.text_document_hover_async(types.HoverParams(
        types.TextDocumentIdentifier(untitled), types.Position(0, 0)))
    assert hover is None
    uri = client.open(path)
    assert (await client.published_for(uri, 1)).diagnostics  # the file is checked
    client.client.text_document_did_close(types.DidCloseTextDocumentParams(types.TextDocumentIdentifier(untitled)))
    assert [p for p in client.published if p.uri == untitled and p.diagnostics] == []
    assert not any("TypeError" in m.message or "Untitled" in m.message for m in client.client.log_messages)
