"""The real ``codeseek ui`` in a real terminal: tmux runs it, we type and read the screen.

Each test starts its own tmux server (a private socket), runs the program in
a pane with the fake embedding backend over a prebuilt fake index, sends keys,
reads the pane with capture-pane, and checks the exit status the program left.
"""

from __future__ import annotations

import io
import os
import re
import shlex
import shutil
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from codeseek.cli import main

TMUX = shutil.which("tmux")
pytestmark = pytest.mark.skipif(
    TMUX is None, reason="tmux is not installed (Debian package tmux): no terminal to drive")

TOP_PLACE = "python/kestrune/billing/payments.py:104"
WAIT_SECONDS = 30.0


class Terminal:
    """One tmux server with one pane running a command."""

    def __init__(self, folder: Path, width: int, height: int) -> None:
        self.socket = f"codeseek-test-{os.getpid()}-{id(self)}"
        self.exit_file = folder / "exit-status"
        self.width, self.height = width, height

    def _tmux(self, *args: str) -> str:
        assert TMUX is not None
        done = subprocess.run([TMUX, "-L", self.socket, *args], capture_output=True,
                              text=True, check=True)
        return done.stdout

    def start(self, argv: list[str], cwd: Path) -> None:
        # after the program ends the pane stays (sleeping) so its last screen can be read
        command = (f"{shlex.join(argv)}; echo $? > {shlex.quote(str(self.exit_file))}; "
                   "exec sleep 600")
        env = {k: v for k, v in os.environ.items() if not k.startswith("TMUX")}
        env.pop("NO_COLOR", None)
        assert TMUX is not None
        subprocess.run([TMUX, "-L", self.socket, "-f", "/dev/null", "new-session", "-d",
                        "-s", "ui", "-x", str(self.width), "-y", str(self.height),
                        "-c", str(cwd), command], env=env, check=True)

    def keys(self, *keys: str, literal: bool = False) -> None:
        self._tmux("send-keys", "-t", "ui", *(["-l"] if literal else []), *keys)

    def buffer(self) -> str:
        """The newest tmux paste buffer ("" when there is none)."""
        assert TMUX is not None
        done = subprocess.run([TMUX, "-L", self.socket, "show-buffer"], capture_output=True,
                              text=True, check=False)
        return done.stdout

    def screen(self) -> str:
        return self._tmux("capture-pane", "-p", "-t", "ui")

    def wait_for(self, condition: Callable[[str], bool], what: str) -> str:
        deadline = time.monotonic() + WAIT_SECONDS
        while time.monotonic() < deadline:
            text = self.screen()
            if condition(text):
                return text
            time.sleep(0.1)
        raise AssertionError(f"never saw {what}; the screen was:\n{self.screen()}")

    def exit_status(self) -> int:
        deadline = time.monotonic() + WAIT_SECONDS
        while time.monotonic() < deadline:
            if self.exit_file.exists() and self.exit_file.read_text().strip():
                return int(self.exit_file.read_text())
            time.sleep(0.1)
        raise AssertionError(f"the program did not end; the screen was:\n{self.screen()}")

    def close(self) -> None:
        subprocess.run([TMUX or "tmux", "-L", self.socket, "kill-server"],
                       capture_output=True, check=False)


@pytest.fixture
def terminal(tmp_path: Path) -> Iterator[Terminal]:
    term = Terminal(tmp_path, 80, 24)
    yield term
    term.close()


@pytest.fixture
def indexed(sample_copy: Path) -> Path:
    err = io.StringIO()
    assert main(["index", str(sample_copy), "--backend", "fake", "-q"],
                out=io.StringIO(), err=err) == 0, err.getvalue()
    return sample_copy


def codeseek_ui(*args: str) -> list[str]:
    return [sys.executable, "-m", "codeseek", "ui", "--backend", "fake", *args]


def ask(terminal: Terminal) -> str:
    terminal.wait_for(lambda s: "seek ›" in s and "units" in s, "the query line and index line")
    terminal.keys("issue refund", literal=True)
    return terminal.wait_for(lambda s: TOP_PLACE in s, f"the top hit {TOP_PLACE}")


def test_typing_shows_the_top_hit_and_ctrl_q_quits(terminal: Terminal, indexed: Path) -> None:
    terminal.start(codeseek_ui(), cwd=indexed)
    screen = ask(terminal)
    hit_rows = [line for line in screen.splitlines() if "PaymentService.issue_refund" in line]
    assert hit_rows, screen
    terminal.keys("C-q")
    assert terminal.exit_status() == 0
    assert "Traceback" not in terminal.screen()


def test_escape_then_q_quits_from_the_query_line(terminal: Terminal, indexed: Path) -> None:
    terminal.start(codeseek_ui(str(indexed)), cwd=indexed.parent)
    ask(terminal)
    terminal.keys("Escape")
    time.sleep(0.5)  # let the terminal's escape sequence timeout pass: Escape, then q
    terminal.keys("q")
    assert terminal.exit_status() == 0
    assert "Traceback" not in terminal.screen()


def test_a_repository_without_an_index_is_built_from_the_ui(terminal: Terminal,
                                                            sample_copy: Path) -> None:
    terminal.start(codeseek_ui("--repo", str(sample_copy)), cwd=sample_copy.parent)
    terminal.wait_for(lambda s: "No index for" in s and "Build the index now" in s,
                      "the offer to build the index")
    terminal.keys("C-r")
    terminal.wait_for(lambda s: re.search(r"\d+ units · \d+ files · updated", s) is not None,
                      "the built index in the index line")
    ask(terminal)
    terminal.keys("C-q")
    assert terminal.exit_status() == 0
    assert "Traceback" not in terminal.screen()
    assert (sample_copy / ".codeseek").is_dir()


def test_copy_reaches_the_multiplexers_clipboard(terminal: Terminal, indexed: Path) -> None:
    # tmux keeps an application's own OSC 52 to itself unless set-clipboard is on
    # (its default is "external"); the copy must still land in a tmux buffer
    terminal.start(codeseek_ui(), cwd=indexed)
    ask(terminal)
    terminal.keys("F2")
    terminal.wait_for(lambda s: "copied" in s, "the copy notice")
    assert terminal.buffer() == TOP_PLACE
    terminal.keys("C-q")
    assert terminal.exit_status() == 0
