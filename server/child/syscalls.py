"""A seccomp filter for what Landlock does not cover: changes of a file's mode, owner,
times and extended attributes, Unix sockets (a named one anywhere could be connected
to), io_uring (whose operations seccomp cannot see), and the kernel's key rings.

Hand-written classic BPF, installed with prctl(PR_SET_SECCOMP) through ctypes (no
library to install in a user's interpreter; libseccomp 2.5 does not know fchmodat2 or
setxattrat). Each refused call fails with EPERM. The filter checks the architecture
first: a call of another ABI (i386 through int 0x80, x32 on x86_64) is refused outright.
socketpair() of stream and packet sockets stays open (asyncio's self-pipe, connected
pairs that cannot be pointed anywhere else); a datagram pair could be, and is refused.
Inherited by every process and program of the run, across fork and exec.
"""

from __future__ import annotations

# Imported before the identity changes, which may hide the standard library.
import ctypes
import errno
import os
import sys

try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

from .kernel import PR_SET_NO_NEW_PRIVS, call_libc, libc, prctl

PR_SET_SECCOMP, SECCOMP_MODE_FILTER = 22, 2
SECCOMP_RET_ALLOW, SECCOMP_RET_ERRNO = 0x7FFF0000, 0x00050000
AF_UNIX, SOCK_DGRAM, SOCK_TYPE_MASK = 1, 2, 0xF
X32_SYSCALL_BIT = 0x40000000

# Names refused, grouped for the record; numbers per architecture (missing: no such call there).
REFUSED_GROUPS = (
    ("mode", ("chmod", "fchmod", "fchmodat", "fchmodat2")),
    ("owner", ("chown", "fchown", "lchown", "fchownat")),
    ("times", ("utime", "utimes", "futimesat", "utimensat")),
    ("extended attributes", ("setxattr", "lsetxattr", "fsetxattr", "removexattr", "lremovexattr", "fremovexattr",
                             "setxattrat", "removexattrat")),
    ("io_uring", ("io_uring_setup", "io_uring_enter", "io_uring_register")),
    ("key rings", ("add_key", "request_key", "keyctl")),
)

# (audit architecture, syscall numbers) from the kernel's syscall tables
# (arch/x86/entry/syscalls/syscall_64.tbl; include/uapi/asm-generic/unistd.h for arm64).
ARCHITECTURES = {
    "x86_64": (0xC000003E, {
        "chmod": 90, "fchmod": 91, "fchmodat": 268, "fchmodat2": 452,
        "chown": 92, "fchown": 93, "lchown": 94, "fchownat": 260,
        "utime": 132, "utimes": 235, "futimesat": 261, "utimensat": 280,
        "setxattr": 188, "lsetxattr": 189, "fsetxattr": 190, "removexattr": 197, "lremovexattr": 198,
        "fremovexattr": 199, "setxattrat": 463, "removexattrat": 466,
        "io_uring_setup": 425, "io_uring_enter": 426, "io_uring_register": 427,
        "add_key": 248, "request_key": 249, "keyctl": 250,
        "socket": 41, "socketpair": 53,
    }),
    "aarch64": (0xC00000B7, {
        "fchmod": 52, "fchmodat": 53, "fchmodat2": 452,
        "fchown": 55, "fchownat": 54,
        "utimensat": 88,
        "setxattr": 5, "lsetxattr": 6, "fsetxattr": 7, "removexattr": 14, "lremovexattr": 15, "fremovexattr": 16,
        "setxattrat": 463, "removexattrat": 466,
        "io_uring_setup": 425, "io_uring_enter": 426, "io_uring_register": 427,
        "add_key": 217, "request_key": 218, "keyctl": 219,
        "socket": 198, "socketpair": 199,
    }),
}
_MACHINE_NAMES = {"amd64": "x86_64", "arm64": "aarch64"}

# Classic BPF opcodes (linux/bpf_common.h) and the offsets of struct seccomp_data.
_LOAD_WORD, _JUMP_EQUAL, _JUMP_AT_LEAST, _AND, _RETURN = 0x20, 0x15, 0x35, 0x54, 0x06
_NR, _ARCH = 0, 4


def _argument(index):
    return 16 + 8 * index  # the low 32 bits, on these little-endian machines


class _Instruction(ctypes.Structure):
    _fields_ = [("code", ctypes.c_uint16), ("jt", ctypes.c_uint8), ("jf", ctypes.c_uint8), ("k", ctypes.c_uint32)]


class _Program(ctypes.Structure):
    _fields_ = [("len", ctypes.c_uint16), ("filter", ctypes.POINTER(_Instruction))]


def machine():
    """The architecture name the filter tables use, for this process."""
    name = os.uname().machine.lower()
    name = _MACHINE_NAMES.get(name, name)
    return name if sys.maxsize > 2 ** 32 else name + " (a 32-bit interpreter)"


def build_filter(arch_name):
    """The filter program for one architecture: a list of (code, jt, jf, k)."""
    audit_arch, numbers = ARCHITECTURES[arch_name]
    refused = sorted({numbers[name] for _group, names in REFUSED_GROUPS for name in names if name in numbers})
    # Built as (code, true-label, false-label, k); labels resolved into jump offsets below.
    body = [(_LOAD_WORD, None, None, _ARCH), (_JUMP_EQUAL, None, "deny", audit_arch), (_LOAD_WORD, None, None, _NR)]
    if arch_name == "x86_64":
        body.append((_JUMP_AT_LEAST, "deny", None, X32_SYSCALL_BIT))
    body += [(_JUMP_EQUAL, "deny", None, number) for number in refused]
    body += [
        (_JUMP_EQUAL, None, "pair", numbers["socket"]),
        (_LOAD_WORD, None, None, _argument(0)),
        (_JUMP_EQUAL, "deny", "allow", AF_UNIX),
        ("pair", None, None, None),
        (_JUMP_EQUAL, None, "allow", numbers["socketpair"]),
        (_LOAD_WORD, None, None, _argument(0)),
        (_JUMP_EQUAL, None, "allow", AF_UNIX),
        (_LOAD_WORD, None, None, _argument(1)),
        (_AND, None, None, SOCK_TYPE_MASK),
        (_JUMP_EQUAL, "deny", "allow", SOCK_DGRAM),
        ("allow", None, None, None),
        (_RETURN, None, None, SECCOMP_RET_ALLOW),
        ("deny", None, None, None),
        (_RETURN, None, None, SECCOMP_RET_ERRNO | errno.EPERM),
    ]
    labels, program = {}, []
    for entry in body:
        if isinstance(entry[0], str):
            labels[entry[0]] = len(program)
        else:
            program.append(entry)
    def offset(label, index):
        return 0 if label is None else labels[label] - index - 1

    return [(code, offset(on_true, index), offset(on_false, index), k)
            for index, (code, on_true, on_false, k) in enumerate(program)]


def refused_names(arch_name):
    """The refused calls that exist on ``arch_name``, by group, for the record."""
    numbers = ARCHITECTURES[arch_name][1]
    return [(group, [name for name in names if name in numbers]) for group, names in REFUSED_GROUPS]


def filter_syscalls(config, record):
    """Install the filter on this process (and so on everything it starts)."""
    if not sys.platform.startswith("linux"):
        record.no("syscalls", "seccomp needs Linux (this is %s)" % sys.platform)
        return
    if "seccomp" in set(config.get("skip", ())):
        record.no("syscalls", "seccomp not attempted (switched off for this run)")
        return
    arch_name = machine()
    if arch_name not in ARCHITECTURES:
        record.no("syscalls", "no seccomp filter for the %s architecture (x86_64 and aarch64 have one)" % arch_name)
        return
    instructions = build_filter(arch_name)
    array = (_Instruction * len(instructions))(*[_Instruction(*entry) for entry in instructions])
    program = _Program(len(instructions), array)
    try:
        prctl(PR_SET_NO_NEW_PRIVS, 1)  # seccomp without CAP_SYS_ADMIN needs it (Landlock set it already)
        call_libc(libc().prctl, ctypes.c_int(PR_SET_SECCOMP), ctypes.c_ulong(SECCOMP_MODE_FILTER),
                  ctypes.byref(program), ctypes.c_ulong(0), ctypes.c_ulong(0))
    except OSError as error:
        record.no("syscalls", "seccomp filter refused by the kernel: %s" % os.strerror(error.errno or 0))
        return
    groups = "; ".join("%s (%s)" % (group, ", ".join(names)) for group, names in refused_names(arch_name) if names)
    record.ok("syscalls", "seccomp (%s): refused with EPERM: %s; Unix sockets (socket(AF_UNIX), datagram pairs); "
                          "calls of another ABI" % (arch_name, groups))
