"""Hostile input and faults, in one place: every case ends in a one-line error
(or a documented skip) and leaves an index equal to a fresh build.

Sections (one per area, so each can grow without touching the others):
the index folder and files written outside it; terminal output; file names
and bytes; configuration and command-line values; the daemon; full disk and
read-only folders; a property-based sweep over random bytes.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from codeseek import FakeEmbedder, open_index
from codeseek.client import SOCKET_NAME, DaemonClient, DaemonUnavailable
from codeseek.daemon import Daemon
from codeseek.errors import CodeseekError

# == the index folder: nothing written outside the repository and its index ==




# == terminal output: control characters escaped, JSON exact ==




# == file names and bytes: non-UTF-8 names, newlines in names ==




# == configuration and command-line values ==




# == the daemon: requests, locks, sockets, first build ==

# The daemon's hostile cases run against a real `codeseek watch` process where the
# fault is in the process's life (its lock, its socket, its first build, its log).


def daemon_env(cache: Path) -> dict[str, str]:
    """The environment of a daemon process: no developer settings, a private cache."""
    env = {name: value for name, value in os.environ.items()
           if not name.startswith("CODESEEK_")}
    env["CODESEEK_CACHE_DIR"] = str(cache)
    return env


def daemon_wait(check: Callable[[], bool], what: str, timeout: float = 60.0) -> None:
    """Poll until ``check`` holds (a generous timeout; no timing is asserted)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def daemon_state(index_dir: Path) -> str | None:
    """What the daemon on this index says it does; None when none answers."""
    try:
        return str(DaemonClient(index_dir, timeout=10).status()["daemon"]["state"])
    except (DaemonUnavailable, CodeseekError):
        return None


class DaemonProcess:
    """`codeseek watch --backend fake` on a repository, its stderr kept as its log."""

    def __init__(self, repo: Path, work: Path, command: list[str] | None = None) -> None:
        self.repo = repo
        self.index_dir = repo / ".codeseek"
        self.log_path = work / "daemon.log"
        command = command or [sys.executable, "-m", "codeseek"]
        with self.log_path.open("wb") as log:
            self.process = subprocess.Popen(
                [*command, "watch", str(repo), "--backend", "fake"], stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL, stderr=log, env=daemon_env(work / "cache"))

    def log(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")

    def wait_until(self, state: str) -> None:
        def reached() -> bool:
            assert self.process.poll() is None, f"the daemon exited:\n{self.log()}"
            return daemon_state(self.index_dir) == state

        daemon_wait(reached, f"the daemon to be {state}")

    def stop(self) -> None:
        if self.process.poll() is None:
            try:
                DaemonClient(self.index_dir, timeout=10).shutdown()
                self.process.wait(timeout=60)
            except (DaemonUnavailable, CodeseekError, subprocess.TimeoutExpired):
                self.process.kill()
                self.process.wait()


@pytest.fixture
def daemon_process(sample_copy: Path, tmp_path: Path) -> Iterator[DaemonProcess]:
    running = DaemonProcess(sample_copy, tmp_path)
    try:
        running.wait_until("watching")
        yield running
    finally:
        running.stop()


# A `codeseek watch` whose first build stops after its scan until a flag file appears:
# a deterministic "edit during the build" (the scan has passed, the build goes on).
PAUSED_BUILD = """
import sys
import time
from pathlib import Path

import codeseek.indexer
from codeseek.cli import main

scanned, go = Path(sys.argv[1]), Path(sys.argv[2])
real_scan = codeseek.indexer.scan_repository


def scan_then_wait(*args, **kwargs):
    result = real_scan(*args, **kwargs)
    if not scanned.exists():  # the first build only
        scanned.touch()
        while not go.exists():
            time.sleep(0.02)
    return result


codeseek.indexer.scan_repository = scan_then_wait
sys.exit(main(sys.argv[3:]))
"""


def test_an_edit_during_the_first_build_is_applied_after_it(sample_copy: Path,
                                                            tmp_path: Path) -> None:
    hook = tmp_path / "paused_build.py"
    hook.write_text(PAUSED_BUILD, encoding="utf-8")
    scanned, go = tmp_path / "scanned", tmp_path / "go"
    running = DaemonProcess(sample_copy, tmp_path,
                            [sys.executable, str(hook), str(scanned), str(go)])
    try:
        daemon_wait(scanned.exists, "the first build to finish its scan")
        (sample_copy / "python" / "kestrune" / "beacons.py").write_text(
            'def ring_cobalt_beacons(dock):\n    """Ring the cobalt beacons of a dock."""\n'
            "    return dock\n", encoding="utf-8")
        assert daemon_state(running.index_dir) == "indexing"  # written during the build
        go.touch()
        running.wait_until("watching")
        client = DaemonClient(running.index_dir)
        # the periodic reconcile is 300 s away: only the watcher can bring it this soon
        daemon_wait(lambda: [h.qualname for h in client.search("ring the cobalt beacons", 1)]
                    == ["ring_cobalt_beacons"], "the file written during the build")
    finally:
        running.stop()
    assert "Traceback" not in running.log()


def test_a_refused_second_watch_leaves_the_running_daemon_its_socket(
        daemon_process: DaemonProcess, tmp_path: Path) -> None:
    repo, index_dir = daemon_process.repo, daemon_process.index_dir
    command = [sys.executable, "-m", "codeseek"]
    env = daemon_env(tmp_path / "cache")
    second = subprocess.run([*command, "watch", str(repo), "--backend", "fake"], env=env,
                            capture_output=True, text=True, timeout=120, check=False)
    assert second.returncode == 1
    assert (index_dir / SOCKET_NAME).exists()
    status = subprocess.run([*command, "status", str(repo), "--json"], env=env,
                            capture_output=True, text=True, timeout=120, check=True)
    assert json.loads(status.stdout)["daemon"]["pid"] == daemon_process.process.pid
    assert daemon_state(index_dir) == "watching"
    # the refused one says why, and nothing else (it never started, so it never stopped)
    assert second.stderr == (
        f"error: a codeseek daemon (pid {daemon_process.process.pid}) already watches the "
        f"index at {index_dir}; stop it first or use it as it is\n")


@pytest.fixture
def served(sample_copy: Path) -> Iterator[tuple[Daemon, list[str]]]:
    """An in-process daemon and the lines it logs."""
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    messages: list[str] = []
    running = Daemon(index, log=messages.append, reconcile_seconds=3600)
    running.start()
    yield running, messages
    running.stop()
    index.close()


def daemon_exchange(path: Path, payload: bytes) -> list[dict[str, Any]]:
    """Send request lines on one connection; the answers, one per line."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
        sock.settimeout(30)
        sock.connect(str(path))
        sock.sendall(payload)
        sock.shutdown(socket.SHUT_WR)
        chunks = []
        while chunk := sock.recv(1 << 16):
            chunks.append(chunk)
    return [json.loads(line) for line in b"".join(chunks).splitlines()]


@pytest.mark.parametrize("line, message", [
    (b'{"v": 1, "op": "search", "queries": ["refund \\ud800 a rider"]}',
     "malformed request: 'queries' holds a lone surrogate (text that is not valid Unicode)"),
    (b'{"v": 1, "op": "search", "queries": ["refund"], "kinds": ["\\udfff"]}',
     "malformed request: 'kinds' holds a lone surrogate (text that is not valid Unicode)"),
    (b'{"v": 1, "op": "similar", "unit_id": 9223372036854775808}',  # 2**63
     "malformed request: 'unit_id' holds a whole number outside 64 bits"),
    (b'{"v": 1, "op": "similar", "unit_id": -9223372036854775809}',
     "malformed request: 'unit_id' holds a whole number outside 64 bits"),
    (b'{"v": 1, "op": "search", "queries": ["refund"], "k": 18446744073709551616}',
     "malformed request: 'k' holds a whole number outside 64 bits"),
    (b"[" * 30_000 + b"]" * 30_000, "malformed request: nested too deeply"),
    (b'{"v": 1, "op": "search", "x": ' + b'{"a": ' * 30_000 + b"1" + b"}" * 30_001,
     "malformed request: nested too deeply"),
])
def test_bad_values_get_an_error_answer_and_the_daemon_serves_on(
        served: tuple[Daemon, list[str]], capfd: pytest.CaptureFixture[str],
        line: bytes, message: str) -> None:
    daemon, logged = served
    path = daemon.index.settings.index_dir / SOCKET_NAME
    first, status = daemon_exchange(path, line + b'\n{"v": 1, "op": "status"}\n')
    assert first == {"v": 1, "ok": False, "error": message, "kind": "ProtocolError"}
    assert status["ok"] and status["daemon"]["state"] == "watching"  # the same connection
    assert "Traceback" not in capfd.readouterr().err
    assert not [m for m in logged if m.startswith("error")]


def test_a_path_pattern_may_hold_undecodable_bytes(served: tuple[Daemon, list[str]]) -> None:
    # a file name that is not UTF-8 reaches Python as lone surrogates (surrogateescape);
    # a pattern naming one is matched, as in process, not refused
    daemon, _ = served
    answer, = daemon_exchange(daemon.index.settings.index_dir / SOCKET_NAME,
                              b'{"v": 1, "op": "search", "queries": ["refund"], '
                              b'"paths": ["caf\\udce9/*"]}\n')
    assert answer == {"v": 1, "ok": True, "results": [[]]}


def test_an_unexpected_failure_is_one_error_line(served: tuple[Daemon, list[str]],
                                                 capfd: pytest.CaptureFixture[str],
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    daemon, logged = served

    def broken(*args: object, **kwargs: object) -> None:
        raise RuntimeError("the gears slipped\nat dock 7")

    monkeypatch.setattr(daemon.index, "search_many", broken)
    path = daemon.index.settings.index_dir / SOCKET_NAME
    first, status = daemon_exchange(path, b'{"v": 1, "op": "search", "queries": ["x"]}\n'
                                          b'{"v": 1, "op": "status"}\n')
    expected = ("the daemon failed answering a request: unexpected RuntimeError: "
                "the gears slipped\\nat dock 7")
    assert first == {"v": 1, "ok": False, "error": expected, "kind": "DaemonError"}
    assert status["ok"]
    assert logged[-1] == f"error: {expected}"
    assert "Traceback" not in capfd.readouterr().err


def test_a_failure_outside_a_request_is_one_log_line(served: tuple[Daemon, list[str]],
                                                     capfd: pytest.CaptureFixture[str],
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    daemon, logged = served

    def broken(handler: object) -> None:
        raise RuntimeError("the dock gate jammed")

    monkeypatch.setattr(daemon, "_serve_connection", broken)
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
        sock.settimeout(30)
        sock.connect(str(daemon.index.settings.index_dir / SOCKET_NAME))
        assert sock.recv(1 << 16) == b""  # closed, with no answer
    daemon_wait(lambda: bool(logged) and logged[-1].startswith("error"), "the log line")
    assert logged[-1] == ("error: the daemon failed serving a connection: unexpected "
                          "RuntimeError: the dock gate jammed")
    monkeypatch.undo()
    assert daemon_state(daemon.index.settings.index_dir) == "watching"
    assert "Traceback" not in capfd.readouterr().err


# Request lines for the sweep: raw bytes, JSON-like token soup (with the values that
# once broke the daemon), deep nesting, and well-formed requests of random text
# (lone surrogates included). Never a shutdown: the daemon must outlive the sweep.
REQUEST_TOKENS = [b"{", b"}", b"[", b"]", b":", b",", b" ", b"\n", b'"v"', b"1", b"0", b"-1",
                  b'"op"', b'"search"', b'"similar"', b'"status"', b'"queries"', b'"k"',
                  b'"unit_id"', b'"languages"', b'"paths"', b'"kinds"', b'"refund"', b'""',
                  b'"\\ud800"', b'"\\udc80x"', b'"\\u0000"', b"9223372036854775808",
                  b"-9223372036854775809", b"1e999", b"NaN", b"Infinity", b"null", b"true",
                  b"\xff", b"\x00", b"\xed\xa0\x80"]
any_text = st.text(st.characters(exclude_categories=()), max_size=12)
request_lines = st.one_of(
    st.binary(max_size=400),
    st.lists(st.sampled_from(REQUEST_TOKENS), max_size=80).map(b"".join),
    st.tuples(st.integers(1, 40_000), st.sampled_from([b"[]", b"{}"])).map(
        lambda depth_pair: depth_pair[1][:1] * depth_pair[0] + depth_pair[1][1:] * depth_pair[0]),
    st.fixed_dictionaries(
        {"v": st.just(1), "op": st.sampled_from(["search", "similar", "status", "nope"])},
        optional={"queries": st.lists(any_text, max_size=3), "k": st.integers(),
                  "unit_id": st.integers(), "languages": st.lists(any_text, max_size=2),
                  "paths": st.lists(any_text, max_size=2),
                  "kinds": st.lists(any_text, max_size=2)},
    ).map(lambda request: json.dumps(request).encode()),
)


@settings(max_examples=200, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(lines=st.lists(request_lines, min_size=1, max_size=4))
def test_random_request_lines_get_one_answer_each_and_no_traceback(
        daemon_process: DaemonProcess, lines: list[bytes]) -> None:
    payload = b"\n".join(lines) + b"\n"
    answers = daemon_exchange(daemon_process.index_dir / SOCKET_NAME, payload)
    assert len(answers) == payload.count(b"\n")  # one answer per line
    for answer in answers:
        assert answer["v"] == 1 and isinstance(answer["ok"], bool)
        if not answer["ok"]:
            assert answer["error"] and "\n" not in answer["error"]
            assert answer["kind"] != "DaemonError"  # only foreseen errors, none unexpected
    assert daemon_state(daemon_process.index_dir) == "watching"
    log = daemon_process.log()
    assert "Traceback" not in log and "error:" not in log




# == full disk, read-only index, damaged store, a build in progress ==




# == a property-based sweep over random bytes ==
