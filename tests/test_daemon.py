"""The watching daemon: freshness, the socket protocol, concurrency and crash safety."""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import socket
import sqlite3
import stat
import subprocess
import sys
import sysconfig
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from codeseek import FakeEmbedder, open_index
from codeseek.api import Index
from codeseek.client import SOCKET_NAME, DaemonClient
from codeseek.daemon import MAX_REQUEST_BYTES, Daemon
from codeseek.errors import IndexLocked
from codeseek.store import Store

STDLIB = Path(sysconfig.get_paths()["stdlib"])


def wait_for(check: Callable[[], bool], timeout: float = 15.0, what: str = "condition") -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def names(client: DaemonClient, query: str, k: int = 5) -> list[str]:
    return [hit.qualname for hit in client.search(query, k)]


def fingerprint(index_dir: Path, model_id: str) -> dict[str, tuple[str, bytes]]:
    """uid -> (content hash, vector bytes): the whole observable state of an index."""
    store = Store.open(index_dir, create=False)
    try:
        labels, matrix = store.unit_vectors(model_id, FakeEmbedder().dim)
        vectors = {int(label): matrix[i].tobytes() for i, label in enumerate(labels)}
        return {stored.unit.uid: (stored.content_hash, vectors.get(stored.id, b""))
                for stored in store.iter_units()}
    finally:
        store.close()


def fresh_fingerprint(repo: Path, where: Path) -> dict[str, tuple[str, bytes]]:
    index = open_index(repo, index_dir=where, create=True, embedder=FakeEmbedder())
    index.update()
    index.close()
    return fingerprint(where, FakeEmbedder().model_id)


@pytest.fixture
def daemon(sample_copy: Path) -> Iterator[Daemon]:
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    running = Daemon(index, reconcile_seconds=3600, debounce=0.05)
    running.start()
    yield running
    running.stop()
    index.close()


@pytest.fixture
def client(daemon: Daemon) -> DaemonClient:
    return DaemonClient(daemon.index.settings.index_dir)


# -- freshness ---------------------------------------------------------------------------


def test_new_file_becomes_searchable(daemon: Daemon, client: DaemonClient) -> None:
    repo = daemon.index.settings.repo
    (repo / "python" / "kestrune" / "lanterns.py").write_text(
        'def count_teal_lanterns(street):\n    """Count the teal lanterns on a street."""\n'
        "    return len(street)\n", encoding="utf-8")
    wait_for(lambda: names(client, "count the teal lanterns", 1) == ["count_teal_lanterns"],
             what="the new function")


def test_edited_docstring_ranks(daemon: Daemon, client: DaemonClient) -> None:
    target = daemon.index.settings.repo / "python" / "kestrune" / "maintenance.py"
    text = target.read_text(encoding="utf-8")
    lines = text.splitlines(keepends=True)
    at = next(i for i, line in enumerate(lines) if "def triage_priority" in line)
    lines.insert(at + 1, '    """Weigh saffron kites against marble harbours."""\n')
    body = lines[at + 2]
    if body.strip().startswith(('"""', "'''")):  # drop the old docstring's first line
        pass
    target.write_text("".join(lines), encoding="utf-8")
    wait_for(lambda: "saffron kites marble harbours" in " ".join(
        h.doc_summary.lower().replace("against ", "") for h in client.search(
            "saffron kites marble harbours", 1)), what="the new docstring")
    assert client.search("saffron kites marble harbours", 1)[0].qualname == "triage_priority"


def test_deleted_file_leaves_results(daemon: Daemon, client: DaemonClient) -> None:
    repo = daemon.index.settings.repo
    assert "TicketDesk.assign_mechanic" in names(client, "assign mechanic ticket", 10)
    (repo / "python" / "kestrune" / "maintenance.py").unlink()
    wait_for(lambda: all(h.path != "python/kestrune/maintenance.py"
                         for h in client.search("assign mechanic ticket", 20)),
             what="the deleted file to leave")


def test_atomic_save_by_rename_is_a_modification(daemon: Daemon, client: DaemonClient) -> None:
    target = daemon.index.settings.repo / "python" / "kestrune" / "config.py"
    temp = target.with_name(".config.py.swp")
    temp.write_text(target.read_text(encoding="utf-8") +
                    '\n\ndef chart_violet_comets():\n    """Chart the violet comets."""\n',
                    encoding="utf-8")
    os.replace(temp, target)  # how many editors save
    wait_for(lambda: names(client, "chart the violet comets", 1) == ["chart_violet_comets"],
             what="the renamed-over file")
    assert all(not h.path.endswith(".swp") for h in client.search("violet comets", 20))


def test_moving_a_folder_reembeds_nothing(daemon: Daemon, client: DaemonClient) -> None:
    repo = daemon.index.settings.repo
    assert client.status()["daemon"]["units_embedded"] == 0
    shutil.move(repo / "go", repo / "services")
    wait_for(lambda: any(h.path.startswith("services/")
                         for h in client.search("dock status packet", 10)),
             what="the moved folder")
    wait_for(lambda: not any(h.path.startswith("go/")
                             for h in client.search("dock status packet", 30)),
             what="the old paths to leave")
    status = client.status()["daemon"]
    assert status["batches"] >= 1 and status["units_embedded"] == 0


def test_gitignore_change_reevaluates_files(daemon: Daemon, client: DaemonClient) -> None:
    repo = daemon.index.settings.repo
    with (repo / ".gitignore").open("a", encoding="utf-8") as handle:
        handle.write("rust/\n")
    wait_for(lambda: all(h.language != "rust" for h in client.search("fare cap", 30)),
             what="the newly ignored folder to leave")


def test_burst_converges_to_a_fresh_build(daemon: Daemon, tmp_path: Path) -> None:
    repo = daemon.index.settings.repo
    burst = repo / "python" / "burst"
    burst.mkdir()
    for number in range(500):
        (burst / f"mod_{number:03d}.py").write_text(
            f'def helper_{number}(x):\n    """Helper number {number} in the burst."""\n'
            f"    return x + {number}\n", encoding="utf-8")
    (repo / "python" / "kestrune" / "ratelimit.py").unlink()
    expected = fresh_fingerprint(repo, tmp_path / "fresh")
    model = FakeEmbedder().model_id

    def converged() -> bool:
        return (len(daemon.watcher.queue) == 0
                and fingerprint(daemon.index.settings.index_dir, model) == expected)

    wait_for(converged, timeout=30, what="the burst to converge")
    assert daemon.watcher.state.batches < 50  # batched, not 500 separate updates


# -- the protocol and the socket -----------------------------------------------------------


def test_socket_is_private(daemon: Daemon) -> None:
    mode = (daemon.index.settings.index_dir / SOCKET_NAME).stat().st_mode
    assert stat.S_ISSOCK(mode) and mode & 0o777 == 0o600


def test_status_reports_the_daemon(daemon: Daemon, client: DaemonClient) -> None:
    status = client.status()
    assert status["daemon"]["state"] == "watching"
    assert status["daemon"]["watcher"] in ("inotify", "polling")
    from codeseek.outline import outline_path

    # the same units the parser lists for the tree, straight from the files
    assert status["index"]["units"] == len(list(outline_path(daemon.index.settings.repo)))


def test_daemon_and_in_process_search_agree(daemon: Daemon, client: DaemonClient,
                                            tmp_path: Path) -> None:
    queries = ["refund a rider", "decode dock packet", "plan the van route"]
    remote = client.search_many(queries, 8)
    local = open_index(daemon.index.settings.repo, index_dir=tmp_path / "other", create=True,
                       embedder=FakeEmbedder())
    local.update()
    assert [[(h.path, h.qualname, h.start_line, h.confidence) for h in hits]
            for hits in remote] == \
        [[(h.path, h.qualname, h.start_line, h.confidence) for h in hits]
         for hits in local.search_many(queries, 8)]
    assert all(h.confidence is not None for hits in remote for h in hits)


def raw_exchange(path: Path, payload: bytes) -> bytes:
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
        sock.settimeout(10)
        sock.connect(str(path))
        sock.sendall(payload)
        sock.shutdown(socket.SHUT_WR)
        chunks = []
        while chunk := sock.recv(65536):
            chunks.append(chunk)
    return b"".join(chunks)


def test_oversized_request_is_refused(daemon: Daemon) -> None:
    path = daemon.index.settings.index_dir / SOCKET_NAME
    answer = raw_exchange(path, b'{"v": 2, "op": "search", "queries": ["' +
                          b"x" * (MAX_REQUEST_BYTES + 10) + b'"]}\n')
    response = json.loads(answer.splitlines()[0])
    assert response["ok"] is False and "request too large" in response["error"]


@pytest.mark.parametrize("line, words", [
    (b"not json\n", "malformed request"),
    (b"[1, 2]\n", "malformed request"),
    (b'{"v": 99, "op": "search"}\n', "unsupported protocol version"),
    (b'{"v": 2, "op": "read_file", "path": "/etc/passwd"}\n', "unknown op"),
    (b'{"v": 2, "op": "search", "queries": "x"}\n', "'queries' must be a list"),
    (b'{"v": 2, "op": "search", "queries": ["x"]}\n', "a query must be an object"),
    # below 1: the same words as the in-process search (codeseek.search)
    (b'{"v": 2, "op": "search", "queries": [{"text": "x", "k": 0}]}\n',
     "-k must be at least 1, not 0"),
    (b'{"v": 2, "op": "search", "queries": [{"text": "x", "k": 2147483648}]}\n', "'k' must be"),
    (b'{"v": 2, "op": "search", "queries": [{"text": "x", "filters": {"since": "3d"}}]}\n',
     "'since' must be a time in seconds since 1970, or null"),
    (b'{"v": 2, "op": "search", "queries": [{"text": "x", "filters": {"colour": []}}]}\n',
     "unknown filter 'colour'"),
    (b'{"v": 2, "op": "search", "queries": [{"unit_id": 7}]}\n', "holds a text"),
    (b'{"v": 2, "op": "neighbours", "query": {"unit_id": "7"}}\n', "'unit_id' must be"),
    (b'{"v": 2, "op": "neighbours", "query": {"text": "x"}}\n', "holds 'unit_id'"),
    (b'{"v": 2, "op": "neighbours", "query": {"unit_id": 999999}}\n', "no longer in the index"),
])
def test_bad_requests_get_clear_errors(daemon: Daemon, line: bytes, words: str) -> None:
    response = json.loads(raw_exchange(daemon.index.settings.index_dir / SOCKET_NAME, line))
    assert response["ok"] is False and words in response["error"]


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(payload=st.one_of(
    st.binary(max_size=300),
    st.dictionaries(st.text(max_size=8), st.one_of(st.none(), st.integers(), st.text(max_size=20),
                    st.lists(st.text(max_size=10), max_size=3)), max_size=5).map(
        lambda d: json.dumps({"v": 2, **d}).encode()),
))
def test_fuzzed_requests_never_break_the_daemon(daemon: Daemon, payload: bytes) -> None:
    response = daemon.handle_line(payload)
    assert response["v"] == 2 and isinstance(response["ok"], bool)
    if not response["ok"]:
        assert isinstance(response["error"], str) and response["error"]
    for hits in response.get("results", []):
        for hit in hits:  # only indexed text is ever served
            assert (daemon.index.settings.repo / hit["path"]).is_file()


def test_the_neighbours_op_answers_as_the_library(daemon: Daemon, client: DaemonClient) -> None:
    own = daemon.index.search("issue refund", 1)[0]
    served = client.neighbours(own.unit_id, 6, languages=["python"])
    assert [h.unit_id for h in served] == [
        h.unit_id for h in daemon.index.neighbours(own.unit_id, 6, languages=["python"])]
    assert served and {h.query for h in served} == {f"neighbours of {own.qualname}"}
    # the op's old name is gone, and the error names the ops there are
    response = daemon.handle_line(b'{"v": 2, "op": "similar", "query": {"unit_id": 1}}')
    assert response["error"] == "unknown op 'similar'; use search, neighbours, status or shutdown"


def test_paths_outside_the_repository_serve_nothing(client: DaemonClient) -> None:
    assert client.search("password", 10, paths=["/etc/*", "../*"]) == []


def test_second_daemon_is_refused(daemon: Daemon) -> None:
    other = open_index(daemon.index.settings.repo, embedder=FakeEmbedder())
    with pytest.raises(IndexLocked) as caught:
        Daemon(other).start()
    assert str(caught.value) == (
        f"a codeseek daemon (pid {os.getpid()}) already watches the index at "
        f"{daemon.index.settings.index_dir}; stop it first or use it as it is")
    other.close()


def test_stale_socket_is_replaced(sample_copy: Path) -> None:
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    stale = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    stale.bind(str(sample_copy / ".codeseek" / SOCKET_NAME))  # left by a crashed daemon
    stale.close()
    running = Daemon(index, reconcile_seconds=3600)
    running.start()
    try:
        assert DaemonClient(index.settings.index_dir).status()["ok"]
    finally:
        running.stop()
        index.close()


# -- faults ------------------------------------------------------------------------------


def test_disk_full_keeps_serving_and_recovers(daemon: Daemon, client: DaemonClient,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    repo = daemon.index.settings.repo
    full = threading.Event()
    full.set()

    class FullDisk:
        """The store's connection, as on a disk with no room for new rows."""

        def __init__(self, real: sqlite3.Connection) -> None:
            self.real = real

        def execute(self, sql: str, *args):  # type: ignore[no-untyped-def]
            if full.is_set() and sql.lstrip().startswith("INSERT INTO units"):
                raise sqlite3.OperationalError("database or disk is full")
            return self.real.execute(sql, *args)

        def __getattr__(self, name: str):  # type: ignore[no-untyped-def]
            return getattr(self.real, name)

    store = daemon.index.store
    monkeypatch.setattr(store, "_db", FullDisk(store._db))
    monkeypatch.setattr(daemon.watcher, "retry_seconds", 0.3)
    before = names(client, "refund a rider", 3)
    (repo / "python" / "kestrune" / "amber.py").write_text(
        'def polish_amber_gears():\n    """Polish the amber gears."""\n', encoding="utf-8")
    wait_for(lambda: bool(client.status()["daemon"]["last_error"]), what="the write error")
    assert "cannot write the index" in client.status()["daemon"]["last_error"]
    assert names(client, "refund a rider", 3) == before  # the last good index still serves
    full.clear()  # space returns
    wait_for(lambda: names(client, "polish the amber gears", 1) == ["polish_amber_gears"],
             what="recovery")
    assert client.status()["daemon"]["last_error"] is None


def test_watch_limit_falls_back_to_polling(sample_copy: Path,
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    import errno

    from watchdog.observers import Observer

    def no_watches(*args, **kwargs):  # type: ignore[no-untyped-def]
        raise OSError(errno.ENOSPC, "inotify watch limit reached")

    monkeypatch.setattr(Observer, "schedule", no_watches)
    messages: list[str] = []
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    running = Daemon(index, log=messages.append, reconcile_seconds=3600)
    running.start()
    try:
        assert running.watcher.state.mode == "polling"
        assert any("fs.inotify.max_user_watches" in m for m in messages)
        (sample_copy / "python" / "kestrune" / "polled.py").write_text(
            'def weigh_copper_bells():\n    """Weigh the copper bells."""\n', encoding="utf-8")
        client = DaemonClient(index.settings.index_dir)
        wait_for(lambda: names(client, "weigh the copper bells", 1) == ["weigh_copper_bells"],
                 what="a change seen by polling")
    finally:
        running.stop()
        index.close()


def test_queries_stay_consistent_while_files_change(daemon: Daemon,
                                                    client: DaemonClient) -> None:
    repo = daemon.index.settings.repo
    folder = repo / "python" / "churn"
    folder.mkdir()
    valid = {f"churn_{n}" for n in range(200)}
    errors: list[BaseException] = []
    answers: list[list[str]] = []
    stop = threading.Event()

    def ask() -> None:
        mine = DaemonClient(daemon.index.settings.index_dir)
        while not stop.is_set():
            try:
                hits = mine.search("churn helper number", 10)
                answers.append([h.qualname for h in hits])
                for hit in hits:  # a hit always matches committed text of its file
                    assert hit.start_line >= 1 and hit.path
            except BaseException as exc:  # noqa: BLE001 - every failure is collected
                errors.append(exc)
                return

    threads = [threading.Thread(target=ask) for _ in range(8)]
    for thread in threads:
        thread.start()
    for n in range(200):
        (folder / f"c{n}.py").write_text(
            f'def churn_{n}():\n    """Churn helper number {n}."""\n', encoding="utf-8")
        if n % 3 == 0 and n:
            (folder / f"c{n - 1}.py").unlink()
            valid.discard(f"churn_{n - 1}")
    wait_for(lambda: len(daemon.watcher.queue) == 0, what="the changes to settle")
    time.sleep(0.5)
    stop.set()
    for thread in threads:
        thread.join(timeout=30)
    assert not errors
    assert answers
    everything = {f"churn_{n}" for n in range(200)}
    for answer in answers:
        assert len(answer) == len(set(answer))  # never the same unit twice
        churn = [a for a in answer if a.startswith("churn_")]
        assert set(churn) <= everything


# -- kill -9 during a build ------------------------------------------------------------------


def stdlib_tree(target: Path) -> Path:
    # real code nobody here wrote: a slice of the standard library, big enough to take a while
    for name in ("email", "json", "logging", "http", "xml", "asyncio", "unittest"):
        shutil.copytree(STDLIB / name, target / name,
                        ignore=shutil.ignore_patterns("__pycache__", "test", "tests"))
    return target


def test_kill_9_during_a_build_never_breaks_the_index(tmp_path: Path) -> None:
    repo = stdlib_tree(tmp_path / "tree")
    expected = fresh_fingerprint(repo, tmp_path / "reference")
    model = FakeEmbedder().model_id
    rng = random.Random(20261202)
    command = [sys.executable, "-m", "codeseek", "watch", str(repo), "--backend", "fake"]
    interrupted = 0
    for trial in range(20):
        index_dir = tmp_path / f"trial{trial}"
        process = subprocess.Popen([*command, "--index-dir", str(index_dir)],
                                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(rng.uniform(0.4, 2.0))  # from before the first commit to the save
        process.send_signal(signal.SIGKILL)
        process.wait()
        interrupted += _was_mid_build(index_dir, len(expected))
        # restart: the same library call the daemon makes first
        recovered: Index = open_index(repo, index_dir=index_dir, create=True,
                                      embedder=FakeEmbedder())
        recovered.update()
        status = recovered.status()
        assert status.vectors_in_sync
        labels = recovered.searcher().vectors.labels
        assert len(labels) == status.units
        recovered.close()
        assert fingerprint(index_dir, model) == expected, f"trial {trial}"
    assert interrupted >= 10  # most kills landed while the build was writing


def _was_mid_build(index_dir: Path, total_units: int) -> bool:
    """Whether a killed build left a store that holds only part of the index."""
    if not (index_dir / "index.sqlite3").exists():
        return False
    try:
        store = Store.open(index_dir, create=False)
    except Exception:  # noqa: BLE001 - killed before the schema was committed
        return False
    try:
        manifest = store.manifest()
        synced = manifest.get("hnsw_generation") == str(store.generation())
        return store.counts()["units"] < total_units or not synced
    finally:
        store.close()


def test_vectors_match_after_recovery_to_exact_search(sample_copy: Path) -> None:
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    index.update()
    searcher = index.searcher()
    labels, matrix = index.store.unit_vectors(searcher.model_id, searcher.vectors.dim)
    query = index.embedder.encode(["refund"])[0]
    # reference: numpy brute-force cosine search
    best = int(labels[int(np.argmax(matrix @ query))])
    assert searcher.vectors.search(query, 1)[0][0] == best
    index.close()


def test_index_command_defers_to_a_running_daemon(daemon: Daemon) -> None:
    import io

    from codeseek.cli import main

    repo = str(daemon.index.settings.repo)
    out, err = io.StringIO(), io.StringIO()
    assert main(["index", repo, "-q"], out=out, err=err) == 0
    assert out.getvalue() == (f"a codeseek daemon (pid {os.getpid()}) keeps this index up to "
                              "date; nothing to do\n")
    out, err = io.StringIO(), io.StringIO()
    assert main(["index", repo, "--rebuild", "-q"], out=out, err=err) == 1
    assert err.getvalue() == (f"error: a codeseek daemon (pid {os.getpid()}) watches this "
                              "index; stop it before rebuilding\n")
    assert (daemon.index.settings.index_dir / "index.sqlite3").exists()


def test_search_and_status_commands_use_the_daemon(daemon: Daemon) -> None:
    import io

    from codeseek.cli import main

    repo = str(daemon.index.settings.repo)
    served = daemon.queries_served
    out, err = io.StringIO(), io.StringIO()
    assert main(["search", "refund a rider", "--repo", repo, "--json"], out=out, err=err) == 0
    assert daemon.queries_served == served + 1  # answered by the daemon, not in-process
    assert json.loads(out.getvalue().splitlines()[0])["rank"] == 1
    out = io.StringIO()
    assert main(["status", repo, "--json"], out=out, err=err) == 0
    assert json.loads(out.getvalue())["daemon"]["state"] == "watching"


def test_a_new_adapter_reaches_the_running_daemon(daemon: Daemon, client: DaemonClient) -> None:
    from codeseek.adapter import QueryAdapter, remove_adapter, save_adapter

    query = "retry failed uploads with backoff"
    plain = [h.unit_id for h in client.search(query, 10)]
    assert client.status()["index"]["adapter"] is None
    dim = FakeEmbedder().dim
    flip = np.eye(dim, dtype=np.float32)[::-1].copy()
    index_dir = daemon.index.settings.index_dir
    save_adapter(index_dir, QueryAdapter(flip, FakeEmbedder().model_id, {
        "split": {"holdout": 0.2, "seed": 0, "by_file": False}}))
    # reference: the same index opened afresh in this process, adapter loaded from disk
    fresh = open_index(daemon.index.settings.repo, embedder=FakeEmbedder())
    try:
        expected = [h.unit_id for h in fresh.search(query, 10)]
    finally:
        fresh.close()
    assert expected != plain
    assert [h.unit_id for h in client.search(query, 10)] == expected  # no restart
    assert client.status()["index"]["adapter"]["model_id"] == FakeEmbedder().model_id
    remove_adapter(index_dir)
    assert [h.unit_id for h in client.search(query, 10)] == plain


# -- the same inputs with and without a daemon ------------------------------------------------


def cli(*argv: str) -> tuple[int, str, str]:
    import io

    from codeseek.cli import main

    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


def test_the_cli_takes_the_same_inputs_with_and_without_a_daemon(
        daemon: Daemon, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CODESEEK_BACKEND", "fake")  # what the daemon fixture embeds with
    repo = str(daemon.index.settings.repo)
    phrases = ["refund a rider", "decode the dock packet", "assign a mechanic", "fare cap",
               "plan the van route"]
    batch = tmp_path / "batch.txt"  # 2,500 lines: more than one request holds
    batch.write_text("".join(f"{phrases[n % 5]} {n}\n" for n in range(2500)), encoding="utf-8")
    words = ["refund", "rider", "dock", "packet", "mechanic", "ticket", "fare", "route", "van",
             "station"]
    long_query = " ".join(words[n % len(words)] for n in range(20_000))
    assert len(long_query.encode()) > 100_000  # over a request of the old daemon (64 KB)
    commands = {
        "batch": ("search", "--batch", str(batch), "--repo", repo),
        "k 5000": ("search", "refund a rider", "-k", "5000", "--json", "--repo", repo),
        "k 5000 plain": ("search", "decode the dock packet", "-k", "5000", "--repo", repo),
        "100 KB": ("search", long_query, "--json", "--repo", repo),
    }
    through_daemon = {}
    for name, argv in commands.items():
        served = daemon.queries_served
        through_daemon[name] = cli(*argv)
        assert through_daemon[name][0] == 0, through_daemon[name][2]
        expected = 2500 if name == "batch" else 1
        assert daemon.queries_served == served + expected, name  # the daemon answered it
    daemon.stop()
    assert not (daemon.index.settings.index_dir / SOCKET_NAME).exists()
    for name, argv in commands.items():
        assert cli(*argv) == through_daemon[name], name  # in process: the same, word for word
    assert len(through_daemon["batch"][1].splitlines()) == 2500 * 10
    assert len(through_daemon["k 5000"][1].splitlines()) == daemon.index.status().units


def test_a_batch_is_split_to_fit_the_daemons_limits() -> None:
    from codeseek.client import (
        HITS_PER_REQUEST,
        MAX_QUERIES,
        QUERIES_PER_REQUEST,
        REQUEST_BYTES,
        search_requests,
    )
    from codeseek.query import Filters, Query

    def batch(lines: list[str], k: int) -> list[Query]:
        return [Query(text=text, k=k, filters=Filters(("python",))) for text in lines]

    def texts(request: dict[str, Any]) -> list[str]:
        return [query["text"] for query in request["queries"]]

    queries = [f"query {n} " + "é" * (n % 50) for n in range(2500)]
    for k in (10, 5000, 2**40):
        requests = search_requests(batch(queries, k))
        assert [q for request in requests for q in texts(request)] == queries  # in order
        for request in requests:
            sent_k = request["queries"][0]["k"]
            assert {query["k"] for query in request["queries"]} == {sent_k}
            assert {tuple(query["filters"]["languages"]) for query in request["queries"]} == \
                {("python",)}
            assert len(request["queries"]) <= min(QUERIES_PER_REQUEST, MAX_QUERIES)
            assert len(request["queries"]) * sent_k <= max(HITS_PER_REQUEST, sent_k)
            assert len(json.dumps({"v": 2, **request})) + 1 <= REQUEST_BYTES
    assert len(search_requests(batch(queries, 10))) == 2500 // QUERIES_PER_REQUEST
    assert search_requests(batch(queries, 2**40))[0]["queries"][0]["k"] == 2**31 - 1
    big = "x" * (2 * REQUEST_BYTES)  # one query over the usual size goes alone, whole
    assert [texts(r) for r in search_requests(batch(["a", big, "b"], 10))] == \
        [["a"], [big], ["b"]]


def test_a_query_too_large_for_any_request_is_answered_in_process_and_said(
        daemon: Daemon, monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.client

    monkeypatch.setenv("CODESEEK_BACKEND", "fake")
    monkeypatch.setattr(codeseek.client, "MAX_REQUEST_BYTES", 2000)
    served = daemon.queries_served
    query = "refund a rider " * 200
    code, out, err = cli("search", query, "--json", "--repo", str(daemon.index.settings.repo))
    assert code == 0 and json.loads(out.splitlines()[0])["rank"] == 1
    assert daemon.queries_served == served
    assert err == ("codeseek: a query of 3,000 bytes is larger than a daemon request may be "
                   "(2,000 bytes); answering in this process\n")


def fake_daemon(path: Path, reply: bytes) -> threading.Thread:
    """A socket that accepts one connection, reads a line, answers ``reply`` and closes."""
    server = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    server.bind(str(path))
    server.listen(1)

    def serve() -> None:
        with server:
            connection, _ = server.accept()
            with connection:
                connection.makefile("rb").readline()
                connection.sendall(reply)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    return thread


@pytest.mark.parametrize("reply, reason", [
    (b"", "it closed the connection"),
    (b'{"v": 2, "ok": true, "results": [[{"path": "x"', "its answer broke off"),
    (b"<html>\n", "its answer is not JSON"),
    (b'{"v": 2, "ok": true, "results": []}\n', "its answer does not match the request"),
])
def test_a_daemon_that_fails_is_an_error_not_a_quiet_fallback(
        fake_index: Index, monkeypatch: pytest.MonkeyPatch, reply: bytes, reason: str) -> None:
    monkeypatch.setenv("CODESEEK_BACKEND", "fake")
    socket_path = fake_index.settings.index_dir / SOCKET_NAME
    thread = fake_daemon(socket_path, reply)
    code, out, err = cli("search", "refund a rider", "--repo", str(fake_index.settings.repo))
    thread.join(timeout=30)
    assert (code, out) == (1, "")
    assert err == (f"error: the codeseek daemon on {socket_path} failed to answer ({reason}); "
                   "see its log, or stop it to search without it\n")


def test_a_socket_nobody_listens_on_is_searched_without(fake_index: Index,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CODESEEK_BACKEND", "fake")
    stale = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    stale.bind(str(fake_index.settings.index_dir / SOCKET_NAME))  # left by a crashed daemon
    stale.close()
    code, out, err = cli("search", "refund a rider", "--json",
                         "--repo", str(fake_index.settings.repo))
    assert code == 0 and err == ""
    assert json.loads(out.splitlines()[0])["rank"] == 1


# -- the log -------------------------------------------------------------------------------


def test_the_log_names_the_updated_paths(fake_index: Index) -> None:
    from codeseek.watch import Watcher

    logged: list[str] = []
    watcher = Watcher(fake_index, log=logged.append)  # applied by hand: one batch each
    repo = fake_index.settings.repo
    folder = repo / "python" / "harbour"
    folder.mkdir()
    for name in ("a", "b", "c", "d", "e"):
        (folder / f"{name}.py").write_text(
            f'def moor_{name}():\n    """Moor boat {name}."""\n', encoding="utf-8")
    assert watcher.apply({f"python/harbour/{name}.py" for name in "abcde"})
    assert logged[-1].startswith("codeseek: updated python/harbour/a.py, python/harbour/b.py, "
                                 "python/harbour/c.py and 2 more: +5 ~0 -0 units (")
    (folder / "a.py").unlink()
    (folder / "b.py").write_text('def moor_b():\n    """Moor boat bee."""\n', encoding="utf-8")
    assert watcher.apply({"python/harbour/a.py", "python/harbour/b.py"})
    assert logged[-1].startswith(
        "codeseek: updated python/harbour/a.py and python/harbour/b.py: +0 ~1 -1 units (")
    (folder / "c.py").write_text('def moor_c():\n    """Moor boat sea."""\n', encoding="utf-8")
    assert watcher.apply({""})  # the reconcile names what it found, not "the whole tree"
    assert logged[-1].startswith("codeseek: updated python/harbour/c.py: +0 ~1 -0 units (")
    odd = folder / "bell\x1b[2J.py"  # a name that would clear the screen, shown escaped
    odd.write_text('def ring():\n    """Ring."""\n', encoding="utf-8")
    assert watcher.apply({"python/harbour/bell\x1b[2J.py"})
    assert logged[-1].startswith("codeseek: updated python/harbour/bell\\x1b[2J.py: +1 ~0 -0")


# -- the query seam ------------------------------------------------------------------------


def age_files(repo: Path, old: float) -> set[str]:
    """Set every Go and Rust file's modification time to ``old`` and every other file's
    to now (a copy keeps the checkout's own times, which may be of any age); the paths
    set to ``old``."""
    aged: set[str] = set()
    now = time.time()
    for path in sorted(repo.rglob("*")):
        if not path.is_file() or ".codeseek" in path.parts:
            continue
        if path.suffix in (".go", ".rs"):
            os.utime(path, (old, old))
            aged.add(path.relative_to(repo).as_posix())
        else:
            os.utime(path, (now, now))
    return aged


def seam_queries(unit_id: int, now: float) -> list[object]:
    from codeseek.query import Filters, Query

    return [
        Query(text="refund a rider", k=8),
        Query(text="decode dock packet", k=5, filters=Filters(languages=("Go",))),
        Query(text="plan the van route", k=6, filters=Filters(kinds=("function",))),
        Query(text="fare for a ride", k=7, filters=Filters(paths=("rust/**",),
                                                             kinds=("struct",))),
        Query(text="parse a packet", k=9, filters=Filters(since=now - 3600)),
        Query(text="parse a packet", k=9, filters=Filters(since=now + 86400)),
        Query(unit_id=unit_id, k=6),
        Query(unit_id=unit_id, k=6, filters=Filters(languages=("python",), since=now - 3600)),
    ]


def test_the_same_queries_give_the_same_hits_in_process_and_through_the_daemon(
        sample_copy: Path) -> None:
    from codeseek import SearchService, connect
    from codeseek.client import DaemonService
    from codeseek.query import Query

    now = time.time()
    aged = age_files(sample_copy, now - 30 * 86400)  # a month old: outside "since an hour"
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    running = Daemon(index, reconcile_seconds=3600)
    running.start()
    try:
        service = connect(sample_copy, embedder=FakeEmbedder())
        assert isinstance(service, DaemonService) and isinstance(service, SearchService)
        unit_id = index.search("issue refund", 1)[0].unit_id
        queries = seam_queries(unit_id, now)
        searches = [q for q in queries if isinstance(q, Query) and q.text is not None]
        near = [q for q in queries if isinstance(q, Query) and q.unit_id is not None]
        served = running.queries_served
        remote = list(service.search_many(searches))
        remote_near = [service.neighbours(q) for q in near]
        assert running.queries_served == served + len(searches)  # the daemon answered
        assert not service.gone
        local = index.search_many(searches)
        assert remote == local  # every field of every hit: rank, score, similarity, text
        assert remote_near == [index.neighbours(q) for q in near]
        assert [service.search(q) for q in searches] == local
        assert all(local[:4]) and all(remote_near)  # the filters leave something to compare
        since_hour, since_tomorrow = local[4], local[5]
        assert since_hour and not {h.path for h in since_hour} & aged
        assert since_tomorrow == []
        service.close()
    finally:
        running.stop()
        index.close()


def test_connect_picks_the_daemon_when_one_runs_and_the_index_otherwise(
        daemon: Daemon) -> None:
    from codeseek import Index, connect
    from codeseek.client import DaemonService

    repo = daemon.index.settings.repo
    through = connect(repo)
    assert isinstance(through, DaemonService)
    status = through.daemon_status()
    assert status is not None and (status["pid"], status["state"]) == (os.getpid(), "watching")
    through.close()
    for backend in ("fake", "onnx"):
        local = connect(repo, backend=backend)  # an explicit backend: in process
        assert isinstance(local, Index) and local.daemon_status() is None
        local.close()
    daemon.stop()
    after = connect(repo, embedder=FakeEmbedder())  # no daemon: the index, in process
    assert isinstance(after, Index)
    assert after.search("refund a rider", 3)
    after.close()


def test_a_service_whose_daemon_stops_answers_in_process(daemon: Daemon) -> None:
    from codeseek import Query, connect

    repo = daemon.index.settings.repo
    service = connect(repo, embedder=FakeEmbedder())
    query = Query(text="refund a rider", k=4)
    before = service.search(query)
    assert service.daemon_status() is not None
    index_dir = daemon.index.settings.index_dir
    daemon.stop()
    stale = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    stale.bind(str(index_dir / SOCKET_NAME))  # a socket nobody listens on, as after a crash
    stale.close()
    assert service.search(query) == before  # the same hits, found in this process
    assert service.daemon_status() is None
    service.close()


def test_the_daemon_answers_an_old_protocol_request_with_a_clear_error(daemon: Daemon) -> None:
    response = daemon.handle_line(b'{"v": 1, "op": "search", "queries": ["refund"], "k": 3}')
    assert response == {
        "v": 2, "ok": False, "kind": "ProtocolError",
        "error": "unsupported protocol version 1; this daemon speaks 2 (a codeseek of "
                 "another version sent the request; use the same codeseek for both)"}


def test_a_search_through_the_daemon_loads_none_of_the_index_modules(daemon: Daemon) -> None:
    """The point of a warm daemon: the searching process only speaks to its socket.
    CPython's own import tracer (python -X importtime) says what was imported."""
    repo = daemon.index.settings.repo
    result = subprocess.run([sys.executable, "-X", "importtime", "-m", "codeseek", "search",
                             "refund a rider", "--repo", str(repo), "-k", "3", "--json"],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert len(result.stdout.splitlines()) == 3
    imported = {line.rsplit("|", 1)[-1].strip() for line in result.stderr.splitlines()
                if line.startswith("import time:")}
    assert "codeseek.client" in imported  # the tracer saw the search's own imports
    assert not imported & {"numpy", "hnswlib", "onnxruntime", "codeseek.api",
                           "codeseek.store", "torch"}


def test_through_a_daemon_an_index_elsewhere_still_refuses_another_repository(
        sample_copy: Path, tmp_path: Path) -> None:
    from codeseek import connect
    from codeseek.errors import UsageError

    where = tmp_path / "kept-elsewhere"
    index = open_index(sample_copy, index_dir=where, create=True, embedder=FakeEmbedder())
    running = Daemon(index, reconcile_seconds=3600)
    running.start()
    try:
        other = tmp_path / "other"
        other.mkdir()
        with pytest.raises(UsageError, match="was built for the repository"):
            connect(other, index_dir=where)
        served = connect(sample_copy, index_dir=where)  # its own repository is served
        try:
            assert served.daemon_status() is not None
        finally:
            served.close()
    finally:
        running.stop()
        index.close()
