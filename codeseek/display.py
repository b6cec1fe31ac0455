"""Text made safe for a terminal: what codeseek prints is shown, never obeyed.

A docstring, a file name or a line of code is repository content, and a
cloned repository may hold anything: an escape sequence that sets the window
title or clears the screen, a carriage return that hides a line, a newline in
a file name that splits one record into two, direction overrides that show
code in another order than it runs, or bytes that are not UTF-8 (kept by
Python as lone surrogates). Every terminal output (plain search results,
outline, status, the TUI) passes its repository text through :func:`printable`
(one line) or :func:`printable_block` (several lines); JSON output keeps the
exact text. Escapes are written the way Python writes them (``\\x1b``,
``\\n``, ``\\u202e``), so what is shown can be searched for.

JSON keeps the exact text, with one exception it cannot avoid: a path that is
not UTF-8 (its undecodable bytes held as lone surrogates) cannot be written as
UTF-8 JSON. :func:`json_path` then gives ``path`` with each such byte written
``\\xNN`` (as a terminal shows it) and adds ``path_bytes``, the path's exact
bytes in base64 (RFC 4648), so nothing is lost.
"""

from __future__ import annotations

import base64
import re

# C0 controls, DEL, C1 controls, lone surrogates (undecodable bytes of a file
# name), and the bidirectional overrides and isolates (Unicode's own list of
# explicit directional formatting characters, UAX #9).
_UNSAFE = re.compile("[\x00-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069\ud800-\udfff]")
_UNSAFE_IN_BLOCK = re.compile(
    "[\x00-\x08\x0b-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069\ud800-\udfff]")
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _escape(match: re.Match[str]) -> str:
    char = match.group()
    if char in _NAMED:
        return _NAMED[char]
    code = ord(char)
    if 0xDC80 <= code <= 0xDCFF:  # a byte that was not UTF-8 (surrogateescape)
        return f"\\x{code - 0xDC00:02x}"
    return f"\\x{code:02x}" if code <= 0xFF else f"\\u{code:04x}"


def printable(text: str) -> str:
    """``text`` as one terminal line: every control character escaped, tabs too."""
    return _UNSAFE.sub(_escape, text)


def printable_block(text: str) -> str:
    """``text`` for a terminal, keeping its newlines and tabs (code, a docstring)."""
    return _UNSAFE_IN_BLOCK.sub(_escape, text.replace("\r\n", "\n"))


def json_path(path: str) -> dict[str, str]:
    """The JSON fields of a path: ``{"path": ...}``, plus ``path_bytes`` when not UTF-8."""
    try:
        path.encode("utf-8")
    except UnicodeEncodeError:
        raw = path.encode("utf-8", "surrogateescape")
        shown = re.sub("[\udc80-\udcff]", _escape, path)
        return {"path": shown, "path_bytes": base64.b64encode(raw).decode("ascii")}
    return {"path": path}
