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
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from codeseek.client import SOCKET_NAME, DaemonClient, DaemonUnavailable
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




# == full disk, read-only index, damaged store, a build in progress ==




# == a property-based sweep over random bytes ==
