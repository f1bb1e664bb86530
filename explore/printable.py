"""Names made safe to show: control and bidirectional-formatting characters made visible.

Folder names, brands and file names come from the user's disk. A terminal
escape (ESC ...) in one could rewrite the screen, and a right-to-left override
(U+202E) reverses the text that follows it, so "gnp.exe" can read as
"exe.png". Everywhere a name is shown (terminal, starter study comments, the
report) such characters are replaced by a visible ``[U+XXXX]``; the tables
keep the exact names.
"""

from __future__ import annotations

import re

#: C0 and C1 control characters, DEL, and the Unicode bidirectional formatting
#: characters (embeddings, overrides, isolates, marks; Unicode Standard Annex #9).
UNSAFE = re.compile("[\u0000-\u001f\u007f-\u009f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")


def printable(text: str, keep_newlines: bool = False) -> str:
    """``text`` with every unsafe character shown as ``[U+XXXX]`` (newlines kept when asked)."""
    text = str(text)
    if not UNSAFE.search(text):
        return text

    def visible(match: re.Match) -> str:
        char = match.group(0)
        if keep_newlines and char in "\n\t":
            return char
        return f"[U+{ord(char):04X}]"

    return UNSAFE.sub(visible, text)
