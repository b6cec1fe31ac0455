"""Hostile input and faults, in one place: every case ends in a one-line error
(or a documented skip) and leaves an index equal to a fresh build.

Sections (one per area, so each can grow without touching the others):
the index folder and files written outside it; terminal output; file names
and bytes; configuration and command-line values; the daemon; full disk and
read-only folders; a property-based sweep over random bytes.
"""

from __future__ import annotations

import io
import os
import shutil
import stat
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest

from codeseek import FakeEmbedder, open_index, safefs
from codeseek.cli import main
from codeseek.errors import IndexFolderUnsafe

# == the index folder: nothing written outside the repository and its index ==

# A cloned repository may commit a `.codeseek/` of its own: every attack below must end
# in one error line and leave the file it aims at exactly as it was (content and mode).


def run_cli(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


def snapshot(path: Path) -> tuple[bytes, int]:
    """A file's bytes and mode (what an attack must not change)."""
    return path.read_bytes(), stat.S_IMODE(path.stat().st_mode)


@pytest.fixture
def outside(tmp_path: Path) -> Path:
    """A file of the user's outside the repository, the target of planted links."""
    target = tmp_path / "precious.txt"
    target.write_text("the user's own file\n", encoding="utf-8")
    target.chmod(0o640)
    return target


def plant(repo: Path, name: str, target: Path) -> Path:
    folder = repo / ".codeseek"
    folder.mkdir(exist_ok=True, mode=0o700)
    link = folder / name
    link.symlink_to(target)
    return link


@pytest.mark.parametrize("command", [("index",), ("watch",)])
def test_a_planted_daemon_lock_link_writes_nothing(sample_copy: Path, outside: Path,
                                                   command: tuple[str, ...]) -> None:
    before = snapshot(outside)
    link = plant(sample_copy, "daemon.lock", outside)
    code, _, err = run_cli(*command, str(sample_copy), "--backend", "fake")
    assert code == 1
    assert err == (f"error: {link}: a symbolic link in the index folder; codeseek never "
                   "follows links there (a cloned repository could aim one at your files): "
                   "remove it\n")
    assert snapshot(outside) == before


def test_a_planted_gitignore_link_creates_nothing(sample_copy: Path, tmp_path: Path) -> None:
    missing = tmp_path / "elsewhere" / "created-by-codeseek"
    missing.parent.mkdir()
    plant(sample_copy, ".gitignore", missing)
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake")
    assert code == 1 and err.count("\n") == 1 and "symbolic link" in err
    assert not missing.exists() and list(missing.parent.iterdir()) == []


def test_a_planted_writer_lock_link_creates_nothing(sample_copy: Path, tmp_path: Path,
                                                    outside: Path) -> None:
    missing = tmp_path / "lock-target"
    plant(sample_copy, "writer.lock", missing)
    before = snapshot(outside)
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake")
    assert code == 1 and "symbolic link" in err
    assert not missing.exists() and not missing.is_symlink()
    assert snapshot(outside) == before


def test_a_planted_index_folder_link_is_refused(sample_copy: Path, tmp_path: Path) -> None:
    target = tmp_path / "someone-elses-folder"
    target.mkdir()
    (target / "notes.txt").write_text("mine\n", encoding="utf-8")
    target.chmod(0o755)
    (sample_copy / ".codeseek").symlink_to(target, target_is_directory=True)
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake")
    assert code == 1
    assert err == (f"error: {sample_copy / '.codeseek'}: the index folder is a symbolic link; "
                   "codeseek never follows links there: remove the link, or name the real "
                   "folder with --index-dir\n")
    assert stat.S_IMODE(target.stat().st_mode) == 0o755
    assert sorted(p.name for p in target.iterdir()) == ["notes.txt"]
    # the rebuild path deletes files: through the link it would delete the target's
    assert run_cli("index", str(sample_copy), "--backend", "fake", "--rebuild")[0] == 1
    assert sorted(p.name for p in target.iterdir()) == ["notes.txt"]


@pytest.mark.parametrize("name", ["index.sqlite3", "index.sqlite3-wal", "index.sqlite3-shm",
                                  "vectors.hnsw", "eval-vectors.npz", "adapter.npz",
                                  "adapter.json", "daemon.sock"])
def test_a_link_beside_a_built_index_is_refused(sample_copy: Path, outside: Path,
                                                name: str) -> None:
    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0
    (sample_copy / ".codeseek" / name).unlink(missing_ok=True)
    plant(sample_copy, name, outside)
    before = snapshot(outside)
    for command in (("index", str(sample_copy)), ("status", str(sample_copy)),
                    ("search", "refund a rider", "--repo", str(sample_copy))):
        code, out, err = run_cli(*command, "--backend", "fake") if command[0] != "status" \
            else run_cli(*command)
        assert code == 1, (command, out, err)
        assert err.startswith("error: ") and "symbolic link" in err and err.count("\n") == 1
    assert snapshot(outside) == before


def test_the_daemon_never_removes_or_binds_through_a_planted_socket_name(
        sample_copy: Path, outside: Path) -> None:
    from codeseek.daemon import Daemon

    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    index.update()
    link = sample_copy / ".codeseek" / "daemon.sock"
    link.symlink_to(outside)  # planted after the folder was checked
    running = Daemon(index, reconcile_seconds=3600)
    try:
        with pytest.raises(IndexFolderUnsafe, match="symbolic link"):
            running._listen()
    finally:
        index.close()
    assert link.is_symlink() and snapshot(outside)[0] == b"the user's own file\n"


def test_an_index_folder_of_another_user_is_refused(sample_copy: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    folder = sample_copy / ".codeseek"
    folder.mkdir(mode=0o700)
    if os.geteuid() == 0:
        os.chown(folder, 4242, 4242)  # root (as in CI) can give it away for real
        owner = 4242
    else:
        owner = os.geteuid()  # seen from a user the folder does not belong to
        monkeypatch.setattr(safefs, "_user", lambda: owner + 1)
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake")
    assert code == 1
    assert err == (f"error: {folder}: the index folder belongs to another user (uid {owner}); "
                   "codeseek keeps an index only in a folder of yours\n")
    assert list(folder.iterdir()) == []


def test_a_new_index_folder_is_the_owners_alone(sample_copy: Path, tmp_path: Path) -> None:
    where = tmp_path / "made" / "idx"
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "--index-dir",
                           str(where))
    assert code == 0 and "warning" not in err
    assert stat.S_IMODE(where.stat().st_mode) == 0o700
    assert stat.S_IMODE((where / "index.sqlite3").stat().st_mode) == 0o600
    assert (where / ".gitignore").read_text(encoding="utf-8").splitlines()[-1] == "*"


def test_an_existing_index_folder_keeps_its_mode_and_is_warned_about_once(
        sample_copy: Path, tmp_path: Path) -> None:
    where = tmp_path / "shared"
    where.mkdir()
    where.chmod(0o755)
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "--index-dir",
                           str(where))
    assert code == 0
    assert err.splitlines()[0] == (
        f"warning: the index folder {where} is open to other users (mode 0755); codeseek "
        "leaves its mode as it is and makes its files readable by you only "
        f"(`chmod 700 {where}` closes it)")
    assert stat.S_IMODE(where.stat().st_mode) == 0o755
    for name in ("index.sqlite3", "vectors.hnsw"):
        assert stat.S_IMODE((where / name).stat().st_mode) == 0o600
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "--index-dir",
                           str(where))
    assert code == 0 and "warning" not in err  # said once, when the index was made


def test_a_world_writable_index_folder_is_refused_and_left_as_it_is(
        sample_copy: Path, tmp_path: Path) -> None:
    where = tmp_path / "drop"
    where.mkdir()
    where.chmod(0o1777)
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "--index-dir",
                           str(where))
    assert code == 1
    assert err == (f"error: {where}: other users can write to the index folder (mode 1777); "
                   "use a folder of your own, or `chmod o-w` it\n")
    assert stat.S_IMODE(where.stat().st_mode) == 0o1777
    assert list(where.iterdir()) == []


def test_an_index_folder_holding_source_is_refused(sample_copy: Path) -> None:
    git = shutil.which("git")
    if git is None:
        pytest.skip("git is not installed")
    subprocess.run([git, "init", "-q", str(sample_copy)], check=True)
    # the reference for "hidden from git": git's own list of untracked files
    def untracked() -> list[str]:
        return subprocess.run([git, "-C", str(sample_copy), "ls-files", "--others",
                               "--exclude-standard", "python"], capture_output=True,
                              text=True, check=True).stdout.splitlines()
    before = untracked()
    assert before
    source = sample_copy / "python"
    names = sorted(p.name for p in source.iterdir())
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "--index-dir",
                           str(source))
    assert code == 1
    assert err.startswith(f"error: {source}: the folder holds files that are not a codeseek "
                          "index (")
    assert err.endswith("); an index there would hide them from git and from the index: "
                        f"name a new or empty folder, such as {source / '.codeseek'}\n")
    assert sorted(p.name for p in source.iterdir()) == names
    assert untracked() == before
    # the suggested folder works, and hides nothing of python/
    code, _, _ = run_cli("index", str(sample_copy), "--backend", "fake", "--index-dir",
                         str(source / ".codeseek"))
    assert code == 0
    assert untracked() == before


def test_an_index_folder_elsewhere_holding_other_files_is_refused(
        sample_copy: Path, tmp_path: Path) -> None:
    where = tmp_path / "documents"
    where.mkdir(mode=0o700)
    (where / "letter.txt").write_text("dear\n", encoding="utf-8")
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "--index-dir",
                           str(where))
    assert code == 1
    assert err == (f"error: {where}: the folder holds files that are not a codeseek index "
                   "(letter.txt, ...); codeseek keeps its index in a folder of its own: name "
                   f"a new or empty folder, such as {where / '.codeseek'}\n")
    assert sorted(p.name for p in where.iterdir()) == ["letter.txt"]


# == terminal output: control characters escaped, JSON exact ==




# == file names and bytes: non-UTF-8 names, newlines in names ==




# == configuration and command-line values ==




# == the daemon: requests, locks, sockets, first build ==




# == full disk, read-only index, damaged store, a build in progress ==


def fingerprint(index_dir: Path) -> dict[str, tuple[str, bytes]]:
    """uid -> (content hash, vector bytes): what an index holds."""
    from codeseek.store import Store

    store = Store.open(index_dir, create=False)
    try:
        model = FakeEmbedder()
        labels, matrix = store.unit_vectors(model.model_id, model.dim)
        vectors = {int(label): matrix[i].tobytes() for i, label in enumerate(labels)}
        return {s.unit.uid: (s.content_hash, vectors.get(s.id, b"")) for s in store.iter_units()}
    finally:
        store.close()


def fill_the_disk(store: object) -> None:
    """Let the store's file grow no more: SQLite then fails as on a full disk, with
    SQLITE_FULL ("database or disk is full"), and rolls the transaction back itself."""
    db = store._db  # type: ignore[attr-defined]
    pages = db.execute("PRAGMA page_count").fetchone()[0]
    db.execute(f"PRAGMA max_page_count = {pages}")


NEW_MODULE = "".join(f'def weigh_cargo_{i}(bike):\n    """Weigh the cargo of bike {i}."""\n'
                     f'    return {i} * len(bike)  # {"padding " * 40}\n\n'
                     for i in range(60))


def test_a_full_disk_during_index_is_one_error_and_keeps_the_last_good_index(
        sample_copy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from codeseek.store import Store

    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0
    index_dir = sample_copy / ".codeseek"
    good = fingerprint(index_dir)
    (sample_copy / "python" / "cargo.py").write_text(NEW_MODULE, encoding="utf-8")
    real_open = Store.open

    def full_open(*args, **kwargs):  # type: ignore[no-untyped-def]
        store = real_open(*args, **kwargs)
        fill_the_disk(store)
        return store

    monkeypatch.setattr(Store, "open", full_open)
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 1
    assert err == (f"error: {index_dir / 'index.sqlite3'}: cannot write the index: database "
                   "or disk is full; free some space and run it again (the index keeps what "
                   "was committed)\n")
    monkeypatch.setattr(Store, "open", real_open)
    assert fingerprint(index_dir) == good
    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0  # space is back
    assert any(uid.startswith("python/cargo.py") for uid in fingerprint(index_dir))


def test_the_daemon_reports_a_full_disk_as_its_cause(sample_copy: Path) -> None:
    import time

    from codeseek.daemon import Daemon

    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    running = Daemon(index, reconcile_seconds=3600, debounce=0.05)
    running.start()
    try:
        running.watcher.retry_seconds = 3600
        fill_the_disk(index.store)
        (sample_copy / "python" / "cargo.py").write_text(NEW_MODULE, encoding="utf-8")
        deadline = time.monotonic() + 20
        while running.daemon_status()["last_error"] is None and time.monotonic() < deadline:
            time.sleep(0.05)
        error = running.daemon_status()["last_error"]
        assert error is not None and "database or disk is full" in error
        assert "rollback" not in error
    finally:
        running.stop()
        index.close()


CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH = 1, 2  # linux/capability.h
PR_CAPBSET_DROP = 24  # linux/prctl.h


def _without_root_file_powers() -> None:
    """In the child before exec: drop the capabilities that let root ignore file modes
    (so chmod binds it, as it binds every other user)."""
    import ctypes

    libc = ctypes.CDLL(None, use_errno=True)
    for cap in (CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH):
        if libc.prctl(PR_CAPBSET_DROP, cap, 0, 0, 0) != 0:
            raise OSError(ctypes.get_errno(), "prctl(PR_CAPBSET_DROP)")


def _readonly_run(*argv: str) -> subprocess.CompletedProcess[str]:
    """Run Python (``-m codeseek ...``) as a process that chmod binds: this user, or
    root without the capabilities that override file modes (tests run as root in CI)."""
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}
    command = [sys.executable, *argv]
    extra = {"preexec_fn": _without_root_file_powers} if os.geteuid() == 0 else {}
    try:
        return subprocess.run(command, capture_output=True, text=True, env=env, timeout=120,
                              **extra)  # type: ignore[call-overload]
    except subprocess.SubprocessError as exc:
        pytest.skip(f"cannot drop root's file capabilities here ({exc}); run as a user")


@pytest.fixture
def readonly_repo(sample_copy: Path) -> Iterator[Path]:
    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0
    (sample_copy / ".codeseek").chmod(0o500)
    yield sample_copy
    (sample_copy / ".codeseek").chmod(0o700)


def test_search_and_status_need_no_write_access(readonly_repo: Path) -> None:
    folder = readonly_repo / ".codeseek"
    before = sorted(p.name for p in folder.iterdir())
    probe = _readonly_run("-c", f"open({str(folder / 'probe')!r}, 'w')")
    assert probe.returncode == 1 and "PermissionError" in probe.stderr  # the folder binds
    found = _readonly_run("-m", "codeseek", "search", "refund a rider", "--repo",
                          str(readonly_repo), "--backend", "fake", "--json", "-k", "3")
    assert found.returncode == 0, found.stderr
    assert len(found.stdout.splitlines()) == 3
    status = _readonly_run("-m", "codeseek", "status", str(readonly_repo), "--json")
    assert status.returncode == 0, status.stderr
    assert '"units": ' in status.stdout
    assert sorted(p.name for p in folder.iterdir()) == before


def test_a_store_in_a_folder_that_cannot_be_written_opens_read_only(
        sample_copy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import sqlite3

    from codeseek.store import Store

    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0
    real_connect = sqlite3.connect

    def no_writes(target, *args, **kwargs):  # type: ignore[no-untyped-def]
        if not kwargs.get("uri"):  # a read-write open: as in a folder of mode 0500
            raise sqlite3.OperationalError("unable to open database file")
        return real_connect(target, *args, **kwargs)

    monkeypatch.setattr(sqlite3, "connect", no_writes)
    store = Store.open(sample_copy / ".codeseek", create=False)
    try:
        assert store.read_only and store.counts()["units"] > 0
    finally:
        store.close()


def test_status_reports_a_store_garbled_mid_file(sample_copy: Path) -> None:
    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0
    db = sample_copy / ".codeseek" / "index.sqlite3"
    data = bytearray(db.read_bytes())
    page = 4096
    for start in range(len(data) // 3 // page * page, 2 * len(data) // 3, 2 * page):
        data[start + 8 : start + page] = b"\xa5" * (page - 8)  # keep each page's flag byte
    db.write_bytes(bytes(data))
    code, out, err = run_cli("status", str(sample_copy))
    assert (code, out) == (1, "")
    assert err.startswith(f"error: {db}: the index store is ")
    assert err.endswith("; rebuild it with `codeseek index --rebuild`\n")
    assert run_cli("index", str(sample_copy), "--backend", "fake", "--rebuild")[0] == 0
    assert run_cli("status", str(sample_copy))[0] == 0


class StopsAfter(FakeEmbedder):
    """The fake model, interrupted (as by Ctrl-C or a kill) on its second batch."""

    def __init__(self) -> None:
        super().__init__()
        self.batches = 0

    def encode(self, texts, progress=None):  # type: ignore[no-untyped-def]
        self.batches += 1
        if self.batches == 2:
            raise KeyboardInterrupt
        return super().encode(texts, progress)


def test_search_after_a_killed_first_build_says_so(sample_copy: Path,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    from codeseek import indexer

    monkeypatch.setattr(indexer, "FILES_PER_TRANSACTION", 3)
    index = open_index(sample_copy, create=True, embedder=StopsAfter())
    with pytest.raises(KeyboardInterrupt):
        index.update()
    assert index.store.counts()["files"] > 0  # the first batches were committed
    index.close()
    code, out, err = run_cli("search", "refund a rider", "--repo", str(sample_copy),
                             "--backend", "fake")
    assert (code, out) == (1, "")
    assert err == (f"error: the first build of the index at {sample_copy / '.codeseek'} did "
                   "not finish; run `codeseek index` to complete it\n")
    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0
    code, out, _ = run_cli("search", "refund a rider", "--repo", str(sample_copy),
                           "--backend", "fake")
    assert code == 0 and "no matches" not in out


class Waits(FakeEmbedder):
    """The fake model, holding its second batch until told to go on."""

    def __init__(self) -> None:
        super().__init__()
        self.batches = 0
        self.reached = threading.Event()
        self.go_on = threading.Event()

    def encode(self, texts, progress=None):  # type: ignore[no-untyped-def]
        self.batches += 1
        if self.batches == 2:
            self.reached.set()
            self.go_on.wait(60)
        return super().encode(texts, progress)


def test_search_during_a_rebuild_says_the_index_is_being_built(
        sample_copy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from codeseek import indexer
    from codeseek.api import remove_index_files

    assert run_cli("index", str(sample_copy), "--backend", "fake")[0] == 0
    monkeypatch.setattr(indexer, "FILES_PER_TRANSACTION", 3)
    remove_index_files(sample_copy / ".codeseek")  # what `index --rebuild` does first
    model = Waits()
    index = open_index(sample_copy, create=True, embedder=model)
    build = threading.Thread(target=index.update)
    build.start()
    try:
        assert model.reached.wait(60)
        code, out, err = run_cli("search", "refund a rider", "--repo", str(sample_copy),
                                 "--backend", "fake")
        files = index.store.counts()["files"]
    finally:
        model.go_on.set()
        build.join(60)
        index.close()
    assert (code, out) == (1, "")
    assert err == (f"error: the index at {sample_copy / '.codeseek'} is being built "
                   f"({files} files so far); search again when the build is done\n")
    code, out, _ = run_cli("search", "refund a rider", "--repo", str(sample_copy),
                           "--backend", "fake")
    assert code == 0 and "no matches" not in out


def test_the_daemon_says_its_first_build_runs(sample_copy: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    from codeseek import indexer
    from codeseek.client import DaemonClient
    from codeseek.daemon import Daemon
    from codeseek.errors import IndexBuilding

    monkeypatch.setattr(indexer, "FILES_PER_TRANSACTION", 3)
    model = Waits()
    index = open_index(sample_copy, create=True, embedder=model)
    running = Daemon(index, reconcile_seconds=3600)
    starting = threading.Thread(target=running.start)
    starting.start()
    try:
        assert model.reached.wait(60)  # the socket listens; the first build is under way
        with pytest.raises(IndexBuilding, match="is being built"):
            DaemonClient(index.settings.index_dir).search("refund a rider", 3)
    finally:
        model.go_on.set()
        starting.join(60)
        running.stop()
        index.close()


# == a property-based sweep over random bytes ==
