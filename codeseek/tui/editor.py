"""The user's editor: which command opens a file at a line.

``$VISUAL`` wins over ``$EDITOR`` (the usual convention); both may carry
arguments (``"emacsclient -t"``). Editors known to take ``+LINE`` before the
file get it; any other editor gets the file alone.
"""

from __future__ import annotations

import shlex
from collections.abc import Mapping
from pathlib import Path

from codeseek.errors import ConfigError

PLUS_LINE_EDITORS = frozenset({
    "vi", "vim", "nvim", "gvim", "view", "vim.basic", "vim.tiny", "nano", "pico", "emacs",
    "emacsclient", "micro", "kak", "joe", "jed", "jmacs", "jstar", "ne", "mg", "mcedit",
})
"""Command names that open a file at a line when given ``+LINE`` before it."""


def editor_words(env: Mapping[str, str]) -> list[str] | None:
    """The editor command as words, or None when neither variable is set."""
    for name in ("VISUAL", "EDITOR"):
        raw = env.get(name, "").strip()
        if raw:
            try:
                words = shlex.split(raw)
            except ValueError as exc:
                raise ConfigError(f"${name} cannot be read as a command: {exc}") from exc
            if words:
                return words
    return None


def editor_command(env: Mapping[str, str], path: Path, line: int) -> list[str] | None:
    """The command that opens ``path`` at ``line``, or None when no editor is set."""
    words = editor_words(env)
    if words is None:
        return None
    if Path(words[0]).name in PLUS_LINE_EDITORS:
        return [*words, f"+{line}", str(path)]
    return [*words, str(path)]
