"""Text from outside (capture headers, hex-file comments, port names, notes, station maps) made safe for a
terminal: control characters shown as visible escapes, never sent raw.

A terminal obeys escape sequences (ESC, CSI) in anything printed: a crafted capture's notes could
clear the screen, retitle the window, hide text or fake a line of output. ``visible`` writes every
C0 and C1 control character, DEL and the bidirectional-override characters as ``\\x1b`` or
``\\u202e``; ordinary text (any script, accents, symbols) is untouched.
"""

from __future__ import annotations

import re

#: C0 controls, DEL, C1 controls, and the Unicode bidi embeddings, overrides and isolates
#: (Unicode Standard Annex #9, "Explicit Directional Formatting Characters"; common practice to escape).
_UNSAFE = re.compile("[\x00-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069]")
_UNSAFE_KEEP_NEWLINES = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069]")


def _escape(m: re.Match) -> str:
    c = ord(m.group(0))
    return f"\\x{c:02x}" if c < 0x100 else f"\\u{c:04x}"


def visible(text: object, keep_newlines: bool = False) -> str:
    """``text`` with every control character escaped; with ``keep_newlines`` line breaks stay line breaks."""
    return (_UNSAFE_KEEP_NEWLINES if keep_newlines else _UNSAFE).sub(_escape, str(text))
