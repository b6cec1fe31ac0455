"""Copying a line of text to the clipboard from inside a terminal.

Three ways, all tried, since none works everywhere:

1. OSC 52, the terminal's own clipboard sequence (``ESC ] 52 ; c ; BASE64 BEL``):
   textual's ``App.copy_to_clipboard`` writes it. It reaches the clipboard of
   the terminal the user sees, also over ssh, but a terminal multiplexer
   keeps it to itself (tmux by default, screen always).
2. The same sequence wrapped for the multiplexer, which hands a wrapped
   sequence on to the outer terminal unread: tmux's ``ESC P tmux; ... ESC \\``
   (every ESC inside doubled; tmux passes it on when ``allow-passthrough`` is
   on) and screen's ``ESC P ... ESC \\``.
3. A copy command: ``tmux load-buffer -w -`` inside tmux (a tmux buffer, which
   tmux also sends on to the outer terminal's clipboard), else the desktop's
   own command (``wl-copy``, ``xclip``, ``xsel``, ``pbcopy``).

Which multiplexer or desktop runs is read from the environment the UI was
given (``TMUX``, ``STY``, ``WAYLAND_DISPLAY``, ``DISPLAY``).
"""

from __future__ import annotations

import base64
import shutil
import subprocess
import sys
from collections.abc import Mapping

COMMAND_SECONDS = 2.0


def osc52(text: str) -> str:
    """The OSC 52 sequence that sets the clipboard to ``text``."""
    encoded = base64.b64encode(text.encode("utf-8", "surrogateescape")).decode("ascii")
    return f"\x1b]52;c;{encoded}\x07"


def passthrough(text: str, env: Mapping[str, str]) -> str | None:
    """OSC 52 for ``text`` wrapped for the multiplexer we run in (None: not in one)."""
    sequence = osc52(text)
    if env.get("TMUX"):
        return "\x1bPtmux;" + sequence.replace("\x1b", "\x1b\x1b") + "\x1b\\"
    if env.get("STY"):
        return "\x1bP" + sequence + "\x1b\\"
    return None


def copy_commands(env: Mapping[str, str], platform: str = sys.platform) -> list[list[str]]:
    """The copy commands worth trying here, best first (each reads the text on stdin)."""
    commands: list[list[str]] = []
    if env.get("TMUX"):
        commands.append(["tmux", "load-buffer", "-w", "-"])
        commands.append(["tmux", "load-buffer", "-"])  # a tmux before 3.2 has no -w
    if env.get("WAYLAND_DISPLAY"):
        commands.append(["wl-copy"])
    if env.get("DISPLAY"):
        commands.append(["xclip", "-selection", "clipboard"])
        commands.append(["xsel", "--clipboard", "--input"])
    if platform == "darwin":
        commands.append(["pbcopy"])
    return commands


def copy_with_command(text: str, env: Mapping[str, str]) -> str | None:
    """Copy ``text`` with the first copy command that works; its name, or None."""
    for command in copy_commands(env):
        if shutil.which(command[0], path=env.get("PATH")) is None:
            continue
        try:
            done = subprocess.run(command, input=text.encode("utf-8", "surrogateescape"),
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                  env=dict(env), timeout=COMMAND_SECONDS, check=False)
        except (OSError, subprocess.SubprocessError):
            continue
        if done.returncode == 0:
            return " ".join(command[:2]) if command[0] == "tmux" else command[0]
    return None
