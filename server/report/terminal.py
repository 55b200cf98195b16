"""Text a script controls, made harmless to show: on a terminal, in an editor's log.

A script's prints, its exception messages, its cell, label and file names all reach
the user's screen. Terminal control sequences among them would act there: CSI moves
the cursor and recolours, OSC 52 writes the clipboard, OSC 8 hides a link, BEL rings,
a lone carriage return overwrites the line before it. ``terminal_safe`` writes every
control character out as a visible ``\\x..`` escape, so the text is shown, not obeyed;
newlines and tabs stay, and a Windows line end becomes a newline.
"""

from __future__ import annotations

import re

# C0 controls but tab and newline, DEL, and the C1 controls (U+0080-U+009F, which
# some terminals take as CSI, OSC and the rest in one character).
_CONTROL = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def _escape(match: re.Match) -> str:
    return f"\\x{ord(match.group()):02x}"


def terminal_safe(text: str) -> str:
    """``text`` with every terminal control character escaped (tabs and newlines kept)."""
    if text.isprintable():  # the common case: nothing to do (tabs and newlines are not printable)
        return text
    return _CONTROL.sub(_escape, text.replace("\r\n", "\n"))
