"""Finding processes a test started, for checks that nothing outlives a run."""

from __future__ import annotations

from pathlib import Path


def processes_with(token: str) -> list[int]:
    """Live (not zombie) processes whose command line holds ``token``, from /proc.

    A script in a PID namespace cannot name its host process group, so the tests mark
    the processes they start with a unique argument and look for it afterwards."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            command = (entry / "cmdline").read_bytes()
            state = (entry / "stat").read_text().rsplit(")", 1)[1].split()[0]
        except (OSError, IndexError):
            continue
        if token.encode() in command and state != "Z":
            found.append(int(entry.name))
    return found
