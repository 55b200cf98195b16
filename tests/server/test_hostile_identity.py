"""Hostile scripts against the identity, the system-call filter, a named interpreter and
the end of latchwatch (docs/sandbox.md, issue 14). Each case runs in a fresh child and
in a corner host's fork; the identity cases need root (they are skipped, saying so,
otherwise), the filter cases also run with the identity switched off, as for an
unprivileged user, whose own files Landlock alone does not protect from mode, time and
attribute changes. Every target is created here, owned by root and outside the run."""

from __future__ import annotations

import functools
import os
import signal
import socket
import stat
import subprocess
import sys
import tempfile
import time

import pytest
from sandboxes import needs, write_script

from latchwatch.server.child import syscalls
from latchwatch.server.sandbox import folders, runner

from procs import processes_with

linux_root = pytest.mark.skipif(not sys.platform.startswith("linux") or os.geteuid() != 0,
                                reason="the identity cases need root on Linux")


@pytest.fixture(params=[False, True], ids=["fresh-child", "corner-host"])
def run_script(request):
    return functools.partial(runner.run_script, hosted=request.param)


@pytest.fixture
def root_owned(tmp_path):
    """A root-owned 0644 file and a root-only 0600 file, in a folder anyone may enter."""
    outside = tmp_path / "outside"
    outside.mkdir()
    target = outside / "target.txt"
    target.write_text("keep me")
    target.chmod(0o644)
    secret = outside / "secret.txt"
    secret.write_text("root only")
    secret.chmod(0o600)
    os.utime(target, (1_000_000_000, 1_000_000_000))
    return target, secret


# -- identity ----------------------------------------------------------------------------------


@linux_root
def test_root_only_files_cannot_be_read_and_the_run_folder_tells_the_truth(tmp_path, doctor, root_owned,
                                                                          run_script):
    needs(doctor, "privileges")
    _target, secret = root_owned
    path = write_script(tmp_path, f"""\
        import os
        for name in ("/etc/shadow", {str(secret)!r}):
            try:
                open(name).read()
                print("read", name)
            except PermissionError:
                print("denied")
        print("ids", sorted(set(os.getresuid() + os.getresgid())))
        print("access", os.access(".", os.W_OK), os.access(".", os.W_OK, effective_ids=True))
        os.mkdir("made-here")
        print("mkdir ok")
        """)
    outcome = run_script(path)
    assert outcome.status == "ok", outcome.failure
    nobody = folders._our_users() - {0}
    assert outcome.output.splitlines() == ["denied", "denied", f"ids {sorted(nobody)}", "access True True",
                                           "mkdir ok"]
    assert outcome.sandbox["privileges"] == "nobody"


@linux_root
def test_a_script_folder_nobody_cannot_read_is_refused_not_run_as_root(tmp_path, run_script):
    private = tmp_path / "private"
    private.mkdir(mode=0o700)
    marker = tmp_path / "ran"
    path = write_script(private, f"open({str(marker)!r}, 'w').write('ran')\n")
    outcome = run_script(path)
    assert outcome.status == "error" and not marker.exists()
    assert "nobody (uid" in outcome.failure.message and f"cannot read {private}" in outcome.failure.message
    assert "never runs with root's file access" in outcome.failure.message


@linux_root
def test_doctor_and_a_required_sandbox_fail_where_the_run_would_keep_root(tmp_path):
    private = tmp_path / "private"
    private.mkdir(mode=0o700)
    doctor = subprocess.run([sys.executable, "-m", "latchwatch", "doctor", "--require-sandbox"], cwd=private,
                            capture_output=True, text=True, timeout=120)
    assert doctor.returncode == 2
    assert "scripts do NOT run as an unprivileged user: nobody (uid" in doctor.stdout
    assert f"cannot read {private}" in doctor.stderr
    fine = subprocess.run([sys.executable, "-m", "latchwatch", "doctor"], cwd=tmp_path, capture_output=True,
                          text=True, timeout=120)
    assert fine.returncode == 0 and "identity     scripts run as nobody (uid" in fine.stdout


# -- the system-call filter ----------------------------------------------------------------------


@pytest.mark.parametrize("identity", ["nobody", "identity off"])
def test_modes_times_and_attributes_of_a_file_outside_cannot_change(tmp_path, doctor, root_owned, identity,
                                                                   run_script):
    needs(doctor, "syscalls")
    target, _secret = root_owned
    before = target.stat()
    path = write_script(tmp_path, f"""\
        import os
        target = {str(target)!r}
        attempts = [("chmod 0666", lambda: os.chmod(target, 0o666)),
                    ("setuid", lambda: os.chmod(target, 0o4755)),
                    ("fchmod", lambda: os.fchmod(os.open(target, os.O_RDONLY), 0o666)),
                    ("utime", lambda: os.utime(target, (0, 0))),
                    ("setxattr", lambda: os.setxattr(target, "user.planted", b"1")),
                    ("removexattr", lambda: os.removexattr(target, "user.kept")),
                    ("chown", lambda: os.chown(target, os.getuid(), os.getgid()))]
        for name, attempt in attempts:
            try:
                attempt()
                print(name, "done")
            except OSError as error:
                print(name, "refused", error.errno)
        """)
    skip = ("identity",) if identity == "identity off" else ()
    outcome = run_script(path, skip_protections=skip)
    assert outcome.status == "ok", outcome.failure
    assert [line.split()[-2:] for line in outcome.output.splitlines()] == [["refused", "1"]] * 7  # EPERM
    after = target.stat()
    assert (stat.S_IMODE(after.st_mode), after.st_mtime, after.st_uid) == (0o644, before.st_mtime, 0 if
                                                                          os.geteuid() == 0 else before.st_uid)
    assert "user.planted" not in os.listxattr(target)
    assert outcome.sandbox["syscalls"] == "filtered"


@pytest.fixture
def root_socket(tmp_path):
    """A Unix socket only its owner may connect to, listening outside the run."""
    path = tmp_path / "outside-socket"
    server = socket.socket(socket.AF_UNIX)
    server.bind(str(path))
    os.chmod(path, 0o600)
    server.listen(4)
    server.settimeout(0.3)
    yield path, server
    server.close()


@pytest.mark.parametrize("identity", ["nobody", "identity off"])
def test_a_unix_socket_outside_cannot_be_reached_but_locks_pools_and_pairs_work(tmp_path, doctor, root_socket,
                                                                              identity, run_script):
    needs(doctor, "syscalls")
    address, server = root_socket
    path = write_script(tmp_path, f"""\
        import asyncio, ctypes, multiprocessing, socket
        def main():
            for kind in (socket.SOCK_STREAM, socket.SOCK_DGRAM):
                try:
                    client = socket.socket(socket.AF_UNIX, kind)
                    client.connect({str(address)!r})
                    print("connected")
                except OSError as error:
                    print("refused", error.errno)
            try:
                socket.socketpair(socket.AF_UNIX, socket.SOCK_DGRAM)  # could be pointed at any named socket
                print("datagram pair")
            except OSError as error:
                print("refused", error.errno)
            left, right = socket.socketpair()
            left.sendall(b"ok")
            asyncio.run(asyncio.sleep(0))  # the event loop's self-pipe is a stream pair
            print("pair", right.recv(2).decode())
            libc = ctypes.CDLL(None, use_errno=True)
            if {syscalls.machine()!r} == "x86_64":  # an x32 getpid(): another ABI, refused outright
                print("x32", libc.syscall(0x40000000 | 39), ctypes.get_errno())
            else:
                print("x32 -1 1")
            with multiprocessing.Lock():
                pass
            for method in ("fork", "spawn"):
                with multiprocessing.get_context(method).Pool(2) as pool:
                    print(method, pool.map(abs, [-1, -2]), flush=True)
        if __name__ == "__main__":  # spawn runs this file again in each worker
            main()
        """)
    skip = ("identity",) if identity == "identity off" else ()
    outcome = run_script(path, skip_protections=skip, timeout=60)
    assert outcome.status == "ok", (outcome.failure, outcome.output)
    assert outcome.output.splitlines() == ["refused 1", "refused 1", "refused 1", "pair ok", "x32 -1 1",
                                           "fork [1, 2]", "spawn [1, 2]"]
    with pytest.raises(OSError):
        server.accept()


def test_the_filter_program_is_well_formed_for_each_architecture():
    for arch in syscalls.ARCHITECTURES:
        program = syscalls.build_filter(arch)
        audit_arch, numbers = syscalls.ARCHITECTURES[arch]
        assert program[0] == (0x20, 0, 0, 4) and program[1][3] == audit_arch  # the architecture first
        assert program[-2] == (0x06, 0, 0, syscalls.SECCOMP_RET_ALLOW)
        assert program[-1] == (0x06, 0, 0, syscalls.SECCOMP_RET_ERRNO | 1)
        for index, (code, jt, jf, _k) in enumerate(program):
            if code & 0x07 == 0x05:  # BPF_JMP: both branches land inside the program
                assert index + 1 + max(jt, jf) < len(program)
        # Numbers from the kernel's tables (arch/x86/entry/syscalls/syscall_64.tbl, asm-generic/unistd.h).
        expected = {"x86_64": {90, 91, 268, 452, 132, 235, 261, 280, 188, 189, 190, 197, 198, 199, 425},
                    "aarch64": {52, 53, 452, 88, 5, 6, 7, 14, 15, 16, 425}}[arch]
        denied = {k for index, (code, jt, _jf, k) in enumerate(program)
                  if code == 0x15 and jt and index + 1 + jt == len(program) - 1}
        assert expected <= denied and numbers["socket"] not in denied  # socket() is refused for AF_UNIX only


# -- a named interpreter never runs unconfined ---------------------------------------------------


def test_a_named_interpreter_runs_only_inside_the_sandbox(tmp_path, doctor, run_script):
    needs(doctor, "writes")
    outside = tmp_path / "outside"
    outside.mkdir()
    outside.chmod(0o777)
    marker = outside / "unconfined.txt"
    interpreter = tmp_path / "bin" / "python"
    interpreter.parent.mkdir()
    # Writes a file wherever it is run, then becomes the real interpreter: had it run
    # before the sandbox (to ask its version, say), the file would exist.
    interpreter.write_text(f"#!/bin/sh\necho \"$@\" >> {marker} 2>/dev/null\necho ran-as $(id -u) >&2\n"
                           f"exec {sys.executable} \"$@\"\n")
    interpreter.chmod(0o755)
    path = write_script(tmp_path, "import gdstk\ngdstk.Cell('T').add(gdstk.rectangle((0, 0), (1, 1)))\n")
    outcome = run_script(path, python=str(interpreter))
    assert outcome.status == "ok", (outcome.failure, outcome.output)
    assert not marker.exists()
    assert "ran-as 0" not in outcome.output


# -- latchwatch ends, and so do its runs -----------------------------------------------------


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
@pytest.mark.parametrize("how", [signal.SIGTERM, signal.SIGKILL], ids=["SIGTERM", "SIGKILL"])
def test_killing_latchwatch_check_leaves_no_run_and_its_folder_is_swept(tmp_path, how):
    token = f"{time.time_ns() % 10**9 + 300}.{os.getpid()}"
    path = write_script(tmp_path, f"""\
        import subprocess, sys, time
        subprocess.Popen(["sleep", "{token}"])
        print("started", flush=True)
        time.sleep(120)
        """)
    command = [sys.executable, "-m", "latchwatch", "check", str(path), "--tech", "demo", "--timeout", "100"]
    check = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=tmp_path)
    deadline = time.monotonic() + 30
    while not processes_with(token) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert processes_with(token), "the script never started"
    temporary = tempfile.gettempdir()
    left = [f for f in os.listdir(temporary) if f.startswith(f"{folders.PREFIX}{check.pid}.")]
    check.send_signal(how)
    check.wait(timeout=10)
    deadline = time.monotonic() + 10
    while processes_with(token) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert processes_with(token) == []
    assert left, "the run's folder is named after its latchwatch process"
    folders.sweep_dead_folders()
    assert not [f for f in left if os.path.exists(os.path.join(temporary, f))]


def test_the_sweep_removes_only_real_folders_of_dead_owners(tmp_path):
    dead = subprocess.Popen(["true"])
    dead.wait()
    gone = tmp_path / f"{folders.PREFIX}{dead.pid}.1-abc"
    (gone / "inside").mkdir(parents=True)
    alive = tmp_path / f"{folders.PREFIX}{os.getpid()}.{folders.process_start(os.getpid())}-abc"
    alive.mkdir()
    elsewhere = tmp_path / "kept"
    elsewhere.mkdir()
    (elsewhere / "file").write_text("x")
    link = tmp_path / f"{folders.PREFIX}{dead.pid}.2-link"
    link.symlink_to(elsewhere)
    unnamed = tmp_path / f"{folders.PREFIX}abcdef"  # an older latchwatch's: whose it is cannot be told
    unnamed.mkdir()
    removed = folders.sweep_dead_folders(str(tmp_path))
    assert removed == [str(gone)] and not gone.exists()
    assert alive.is_dir() and link.is_symlink() and (elsewhere / "file").exists() and unnamed.is_dir()
