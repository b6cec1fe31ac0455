"""Hostile input and faults, in one place: every case ends in a one-line error
(or a documented skip) and leaves an index equal to a fresh build.

Sections (one per area, so each can grow without touching the others):
the index folder and files written outside it; terminal output; file names
and bytes; configuration and command-line values; the daemon; full disk and
read-only folders; a property-based sweep over random bytes.
"""

from __future__ import annotations

import base64
import io
import json
import os
import shutil
import socket
import sqlite3
import stat
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from conftest import SAMPLE_REPO
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_daemon import wait_for

from codeseek import FakeEmbedder, config, open_index, safefs, scan
from codeseek.api import Index
from codeseek.cli import main
from codeseek.client import SOCKET_NAME, DaemonClient, DaemonUnavailable
from codeseek.config import load_settings
from codeseek.daemon import Daemon
from codeseek.display import printable
from codeseek.errors import CodeseekError, FileRefused, IndexFolderUnsafe, InvalidQuery


def run_cli(*argv: str) -> tuple[int, str, str]:
    """One command through codeseek.cli.main, its stdout and stderr as text."""
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


def index_quietly(repo: Path, *extra: str) -> None:
    code, _out, err = run_cli("index", str(repo), "--backend", "fake", "-q", *extra)
    assert code == 0, err

# == the index folder: nothing written outside the repository and its index ==

# A cloned repository may commit a `.codeseek/` of its own: every attack below must end
# in one error line and leave the file it aims at exactly as it was (content and mode).



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


def _sealed_searcher_state(repo: Path) -> tuple[bool, list[str]]:
    """Whether the index's vectors were rebuilt (not loaded) and the top names for a query."""
    with open_index(repo, embedder=FakeEmbedder()) as index:
        names = [hit.qualname for hit in index.search("refund a rider", 5)]
        return index.searcher().vectors.rebuilt, names


def test_a_planted_vector_file_is_never_loaded(sample_copy: Path) -> None:
    """A vectors.hnsw changed behind codeseek's back (planted, or a failing disk) is
    rebuilt from SQLite, never read by hnswlib: an entry point far out of range made
    the library read out of bounds (the process died on SIGSEGV)."""
    index_quietly(sample_copy)
    hnsw = sample_copy / ".codeseek" / "vectors.hnsw"
    rebuilt, wanted = _sealed_searcher_state(sample_copy)
    assert rebuilt is False  # codeseek's own sealed file is loaded
    data = bytearray(hnsw.read_bytes())
    # hnswlib's saveIndex layout (hnswalg.h): six size_t fields, then maxlevel (int32)
    # and enterpoint_node (uint32) at byte 52
    data[52:56] = (0x7FFFFF00).to_bytes(4, "little")
    hnsw.write_bytes(bytes(data))
    probe = ("from pathlib import Path; from codeseek import open_index, FakeEmbedder\n"
             f"index = open_index(Path({str(sample_copy)!r}), embedder=FakeEmbedder())\n"
             "print([h.qualname for h in index.search('refund a rider', 5)])\n")
    result = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                            timeout=120)  # a child process: a crash must not take pytest down
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == repr(wanted)


def test_a_vector_file_with_another_users_seal_is_rebuilt(
        sample_copy: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    index_quietly(sample_copy)
    _, wanted = _sealed_searcher_state(sample_copy)
    # the same index read by a user whose key differs: the seal does not verify
    monkeypatch.setenv("CODESEEK_CACHE_DIR", str(tmp_path / "other-user-cache"))
    rebuilt, names = _sealed_searcher_state(sample_copy)
    assert rebuilt is True and names == wanted
    key = tmp_path / "other-user-cache" / "seal.key"
    assert stat.S_IMODE(key.stat().st_mode) == 0o600 and len(key.read_bytes()) == 32
    rebuilt, _ = _sealed_searcher_state(sample_copy)  # saved again under this user's seal
    assert rebuilt is False


def test_a_seal_key_that_is_a_link_is_not_used(sample_copy: Path, tmp_path: Path,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    cache = tmp_path / "cache"
    cache.mkdir()
    planted = tmp_path / "planted.key"
    planted.write_bytes(b"k" * 32)
    (cache / "seal.key").symlink_to(planted)
    monkeypatch.setenv("CODESEEK_CACHE_DIR", str(cache))
    index_quietly(sample_copy)
    rebuilt, names = _sealed_searcher_state(sample_copy)
    assert rebuilt is True and names  # nothing verifies; search still answers
    assert planted.read_bytes() == b"k" * 32


def _two_repositories(tmp_path: Path) -> tuple[Path, Path, Path]:
    """Two copies of sample_repo and the index of the first, kept outside both."""
    first, second = tmp_path / "first", tmp_path / "second"
    shutil.copytree(SAMPLE_REPO, first, symlinks=True)
    shutil.copytree(SAMPLE_REPO, second, symlinks=True)
    index_dir = tmp_path / "first-index"
    index_quietly(first, "--index-dir", str(index_dir))
    return first, second, index_dir


def test_a_rebuild_never_deletes_another_repositorys_index(tmp_path: Path) -> None:
    first, second, index_dir = _two_repositories(tmp_path)
    before = (index_dir / "index.sqlite3").read_bytes()
    code, _out, err = run_cli("index", str(second), "--rebuild", "--backend", "fake", "-q",
                              "--index-dir", str(index_dir))
    assert (code, err) == (
        2, f"error: the index at {index_dir} was built for the repository {first}, not "
           f"{second}; give --repo {first}, or another --index-dir for {second}\n")
    assert (index_dir / "index.sqlite3").read_bytes() == before
    assert (index_dir / "vectors.hnsw").is_file()


def test_every_opening_of_an_index_checks_its_repository(tmp_path: Path) -> None:
    from codeseek.errors import UsageError
    from codeseek.tui.backend import LocalIndexer

    _first, second, index_dir = _two_repositories(tmp_path)
    with pytest.raises(UsageError):
        open_index(second, index_dir=index_dir, embedder=FakeEmbedder())
    # the TUI's builder
    indexer = LocalIndexer(second, index_dir=str(index_dir), embedder=FakeEmbedder())
    with pytest.raises(UsageError):
        indexer.update(None)


def test_the_tui_reader_shows_only_regular_files_inside_the_repository(
        sample_copy: Path, tmp_path: Path) -> None:
    import dataclasses

    from codeseek.search import SearchHit
    from codeseek.tui.render import SourceCache

    secret = "def secret():\n    return 'the outside file'\n"
    (sample_copy.parent / "secret.txt.py").write_text(secret)
    (sample_copy / "python" / "away.py").symlink_to(sample_copy.parent / "secret.txt.py")
    os.mkfifo(sample_copy / "python" / "pipe.py")
    (sample_copy / "python" / "big.py").write_text(secret + "#" * 200)
    hit = SearchHit(query="q", rank=1, score=0.1, similarity=0.5, path="", start_line=1,
                    end_line=2, language="python", kind="function", name="secret",
                    qualname="secret", signature="", doc_summary="",
                    snippet="the indexed lines", unit_id=1)
    reader = SourceCache(sample_copy, max_bytes=100)
    for planted in ["../secret.txt.py", str(sample_copy.parent / "secret.txt.py"),
                    "python/../../secret.txt.py", "python/away.py", "python/pipe.py",
                    "python/big.py"]:
        shown = reader.unit(dataclasses.replace(hit, path=planted))
        assert shown.code == "the indexed lines", planted
        assert "outside" not in shown.code
    (sample_copy / "python" / "fine.py").write_text(secret)
    assert "the outside file" in reader.unit(dataclasses.replace(hit, path="python/fine.py")
                                             ).code


# == terminal output: control characters escaped, JSON exact ==

# The sequence sets the window title (OSC 0, ended by BEL) and clears the screen
# (CSI 2 J): ECMA-48 / xterm's control sequences.
HOSTILE = "\x1b]0;pwned\x07\x1b[2J"
HOSTILE_SHOWN = "\\x1b]0;pwned\\x07\\x1b[2J"


@pytest.fixture
def hostile_repo(sample_copy: Path) -> Path:
    """sample_repo plus a docstring, a file name and a folder name holding escapes."""
    folder = sample_copy / "python" / f"den{HOSTILE}"
    folder.mkdir()
    (folder / f"gate{HOSTILE}.py").write_text(
        f'def unlock_gate():\n    """Unlock the gate {HOSTILE} of a dock."""\n    return 1\n',
        encoding="utf-8")
    (sample_copy / "python" / "new\nline.py").write_text(
        'def newline_named():\n    """A unit in a file whose name holds a newline."""\n'
        "    return 2\n", encoding="utf-8")
    return sample_copy


def test_plain_search_shows_escapes_instead_of_sending_them(hostile_repo: Path) -> None:
    index_quietly(hostile_repo)
    code, out, err = run_cli("search", "unlock the gate of a dock", "--repo", str(hostile_repo),
                             "--backend", "fake", "-k", "1")
    assert code == 0, err
    assert "\x1b" not in out and "\x07" not in out
    assert out.splitlines()[0] == (f" 1. unlock_gate  [function, python]  "
                                   f"python/den{HOSTILE_SHOWN}/gate{HOSTILE_SHOWN}.py:1")
    assert out.splitlines()[1] == f"    Unlock the gate {HOSTILE_SHOWN} of a dock."


def test_search_json_keeps_the_exact_text(hostile_repo: Path) -> None:
    index_quietly(hostile_repo)
    code, out, err = run_cli("search", "unlock the gate of a dock", "--repo", str(hostile_repo),
                             "--backend", "fake", "-k", "1", "--json")
    assert code == 0, err
    (line,) = out.splitlines()
    record = json.loads(line)
    assert record["path"] == f"python/den{HOSTILE}/gate{HOSTILE}.py"
    assert record["doc_summary"] == f"Unlock the gate {HOSTILE} of a dock."
    assert "\x1b" not in line  # json.dumps writes control characters as \u001b (RFC 8259)


def test_outline_plain_escapes_and_keeps_one_line_per_unit(hostile_repo: Path) -> None:
    code, out, err = run_cli("outline", str(hostile_repo / "python"))
    assert code == 0, err
    assert "\x1b" not in out and "\x07" not in out
    lines = out.splitlines()
    assert f"{hostile_repo.as_posix()}/python/den{HOSTILE_SHOWN}/gate{HOSTILE_SHOWN}.py:1-3 " \
           "function unlock_gate" in lines
    assert f"{hostile_repo.as_posix()}/python/new\\nline.py:1-3 function newline_named" in lines
    code, json_out, _ = run_cli("outline", str(hostile_repo / "python"), "--json")
    records = [json.loads(line) for line in json_out.splitlines()]
    assert len(records) == len(lines)  # one record per unit, both ways
    assert f"{hostile_repo.as_posix()}/python/new\nline.py" in {r["path"] for r in records}


def test_a_newline_in_a_file_name_stays_one_search_record(hostile_repo: Path) -> None:
    index_quietly(hostile_repo)
    argv = ("search", "a file whose name holds a newline", "--repo", str(hostile_repo),
            "--backend", "fake", "-k", "3")
    code, out, err = run_cli(*argv)
    assert code == 0, err
    assert out.splitlines()[0] == " 1. newline_named  [function, python]  python/new\\nline.py:1"
    code, out, err = run_cli(*argv, "--json")
    lines = out.splitlines()
    assert len(lines) == 3  # JSON Lines: the newline inside the name is written \n
    assert json.loads(lines[0])["path"] == "python/new\nline.py"


def test_status_escapes_the_folder_names_it_shows(tmp_path: Path) -> None:
    repo = tmp_path / f"fleet{HOSTILE}"
    (repo / "python").mkdir(parents=True)
    (repo / "python" / "dock.py").write_text("def dock():\n    return 1\n", encoding="utf-8")
    index_quietly(repo)
    code, out, err = run_cli("status", str(repo))
    assert code == 0, err
    assert "\x1b" not in out
    assert out.splitlines()[0] == f"repository   {printable(str(repo.resolve()))}"
    assert HOSTILE_SHOWN in out.splitlines()[0]


def test_the_eval_report_escapes_the_repository_it_names(tmp_path: Path) -> None:
    import shutil

    from conftest import SAMPLE_REPO

    repo = tmp_path / f"fleet{HOSTILE}"
    shutil.copytree(SAMPLE_REPO, repo)
    index_quietly(repo)
    code, out, err = run_cli("eval", str(repo), "--backend", "fake")
    assert code == 0, err
    assert "\x1b" not in out and "\x07" not in out
    assert f"docstrings of {printable(str(repo.resolve()))}" in out.splitlines()[0]


def test_error_and_warning_lines_escape_file_names(sample_copy: Path) -> None:
    code, out, err = run_cli("outline", str(sample_copy / f"gone{HOSTILE}.py"))
    assert code == 1
    assert err == (f"error: {sample_copy.as_posix()}/gone{HOSTILE_SHOWN}.py: no such file or "
                   "folder\n")
    (sample_copy / "python" / f"broken{HOSTILE}.py").write_text(
        "def broken(:\n    return 1\n", encoding="utf-8")
    code, out, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0
    assert err == (f"warning: python/broken{HOSTILE_SHOWN}.py: syntax errors; indexed the "
                   "units that could be recovered\n")


def test_a_warning_about_the_index_folder_is_escaped(sample_copy: Path, tmp_path: Path
                                                     ) -> None:
    where = tmp_path / f"idx{HOSTILE}"
    where.mkdir()
    where.chmod(0o755)
    code, _out, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q",
                              "--index-dir", str(where))
    assert code == 0
    assert HOSTILE not in err and f"idx{HOSTILE_SHOWN}" in err
    assert len(err.splitlines()) == 1


def test_a_planted_kind_and_language_are_escaped(sample_copy: Path) -> None:
    index_quietly(sample_copy)
    db = sqlite3.connect(sample_copy / ".codeseek" / "index.sqlite3")
    with db:
        db.execute("UPDATE units SET kind=?", (HOSTILE,))
        db.execute("UPDATE files SET language=?", (HOSTILE,))
    db.close()
    code, out, err = run_cli("search", "dock battery", "--repo", str(sample_copy),
                             "--backend", "fake", "-k", "2")
    assert (code, err) == (0, "")
    assert HOSTILE not in out and f"[{HOSTILE_SHOWN}, {HOSTILE_SHOWN}]" in out
    code, out, err = run_cli("status", str(sample_copy))
    assert HOSTILE not in out + err


# == file names and bytes: non-UTF-8 names, newlines in names ==

# A Latin-1 name: b"\xe9" is "é" in Latin-1 and not UTF-8 on its own (a lead byte
# with no continuation byte, RFC 3629). Python gives it as the lone surrogate
# "\udce9" (PEP 383); codeseek stores its bytes and shows it as "\xe9".
LATIN1_FILE = b"tarif\xe9.py"
LATIN1_FOLDER = b"dossi\xe9r"


@pytest.fixture
def latin1_repo(sample_copy: Path) -> Path:
    """sample_repo plus a file and a folder whose names are not UTF-8."""
    python = os.fsencode(sample_copy / "python")
    with open(os.path.join(python, LATIN1_FILE), "wb") as handle:
        handle.write(b'def tariff_for_zone():\n    """Work out the tariff of a zone."""\n'
                     b"    return 2\n")
    os.mkdir(os.path.join(python, LATIN1_FOLDER))
    with open(os.path.join(python, LATIN1_FOLDER, b"inner.py"), "wb") as handle:
        handle.write(b'def inner_helper():\n    """A helper inside the folder."""\n'
                     b"    return 3\n")
    return sample_copy


def _stored(index_dir: Path) -> dict[str, object]:
    """Everything an index holds of files, units and their vectors, read with sqlite3."""
    db = sqlite3.connect(index_dir / "index.sqlite3")
    try:
        files = sorted(db.execute("SELECT path, language, sha256 FROM files").fetchall(),
                       key=repr)
        units = sorted(db.execute(
            "SELECT f.path, u.uid, u.kind, u.qualname, u.start_line, u.end_line, u.code, "
            "u.content_hash, v.vector FROM units u JOIN files f ON f.id = u.file_id "
            "LEFT JOIN vectors v ON v.content_hash = u.content_hash").fetchall(), key=repr)
        skipped = sorted(db.execute("SELECT path, reason FROM skipped").fetchall(), key=repr)
    finally:
        db.close()
    return {"files": files, "units": units, "skipped": skipped}


def test_non_utf8_names_index_and_every_other_file_too(latin1_repo: Path, tmp_path: Path
                                                       ) -> None:
    from conftest import SAMPLE_REPO
    code, out, err = run_cli("index", str(latin1_repo), "--backend", "fake", "-q")
    assert code == 0, err
    fresh = tmp_path / "plain-index"
    index_quietly(SAMPLE_REPO, "--index-dir", str(fresh))
    stored = _stored(latin1_repo / ".codeseek")
    plain = _stored(fresh)
    assert set(plain["files"]) < set(stored["files"])  # every ordinary file is indexed
    extra = {row[0] for row in set(stored["files"]) - set(plain["files"])}
    # kept as the file system's own bytes (SQLite BLOBs), not as mangled text
    assert extra == {b"python/" + LATIN1_FILE, b"python/" + LATIN1_FOLDER + b"/inner.py"}
    code, status_out, err = run_cli("status", str(latin1_repo))
    assert code == 0, err
    sample_files = len(plain["files"])
    assert f"contents     {sample_files + 2} files" in status_out
    code, again, err = run_cli("index", str(latin1_repo), "--backend", "fake", "-q")
    assert again.startswith(f"indexed {sample_files + 2} files, ")
    assert ": 0 added, 0 changed, 0 removed, 0 embedded," in again  # nothing seen as new


def test_a_skipped_file_with_a_non_utf8_name_is_listed_escaped(latin1_repo: Path) -> None:
    python = os.fsencode(latin1_repo / "python")
    with open(os.path.join(python, b"notes\xe9.txt"), "wb") as handle:
        handle.write(b"not source\n")
    index_quietly(latin1_repo)
    code, out, err = run_cli("status", str(latin1_repo), "--skipped")
    assert code == 0, err
    assert "python/notes\\xe9.txt  no supported language\n" in out
    code, out, err = run_cli("status", str(latin1_repo), "--skipped", "--json")
    assert code == 0, err
    out.encode("utf-8")
    listed = [record for record in json.loads(out)["skipped_files"]
              if record["path"] == "python/notes\\xe9.txt"]
    assert listed == [{"path": "python/notes\\xe9.txt",
                       "path_bytes": base64.b64encode(b"python/notes\xe9.txt").decode("ascii"),
                       "reason": "no supported language"}]


def test_a_hit_in_a_non_utf8_file_is_shown_escaped_and_json_stays_utf8(latin1_repo: Path
                                                                      ) -> None:
    index_quietly(latin1_repo)
    argv = ("search", "the tariff of a zone", "--repo", str(latin1_repo), "--backend", "fake",
            "-k", "1")
    code, out, err = run_cli(*argv)
    assert code == 0, err
    assert out.splitlines()[0] == (" 1. tariff_for_zone  [function, python]  "
                                   "python/tarif\\xe9.py:1")
    code, out, err = run_cli(*argv, "--json")
    assert code == 0, err
    out.encode("utf-8")  # no lone surrogate reaches the output: it can be written as UTF-8
    record = json.loads(out)
    assert record["path"] == "python/tarif\\xe9.py"
    assert base64.b64decode(record["path_bytes"]) == b"python/" + LATIN1_FILE
    # the path names the real file: the bytes open it
    assert os.path.exists(os.path.join(os.fsencode(latin1_repo), base64.b64decode(
        record["path_bytes"])))


def test_outline_of_a_tree_with_non_utf8_names(latin1_repo: Path) -> None:
    code, out, err = run_cli("outline", str(latin1_repo / "python"))
    assert code == 0, err
    lines = out.splitlines()
    base = (latin1_repo / "python").as_posix()
    assert f"{base}/tarif\\xe9.py:1-3 function tariff_for_zone" in lines
    assert f"{base}/dossi\\xe9r/inner.py:1-3 function inner_helper" in lines
    code, out, err = run_cli("outline", str(latin1_repo / "python"), "--json")
    assert code == 0, err
    out.encode("utf-8")
    records = {r["qualname"]: r for r in map(json.loads, out.splitlines())}
    assert base64.b64decode(records["inner_helper"]["path_bytes"]) == os.fsencode(
        f"{base}/") + LATIN1_FOLDER + b"/inner.py"
    assert "path_bytes" not in records["triage_priority"]  # UTF-8 names: only "path"
    code, out, err = run_cli("outline", os.fsdecode(os.path.join(
        os.fsencode(latin1_repo / "python"), LATIN1_FILE)))
    assert (code, out) == (0, f"{base}/tarif\\xe9.py:1-3 function tariff_for_zone\n"), err


def test_the_watcher_path_takes_non_utf8_names(latin1_repo: Path) -> None:
    from codeseek import FakeEmbedder, open_index
    from codeseek.watch import Watcher

    index_quietly(latin1_repo)
    with open_index(latin1_repo, embedder=FakeEmbedder()) as index:
        watcher = Watcher(index)  # not started: events are handed to it as watchdog would
        python = os.fsencode(latin1_repo / "python")
        added = os.path.join(python, b"zone\xff.py")
        with open(added, "wb") as handle:
            handle.write(b"def zone_fare():\n    return 4\n")
        os.remove(os.path.join(python, LATIN1_FILE))
        os.mkdir(os.path.join(python, b"d\xfe"))
        with open(os.path.join(python, b"d\xfe", b"x.py"), "wb") as handle:
            handle.write(b"def deep_fare():\n    return 5\n")
        for path in (added, os.path.join(python, LATIN1_FILE), os.path.join(python, b"d\xfe")):
            watcher.notice(path)  # bytes, as watchdog hands them on
        watcher.notice(os.fsdecode(added))  # and text
        summary = watcher.apply(watcher.queue.take(timeout=1.0, debounce=0.0))
        assert watcher.state.last_error is None
        assert summary is not None and (summary.added, summary.removed) == (2, 1)
        paths = {hit.path for hit in index.search("zone fare deep fare", 20)}
    assert {"python/zone\udcff.py", "python/d\udcfe/x.py"} <= paths
    assert "python/tarif\udce9.py" not in paths
    fresh = latin1_repo.parent / "fresh-index"
    index_quietly(latin1_repo, "--index-dir", str(fresh))
    ours, theirs = _stored(latin1_repo / ".codeseek"), _stored(fresh)
    assert ours["files"] == theirs["files"] and ours["units"] == theirs["units"]


def test_a_gitignore_line_in_latin1_ignores_the_same_bytes(tmp_path: Path) -> None:
    from codeseek.config import load_settings
    from codeseek.scan import scan_repository

    root = os.fsencode(tmp_path)
    for name in (b"tarif\xe9.py", b"tarif\xe8.py", b"plain.py"):
        with open(os.path.join(root, name), "wb") as handle:
            handle.write(b"def f():\n    return 1\n")
    with open(os.path.join(root, b".gitignore"), "wb") as handle:
        handle.write(b"tarif\xe9.py\n")
    found = {os.fsencode(f.path) for f in scan_repository(load_settings(tmp_path)).files}
    # the reference: git itself, on the same tree (git ls-files --others --exclude-standard)
    subprocess.run(["git", "init", "-q", str(tmp_path)], check=True)
    listed = subprocess.run(["git", "-C", str(tmp_path), "-c", "core.quotePath=false",
                             "ls-files", "-z", "--others", "--exclude-standard"],
                            check=True, capture_output=True).stdout
    by_git = {name for name in listed.split(b"\0") if name.endswith(b".py")}
    assert found == by_git == {b"tarif\xe8.py", b"plain.py"}


def test_neighbours_of_a_unit_in_a_non_utf8_file(latin1_repo: Path) -> None:
    index_quietly(latin1_repo)
    place = "python/" + os.fsdecode(LATIN1_FILE) + ":tariff_for_zone"
    code, out, err = run_cli("search", "--neighbours", place, "--repo", str(latin1_repo),
                             "--backend", "fake", "-k", "2", "--json")
    assert (code, err) == (0, "")
    assert len(out.splitlines()) == 2
    code, _out, err = run_cli("search", "--neighbours", "python/" + os.fsdecode(LATIN1_FILE)
                              + ":3", "--repo", str(latin1_repo), "--backend", "fake")
    assert (code, err) == (0, "")


def test_the_daemon_wire_format_keeps_a_non_utf8_path() -> None:
    import dataclasses

    from codeseek.hits import SearchHit

    hit = SearchHit(query="q", rank=1, score=1.0, similarity=None, path="a/tarif\udce9.py",
                    start_line=1, end_line=2, language="python", kind="function", name="f",
                    qualname="f", signature="def f():", doc_summary="", snippet="", unit_id=1)
    # the daemon sends json.dumps(asdict(hit)) (ASCII escapes), the client rebuilds the hit
    wire = json.dumps(dataclasses.asdict(hit)).encode("utf-8")
    assert SearchHit(**json.loads(wire)) == hit


# Config and ignore files the repository ships that are not regular files of their own:
# a FIFO (an open or read that blocks for ever) and a link to /dev/zero (endless bytes).
# Each runs codeseek as a subprocess with a generous timeout, so a hang fails the test
# instead of stopping the run (the timeout is a guard, not a measure of speed).
GUARD_SECONDS = 120


def _codeseek(*argv: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    try:
        return subprocess.run([sys.executable, "-m", "codeseek", *argv], cwd=cwd,
                              capture_output=True, text=True, timeout=GUARD_SECONDS,
                              stdin=subprocess.DEVNULL, check=False)
    except subprocess.TimeoutExpired as exc:
        pytest.fail(f"codeseek {' '.join(argv)} hung: {exc}")


def test_ignore_files_that_are_a_fifo_or_a_link_are_skipped_and_counted(
        sample_copy: Path) -> None:
    os.mkfifo(sample_copy / "python" / ".gitignore")
    os.symlink("/dev/zero", sample_copy / "go" / ".gitignore")
    (sample_copy / ".git" / "info").mkdir(parents=True)
    os.mkfifo(sample_copy / ".git" / "info" / "exclude")
    result = _codeseek("index", str(sample_copy), "--backend", "fake", "-q")
    assert (result.returncode, result.stderr) == (0, "")
    code, out, _err = run_cli("status", str(sample_copy), "--skipped", "--json")
    assert code == 0
    listed = json.loads(out)["skipped_files"]
    refused = sorted(item["path"] for item in listed
                     if item.get("reason") == scan.REASON_IGNORE_FILE)
    assert refused == [".git/info/exclude", "go/.gitignore", "python/.gitignore"]


def test_a_gitignore_over_the_cap_is_not_read(sample_copy: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(scan, "MAX_IGNORE_FILE_BYTES", 64)
    (sample_copy / "python" / ".gitignore").write_text("*.py\n" + "#" * 100 + "\n")
    result = scan.scan_repository(load_settings(sample_copy))
    assert ("python/.gitignore", scan.REASON_IGNORE_FILE) in result.skipped_paths
    assert any(f.path.startswith("python/") for f in result.files)  # the rules were not used


def test_a_source_file_swapped_for_a_fifo_after_the_scan_is_skipped(sample_copy: Path
                                                                    ) -> None:
    result = scan.scan_repository(load_settings(sample_copy))
    source = result.files[0]
    source.abs_path.unlink()
    os.mkfifo(source.abs_path)  # after the scan's lstat: the open must not block
    # a writer that opens and closes at once, so a blocking reader (the bug) gets an
    # empty file instead of hanging the test run
    writer = threading.Thread(target=lambda: os.close(os.open(source.abs_path, os.O_WRONLY)),
                              daemon=True)
    writer.start()
    try:
        with pytest.raises(scan.SkipFile) as skip:
            scan.read_source(source, 1024 * 1024)
    finally:
        while writer.is_alive():  # release a writer still waiting for a reader
            os.close(os.open(source.abs_path, os.O_RDONLY | os.O_NONBLOCK))
            writer.join(0.05)
    assert skip.value.args[0] == scan.REASON_UNREADABLE
    source.abs_path.unlink()
    os.symlink("/dev/zero", source.abs_path)
    with pytest.raises(scan.SkipFile) as skip:
        scan.read_source(source, 1024 * 1024)
    assert skip.value.args[0] == scan.REASON_SYMLINK


def test_read_regular_file_refuses_links_fifos_and_big_files(tmp_path: Path) -> None:
    os.mkfifo(tmp_path / "fifo")
    os.symlink("/dev/zero", tmp_path / "zero")
    (tmp_path / "big").write_bytes(b"x" * 11)
    (tmp_path / "ok").write_bytes(b"x" * 10)
    for name, reason in [("fifo", "not a regular file"),
                         ("zero", "a symbolic link (not followed)"),
                         ("big", "larger than 10 bytes")]:
        with pytest.raises(FileRefused) as refused:
            safefs.read_regular_file(tmp_path / name, 10)
        assert str(refused.value) == reason
    assert safefs.read_regular_file(tmp_path / "ok", 10) == b"x" * 10
    with pytest.raises(FileNotFoundError):
        safefs.read_regular_file(tmp_path / "missing", 10)


# == configuration and command-line values ==


@pytest.fixture
def indexed_copy(sample_copy: Path) -> Path:
    index_quietly(sample_copy)
    return sample_copy


def _search_batch_from(monkeypatch: pytest.MonkeyPatch, repo: Path, stdin: object
                       ) -> tuple[int, str, str]:
    monkeypatch.setattr(sys, "stdin", stdin)
    return run_cli("search", "--batch", "-", "--repo", str(repo), "--backend", "fake")


def test_batch_from_binary_stdin(indexed_copy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the locale's text layer would hand these bytes on as surrogates (C.UTF-8) or fail
    stdin = io.TextIOWrapper(io.BytesIO(b"\xff\xfe\x00dock\n"), encoding="utf-8",
                             errors="surrogateescape")
    assert _search_batch_from(monkeypatch, indexed_copy, stdin) == (
        1, "", "error: -: cannot read the batch: not UTF-8 text (byte 0xff at offset 0)\n")
    stdin = io.TextIOWrapper(io.BytesIO(b"dock\nbat\x00tery\n"), encoding="utf-8")
    assert _search_batch_from(monkeypatch, indexed_copy, stdin) == (
        1, "", "error: -: cannot read the batch: it holds a NUL byte (at offset 8); give one "
               "query per line as text\n")


def test_batch_file_that_is_not_utf8(indexed_copy: Path, tmp_path: Path) -> None:
    batch = tmp_path / "queries.txt"
    batch.write_bytes(b"dock battery\nstation caf\xe9\n")
    assert run_cli("search", "--batch", str(batch), "--repo", str(indexed_copy),
                   "--backend", "fake") == (
        1, "", f"error: {batch}: cannot read the batch: not UTF-8 text (byte 0xe9 at offset "
               "24)\n")  # 13 bytes of the first line, then "station caf"


def test_batch_from_a_closed_stdin(indexed_copy: Path, monkeypatch: pytest.MonkeyPatch
                                   ) -> None:
    assert _search_batch_from(monkeypatch, indexed_copy, None) == (
        1, "", "error: -: cannot read the batch: standard input is closed\n")
    # the real thing: a shell closes fd 0 (`<&-`) and Python sets sys.stdin to None
    result = subprocess.run(
        [sys.executable, "-m", "codeseek", "search", "--batch", "-", "--backend", "fake"],
        cwd=indexed_copy, stdin=subprocess.DEVNULL, capture_output=True, text=True,
        preexec_fn=lambda: os.close(0), check=False)
    assert (result.returncode, result.stderr) == (
        1, "error: -: cannot read the batch: standard input is closed\n")


def test_a_query_argument_that_is_not_utf8(indexed_copy: Path) -> None:
    query = os.fsdecode(b"caf\xe9 dock")  # what sys.argv holds for those bytes (PEP 383)
    assert run_cli("search", query, "--repo", str(indexed_copy), "--backend", "fake") == (
        1, "", "error: the query is not valid UTF-8 text: caf\\xe9 dock (character 4)\n")


@pytest.mark.parametrize("command", ["eval", "tune"])
def test_a_negative_seed_is_a_usage_error(indexed_copy: Path, command: str,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main([command, str(indexed_copy), "--seed", "-1", "--backend", "fake"])
    assert stop.value.code == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert err.splitlines()[-1] == f"codeseek {command}: error: argument --seed: must be 0 or " \
                                   "more, not -1"


def _config_error(repo: Path, toml: bytes) -> tuple[int, str, str]:
    (repo / "codeseek.toml").write_bytes(toml)
    return run_cli("index", str(repo), "--backend", "fake", "-q")


def test_a_codeseek_toml_that_is_a_fifo_or_a_link_is_refused(sample_copy: Path) -> None:
    toml = sample_copy / "codeseek.toml"
    os.mkfifo(toml)
    result = _codeseek("status", str(sample_copy))
    assert (result.returncode, result.stderr) == (
        1, f"error: {toml}: cannot read settings: not a regular file\n")
    toml.unlink()
    os.symlink("/dev/zero", toml)
    result = _codeseek("status", str(sample_copy))
    assert (result.returncode, result.stderr) == (
        1, f"error: {toml}: cannot read settings: a symbolic link (not followed)\n")


def test_a_codeseek_toml_over_the_cap_is_refused(sample_copy: Path) -> None:
    toml = sample_copy / "codeseek.toml"
    toml.write_bytes(b"#" * (config.MAX_CONFIG_FILE_BYTES + 1))
    assert run_cli("status", str(sample_copy)) == (
        1, "", f"error: {toml}: cannot read settings: larger than "
               f"{config.MAX_CONFIG_FILE_BYTES} bytes\n")


@pytest.mark.parametrize("value", ["../outside/deep/idx", "{absolute}",
                                   "build/../../outside"])
def test_codeseek_toml_cannot_place_the_index_outside_the_repository(
        sample_copy: Path, value: str) -> None:
    toml = sample_copy / "codeseek.toml"
    value = value.format(absolute=sample_copy.parent / "elsewhere-idx")
    assert _config_error(sample_copy, f'index_dir = "{value}"\n'.encode()) == (
        1, "", f"error: {toml}: index_dir: {value} is outside the repository; codeseek.toml "
               "may only place the index inside it (use --index-dir or CODESEEK_INDEX_DIR "
               "for a folder elsewhere)\n")
    assert sorted(p.name for p in sample_copy.parent.iterdir()) == ["repo"]


def test_codeseek_toml_cannot_reach_out_through_a_link_inside(sample_copy: Path,
                                                              tmp_path: Path) -> None:
    outside = tmp_path / "outside"
    outside.mkdir()
    (sample_copy / "build" / "out").symlink_to(outside)
    code, _out, err = _config_error(sample_copy, b'index_dir = "build/out/idx"\n')
    assert (code, err.endswith("is outside the repository; codeseek.toml may only place the "
                               "index inside it (use --index-dir or CODESEEK_INDEX_DIR for a "
                               "folder elsewhere)\n")) == (1, True)
    assert list(outside.iterdir()) == []


def test_the_options_may_still_place_the_index_outside(sample_copy: Path, tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    (sample_copy / "codeseek.toml").write_text('index_dir = "../outside"\n')
    index_quietly(sample_copy, "--index-dir", str(tmp_path / "mine"))
    monkeypatch.setenv("CODESEEK_INDEX_DIR", str(tmp_path / "env"))
    index_quietly(sample_copy)
    assert (tmp_path / "mine" / "index.sqlite3").is_file()
    assert (tmp_path / "env" / "index.sqlite3").is_file()


def test_codeseek_toml_cannot_choose_the_model(sample_copy: Path, tmp_path: Path,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    toml = sample_copy / "codeseek.toml"
    assert _config_error(sample_copy, b'model = "models/m"\n') == (
        1, "", f"error: {toml}: model: codeseek.toml cannot choose the model (a repository "
               "could make codeseek load code of its choosing); use --model or "
               "CODESEEK_MODEL instead\n")
    assert not (sample_copy / ".codeseek").exists()
    # the user's own choice wins and the file's is never used
    assert load_settings(sample_copy, model=tmp_path / "m").model == tmp_path / "m"
    monkeypatch.setenv("CODESEEK_MODEL", str(tmp_path / "e"))
    assert load_settings(sample_copy).model == tmp_path / "e"


def test_no_model_is_loaded_with_remote_code() -> None:
    # transformers runs a model folder's own Python only with trust_remote_code=True
    # (its from_pretrained documentation): codeseek never passes it
    source = (Path(__file__).resolve().parent.parent / "codeseek" / "embed.py").read_text()
    assert "trust_remote_code" not in source


@pytest.mark.parametrize(("where", "value", "message"), [
    ("toml", "a\0b", "{toml}: index_dir: a\\x00b holds a NUL byte, which no file name "
                     "can hold"),
    ("option", "a\0b", "--index-dir: a\\x00b holds a NUL byte, which no file name can "
                       "hold"),
    ("env", "a\0b", "CODESEEK_INDEX_DIR: a\\x00b holds a NUL byte, which no file name "
                    "can hold"),
    ("toml", "~nosuchuser/x", "{toml}: index_dir: ~nosuchuser/x: no such user's home folder"),
    ("option", "~nosuchuser/x", "--index-dir: ~nosuchuser/x: no such user's home folder"),
    ("env", "~nosuchuser/x", "CODESEEK_INDEX_DIR: ~nosuchuser/x: no such user's home folder"),
    ("model", "m\0", "--model: m\\x00 holds a NUL byte, which no file name can hold"),
])
def test_index_dir_with_a_nul_or_an_unknown_user(sample_copy: Path,
                                                 monkeypatch: pytest.MonkeyPatch, where: str,
                                                 value: str, message: str) -> None:
    toml = sample_copy / "codeseek.toml"
    extra: list[str] = []
    if where == "toml":
        toml.write_text(json.dumps({"index_dir": value})[1:-1].replace('": ', '" = ')
                        .replace('"index_dir"', "index_dir") + "\n")
    elif where == "option":
        extra = ["--index-dir", value]
    elif where == "model":
        extra = ["--model", value]
    else:
        monkeypatch.setattr(os, "environ", {**os.environ, "CODESEEK_INDEX_DIR": value})
    assert run_cli("index", str(sample_copy), "--backend", "fake", "-q", *extra) == (
        1, "", f"error: {message.format(toml=toml)}\n")


def test_an_index_folder_whose_name_is_not_utf8(sample_copy: Path, tmp_path: Path) -> None:
    # b"\xff" is never UTF-8 (RFC 3629); hnswlib takes such a name only as bytes
    index_dir = os.fsdecode(os.path.join(os.fsencode(tmp_path), b"\xffidx"))
    index_quietly(sample_copy, "--index-dir", index_dir)
    code, out, err = run_cli("search", "dock battery", "--repo", str(sample_copy), "--backend",
                             "fake", "--index-dir", index_dir, "-k", "1", "--json")
    assert (code, err) == (0, "")
    assert json.loads(out.splitlines()[0])["path"]
    assert {b"index.sqlite3", b"vectors.hnsw"} <= set(os.listdir(os.fsencode(index_dir)))


def _no_read_write_opens(monkeypatch: pytest.MonkeyPatch) -> None:
    """sqlite3.connect as in a folder of mode 0500 (root ignores modes): only the
    read-only URI opens."""
    real_connect = sqlite3.connect

    def no_writes(target, *args, **kwargs):  # type: ignore[no-untyped-def]
        if not kwargs.get("uri"):
            raise sqlite3.OperationalError("unable to open database file")
        return real_connect(target, *args, **kwargs)

    monkeypatch.setattr(sqlite3, "connect", no_writes)


def test_a_repository_in_a_folder_whose_name_is_not_utf8(
        sample_copy: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    repo = os.fsdecode(os.path.join(os.fsencode(tmp_path), b"d\xe9p\xf4t"))
    shutil.move(sample_copy, repo)
    index_quietly(Path(repo))
    assert run_cli("search", "dock battery", "--repo", repo, "--backend", "fake",
                   "-k", "1")[0] == 0
    # reading without write access goes through a SQLite URI of the name's bytes
    _no_read_write_opens(monkeypatch)
    code, out, err = run_cli("status", repo, "--json")
    assert (code, err) == (0, "")
    assert json.loads(out)["units"] > 0


@pytest.mark.parametrize(("where", "message"), [
    # "²".isdigit() is true and int("²") raises (Python's str.isdigit documentation)
    ("²", "python/kestrune/ratelimit.py: no unit named '²'"),
    ("٣", "python/kestrune/ratelimit.py: no unit named '٣'"),
    ("0", "python/kestrune/ratelimit.py: line numbers start at 1, not 0"),
    ("99999999999999999999", "python/kestrune/ratelimit.py: no unit holds line "
                             "99999999999999999999"),
])
def test_neighbours_of_a_line_that_is_not_a_line_number(indexed_copy: Path, where: str,
                                                        message: str) -> None:
    assert run_cli("search", "--neighbours", f"python/kestrune/ratelimit.py:{where}",
                   "--repo", str(indexed_copy), "--backend", "fake") == (
        1, "", f"error: {message}\n")


def test_a_codeseek_toml_that_is_not_utf8(sample_copy: Path) -> None:
    # TOML files must be valid UTF-8 (the TOML v1.0.0 specification)
    assert _config_error(sample_copy, b'exclude = ["caf\xe9/"]\n') == (
        1, "", f"error: {sample_copy}/codeseek.toml: cannot read settings: not UTF-8 text "
               "(byte 0xe9 at offset 15)\n")


@pytest.mark.parametrize(("line", "message"), [
    (b"index_dir = 5", "index_dir must be a folder path in quotes, not 5"),
    (b"model = [1]", "model must be a folder path in quotes, not [1]"),
    (b"max_file_bytes = 1e99", "max_file_bytes must be a whole number, not 1e+99"),
    (b"max_file_bytes = 2.5", "max_file_bytes must be a whole number, not 2.5"),
    (b"max_file_bytes = true", "max_file_bytes must be a whole number, not True"),
    (b"max_file_bytes = 99999999999999999999",
     "max_file_bytes must be at most 1099511627776, not 99999999999999999999"),
    (b"batch_size = 0.5", "batch_size must be a whole number, not 0.5"),
])
def test_bad_values_in_codeseek_toml(sample_copy: Path, line: bytes, message: str) -> None:
    assert _config_error(sample_copy, line + b"\n") == (
        1, "", f"error: {sample_copy}/codeseek.toml: {message}\n")
    assert not (sample_copy / ".codeseek").exists()  # nothing was written


def test_a_bad_value_from_the_environment_names_the_variable(
        sample_copy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CODESEEK_MAX_FILE_BYTES", "2.5")
    assert run_cli("index", str(sample_copy), "--backend", "fake", "-q") == (
        1, "", "error: CODESEEK_MAX_FILE_BYTES must be a whole number, not '2.5'\n")


def test_an_uncreatable_cache_dir(indexed_copy: Path, tmp_path: Path,
                                  monkeypatch: pytest.MonkeyPatch) -> None:
    from codeseek.embed import default_model_dir_or_none

    if default_model_dir_or_none() is None:
        pytest.skip("the packaged model is not installed")
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n", encoding="utf-8")
    monkeypatch.setenv("CODESEEK_CACHE_DIR", str(blocker / "cache"))
    # the default backend (ONNX) exports the model into the cache folder on first use
    assert run_cli("search", "dock battery", "--repo", str(indexed_copy)) == (
        1, "", f"error: {blocker}/cache: cannot write the model cache folder (Not a "
               "directory); set CODESEEK_CACHE_DIR to a folder you can write\n")


@pytest.mark.parametrize(("pattern", "reason"), [
    ("[", "a '[' is never closed"),
    ("src/[ab", "a '[' is never closed"),
    ("[]", "a '[' is never closed"),
    ("!", "'!' needs a pattern after it"),
    ("\\", "a '\\' at the end escapes nothing"),
    ("a\\", "a '\\' at the end escapes nothing"),
    ("#notes", "a leading '#' makes it a comment; write '\\#' for the character"),
    ("", "it is empty"),
])
def test_a_malformed_files_pattern_is_one_line(fake_index: object, sample_copy: Path,
                                               pattern: str, reason: str) -> None:
    for option in ("--files", "--path"):
        code, out, err = run_cli("search", "fare", "--repo", str(sample_copy), "--backend",
                              "fake", option, pattern)
        assert (code, out) == (2, ""), pattern
        assert err == f"error: invalid file pattern '{pattern}': {reason}\n"


def test_the_library_refuses_a_malformed_pattern_too(fake_index: Index) -> None:
    with pytest.raises(InvalidQuery, match="never closed"):
        fake_index.search("fare", paths=["["])


@pytest.mark.skipif(shutil.which("git") is None, reason="needs git")
def test_git_matches_nothing_with_an_unclosed_bracket(tmp_path: Path) -> None:
    """Refusing '[' loses nothing: as an ignore pattern, git matches no file with it."""
    for name in ("[", "a", "[a"):
        (tmp_path / name).write_text("x\n", encoding="utf-8")
    (tmp_path / ".gitignore").write_text("[\n[a\n", encoding="utf-8")
    env = {"PATH": os.environ.get("PATH", ""), "HOME": str(tmp_path),
           "GIT_CONFIG_NOSYSTEM": "1", "GIT_CONFIG_GLOBAL": os.devnull}
    subprocess.run(["git", "init", "-q", "."], cwd=tmp_path, env=env, check=True)
    # reference: git ls-files --others --exclude-standard (what git does not ignore)
    listed = subprocess.run(["git", "ls-files", "--others", "--exclude-standard", "-z"],
                            cwd=tmp_path, env=env, capture_output=True, text=True,
                            check=True).stdout
    assert {p for p in listed.split("\0") if p} == {"[", "a", "[a", ".gitignore"}
    # codeseek's own matcher gives git's answer for the same names
    rules = scan.IgnoreRules(tmp_path)
    assert {name for name in ("[", "a", "[a", ".gitignore")
            if not rules.is_ignored(name, is_dir=False)} == {p for p in listed.split("\0") if p}




def test_a_k_past_every_integer_sqlite_holds_is_answered(indexed_copy: Path) -> None:
    # SQLite's integers are 64-bit signed (sqlite.org/datatype3.html): a LIMIT above
    # 2**63 - 1 cannot even be bound; every unit of the index is the answer
    wanted = run_cli("search", "fare", "--repo", str(indexed_copy), "--backend", "fake",
                     "-k", "1000", "--json")
    near = ("search", "--neighbours", "python/kestrune/ratelimit.py:TokenBucket", "--repo",
            str(indexed_copy), "--backend", "fake", "--json")
    wanted_near = run_cli(*near, "-k", "1000")
    assert wanted[0] == wanted_near[0] == 0
    for huge in (str(2**62), str(2**64), "9" * 30):
        assert run_cli("search", "fare", "--repo", str(indexed_copy), "--backend", "fake",
                       "-k", huge, "--json") == wanted
        assert run_cli(*near, "-k", huge) == wanted_near


# == the daemon: requests, locks, sockets, first build ==

# The daemon's hostile cases run against a real `codeseek watch` process where the
# fault is in the process's life (its lock, its socket, its first build, its log).


def daemon_env(cache: Path) -> dict[str, str]:
    """The environment of a daemon process: no developer settings, a private cache."""
    env = {name: value for name, value in os.environ.items()
           if not name.startswith("CODESEEK_")}
    env["CODESEEK_CACHE_DIR"] = str(cache)
    return env


def daemon_wait(check: Callable[[], bool], what: str) -> None:
    """Poll until ``check`` holds (a generous timeout; no timing is asserted)."""
    wait_for(check, timeout=60.0, what=what)


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
    (b'{"v": 2, "op": "search", "queries": [{"text": "refund \\ud800 a rider"}]}',
     "malformed request: 'text' holds a lone surrogate (text that is not valid Unicode)"),
    (b'{"v": 2, "op": "search", "queries": [{"text": "refund", '
     b'"filters": {"kinds": ["\\udfff"]}}]}',
     "malformed request: 'kinds' holds a lone surrogate (text that is not valid Unicode)"),
    (b'{"v": 2, "op": "neighbours", "query": {"unit_id": 9223372036854775808}}',  # 2**63
     "malformed request: 'unit_id' holds a whole number outside 64 bits"),
    (b'{"v": 2, "op": "neighbours", "query": {"unit_id": -9223372036854775809}}',
     "malformed request: 'unit_id' holds a whole number outside 64 bits"),
    (b'{"v": 2, "op": "search", "queries": [{"text": "refund", "k": 18446744073709551616}]}',
     "malformed request: 'k' holds a whole number outside 64 bits"),
    # the request of a codeseek of the first protocol gets an answer saying so
    (b'{"v": 1, "op": "search", "queries": ["refund"]}',
     "unsupported protocol version 1; this daemon speaks 2 (a codeseek of another version "
     "sent the request; use the same codeseek for both)"),
    (b"[" * 30_000 + b"]" * 30_000, "malformed request: nested too deeply"),
    (b'{"v": 2, "op": "search", "x": ' + b'{"a": ' * 30_000 + b"1" + b"}" * 30_001,
     "malformed request: nested too deeply"),
])
def test_bad_values_get_an_error_answer_and_the_daemon_serves_on(
        served: tuple[Daemon, list[str]], capfd: pytest.CaptureFixture[str],
        line: bytes, message: str) -> None:
    daemon, logged = served
    path = daemon.index.settings.index_dir / SOCKET_NAME
    first, status = daemon_exchange(path, line + b'\n{"v": 2, "op": "status"}\n')
    assert first == {"v": 2, "ok": False, "error": message, "kind": "ProtocolError"}
    assert status["ok"] and status["daemon"]["state"] == "watching"  # the same connection
    assert "Traceback" not in capfd.readouterr().err
    assert not [m for m in logged if m.startswith("error")]


def test_a_path_pattern_may_hold_undecodable_bytes(served: tuple[Daemon, list[str]]) -> None:
    # a file name that is not UTF-8 reaches Python as lone surrogates (surrogateescape);
    # a pattern naming one is matched, as in process, not refused
    daemon, _ = served
    answer, = daemon_exchange(daemon.index.settings.index_dir / SOCKET_NAME,
                              b'{"v": 2, "op": "search", "queries": [{"text": "refund", '
                              b'"filters": {"paths": ["caf\\udce9/*"]}}]}\n')
    assert answer == {"v": 2, "ok": True, "results": [[]]}


def test_an_unexpected_failure_is_one_error_line(served: tuple[Daemon, list[str]],
                                                 capfd: pytest.CaptureFixture[str],
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    daemon, logged = served

    def broken(*args: object, **kwargs: object) -> None:
        raise RuntimeError("the gears slipped\nat dock 7")

    monkeypatch.setattr(daemon.index, "search_many", broken)
    path = daemon.index.settings.index_dir / SOCKET_NAME
    first, status = daemon_exchange(path, b'{"v": 2, "op": "search", '
                                          b'"queries": [{"text": "x"}]}\n'
                                          b'{"v": 2, "op": "status"}\n')
    expected = ("the daemon failed answering a request: unexpected RuntimeError: "
                "the gears slipped\\nat dock 7")
    assert first == {"v": 2, "ok": False, "error": expected, "kind": "DaemonError"}
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
REQUEST_TOKENS = [b"{", b"}", b"[", b"]", b":", b",", b" ", b"\n", b'"v"', b"1", b"2", b"0",
                  b"-1", b'"op"', b'"search"', b'"neighbours"', b'"status"', b'"queries"',
                  b'"query"', b'"text"', b'"filters"', b'"since"', b'"k"', b"1.5",
                  b'"unit_id"', b'"languages"', b'"paths"', b'"kinds"', b'"refund"', b'""',
                  b'"\\ud800"', b'"\\udc80x"', b'"\\u0000"', b"9223372036854775808",
                  b"-9223372036854775809", b"1e999", b"NaN", b"Infinity", b"null", b"true",
                  b"\xff", b"\x00", b"\xed\xa0\x80"]
any_text = st.text(st.characters(exclude_categories=()), max_size=12)
wire_query = st.fixed_dictionaries(
    {}, optional={"text": any_text, "unit_id": st.integers(), "k": st.integers(),
                  "filters": st.fixed_dictionaries(
                      {}, optional={"languages": st.lists(any_text, max_size=2),
                                    "paths": st.lists(any_text, max_size=2),
                                    "kinds": st.lists(any_text, max_size=2),
                                    "since": st.one_of(st.none(), st.floats(), st.integers())})})
request_lines = st.one_of(
    st.binary(max_size=400),
    st.lists(st.sampled_from(REQUEST_TOKENS), max_size=80).map(b"".join),
    st.tuples(st.integers(1, 40_000), st.sampled_from([b"[]", b"{}"])).map(
        lambda depth_pair: depth_pair[1][:1] * depth_pair[0] + depth_pair[1][1:] * depth_pair[0]),
    st.fixed_dictionaries(
        {"v": st.just(2), "op": st.sampled_from(["search", "neighbours", "status", "nope"])},
        optional={"queries": st.lists(wire_query, max_size=3), "query": wire_query},
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
        assert answer["v"] == 2 and isinstance(answer["ok"], bool)
        if not answer["ok"]:
            assert answer["error"] and "\n" not in answer["error"]
            assert answer["kind"] != "DaemonError"  # only foreseen errors, none unexpected
    assert daemon_state(daemon_process.index_dir) == "watching"
    log = daemon_process.log()
    assert "Traceback" not in log and "error:" not in log




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


def test_a_read_only_store_trusts_no_schema(sample_copy: Path,
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    # PRAGMA trusted_schema=OFF: a planted schema's views and triggers run no
    # application functions (sqlite.org/pragma.html#pragma_trusted_schema)
    from codeseek.store import Store

    index_quietly(sample_copy)
    for read_only in (False, True):
        if read_only:
            _no_read_write_opens(monkeypatch)
        store = Store.open(sample_copy / ".codeseek", create=False)
        try:
            assert store.read_only is read_only
            assert store._db.execute("PRAGMA trusted_schema").fetchone() == (0,)
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


def _posix_name(raw: bytes) -> bytes | None:
    """``raw`` as one file name a POSIX file system takes (no ``/``, no NUL), or None."""
    name = raw.replace(b"/", b"_").replace(b"\0", b"_")[:200]
    return None if name in (b"", b".", b"..") else name


def _write_tree(root: bytes, names: list[bytes], start: int) -> None:
    """A Python file per name (every other one inside a folder of that name)."""
    for number, name in enumerate(names, start):
        if number % 2:
            folder = os.path.join(root, name)
            if os.path.lexists(folder):
                continue
            os.mkdir(folder)
            target = os.path.join(folder, b"unit.py")
        else:
            target = os.path.join(root, name + b".py")
            if os.path.lexists(target):
                continue
        with open(target, "wb") as handle:
            handle.write(b'def unit_%d():\n    """Dock %d of the sweep."""\n    return %d\n'
                         % (number, number, number))


def _check_run(argv: list[str]) -> None:
    """One command: exit 0 and nothing on stderr, or exactly one ``error: ...`` line
    with status 1 (or 2 for a usage error, such as an empty query)."""
    code, out, err = run_cli(*argv)
    out.encode("utf-8")  # nothing that cannot be written to a UTF-8 terminal or pipe
    if code == 0:
        assert err == "", (argv, err)
    else:
        assert code in (1, 2), (argv, code, err)
        assert len(err.splitlines()) == 1 and err.startswith("error: "), (argv, err)
        err.encode("utf-8")


_NAMES = st.lists(st.binary(min_size=1, max_size=16), max_size=6)


@settings(max_examples=20, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(first=_NAMES, second=_NAMES, query=st.binary(max_size=24),
       lines=st.lists(st.binary(max_size=24), max_size=4), ignore=st.binary(max_size=24),
       as_json=st.booleans(), place=st.binary(max_size=24), piped=st.booleans())
def test_random_bytes_as_names_queries_and_batch_lines(
        first: list[bytes], second: list[bytes], query: bytes, lines: list[bytes],
        ignore: bytes, as_json: bool, place: bytes, piped: bool) -> None:
    with tempfile.TemporaryDirectory() as temp:
        repo = Path(temp) / "repo"
        root = os.fsencode(repo)
        os.mkdir(root)
        (repo / "base.py").write_text('def base():\n    """The depot."""\n    return 0\n',
                                      encoding="utf-8")
        _write_tree(root, [n for n in map(_posix_name, first) if n], 1)
        common = ["--backend", "fake"]
        _check_run(["index", str(repo), "-q", *common])
        _write_tree(root, [n for n in map(_posix_name, second) if n], 100)  # an update
        (repo / ".gitignore").write_bytes(ignore)  # random bytes as ignore rules too
        if piped:  # a FIFO as a folder's ignore file: skipped, never opened for a read
            os.mkdir(repo / "piped")
            os.mkfifo(repo / "piped" / ".gitignore")
            (repo / "piped" / "pump.py").write_text('def pump():\n    """A pump."""\n')
        _check_run(["index", str(repo), "-q", *common])
        view = ["--json"] if as_json else []
        # a query argument as sys.argv holds it (PEP 383); "--" keeps it positional
        _check_run(["search", "--repo", str(repo), *common, *view, "--", os.fsdecode(query)])
        batch = Path(temp) / "batch.txt"
        batch.write_bytes(b"\n".join(lines))
        _check_run(["search", "--batch", str(batch), "--repo", str(repo), *common])
        # a random PATH:NAME (sys.argv never holds a NUL: execve's strings end at one)
        for near in (place, b"base.py:" + place):
            _check_run(["search", "--neighbours", os.fsdecode(near.replace(b"\0", b"")),
                        "--repo", str(repo), *common, *view])
        _check_run(["outline", str(repo), *view])
        _check_run(["status", str(repo)])
        fresh = Path(temp) / "fresh-index"
        _check_run(["index", str(repo), "-q", "--index-dir", str(fresh), *common])
        ours, theirs = _stored(repo / ".codeseek"), _stored(fresh)
        assert ours["files"] == theirs["files"] and ours["units"] == theirs["units"]
        # an index kept outside sees the repository's own index folder as ignored files
        theirs_skipped = [row for row in theirs["skipped"]
                          if not str(row[0]).startswith(".codeseek/")]
        assert ours["skipped"] == theirs_skipped
