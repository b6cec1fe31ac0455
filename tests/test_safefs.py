"""The safe file operations of the index folder (codeseek/safefs.py)."""

from __future__ import annotations

import os
import socket
import stat
from pathlib import Path

import pytest

from codeseek import safefs
from codeseek.errors import IndexFolderUnsafe


def test_write_atomic_replaces_and_leaves_no_temp_file(tmp_path: Path) -> None:
    target = tmp_path / "data.bin"
    target.write_bytes(b"old")
    safefs.write_atomic(target, b"new")
    assert target.read_bytes() == b"new"
    assert stat.S_IMODE(target.stat().st_mode) == 0o600
    assert sorted(p.name for p in tmp_path.iterdir()) == ["data.bin"]


def test_write_atomic_replaces_a_link_and_never_writes_through_it(tmp_path: Path) -> None:
    victim = tmp_path / "victim.txt"
    victim.write_bytes(b"keep me")
    link = tmp_path / "index-file"
    link.symlink_to(victim)
    safefs.write_atomic(link, b"ours")
    assert victim.read_bytes() == b"keep me"
    assert not link.is_symlink() and link.read_bytes() == b"ours"


def test_a_failed_write_keeps_the_old_file_and_removes_the_temp(tmp_path: Path) -> None:
    target = tmp_path / "data.bin"
    target.write_bytes(b"last good")
    with pytest.raises(OSError, match="no room"), safefs.replacing(target) as pending:
        pending.file.write(b"half")
        raise OSError(28, "no room")
    assert target.read_bytes() == b"last good"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["data.bin"]


def test_replacing_by_name_for_libraries_that_write_a_path(tmp_path: Path) -> None:
    target = tmp_path / "graph.bin"
    with safefs.replacing(target) as pending:
        pending.path.write_bytes(b"written by name")  # as hnswlib's save_index does
    assert target.read_bytes() == b"written by name"


def test_open_lock_refuses_a_link_and_a_fifo(tmp_path: Path) -> None:
    victim = tmp_path / "victim"
    victim.write_bytes(b"pid?")
    (tmp_path / "link.lock").symlink_to(victim)
    with pytest.raises(IndexFolderUnsafe, match="symbolic link"):
        safefs.open_lock(tmp_path / "link.lock")
    os.mkfifo(tmp_path / "fifo.lock")  # would block a plain open
    with pytest.raises(IndexFolderUnsafe, match="not a regular file"):
        safefs.open_lock(tmp_path / "fifo.lock")
    assert victim.read_bytes() == b"pid?"
    with safefs.open_lock(tmp_path / "new.lock") as handle:
        handle.write(b"1")
    assert stat.S_IMODE((tmp_path / "new.lock").stat().st_mode) == 0o600


def test_create_new_never_follows_a_dangling_link(tmp_path: Path) -> None:
    (tmp_path / ".gitignore").symlink_to(tmp_path / "nowhere")
    assert safefs.create_new(tmp_path / ".gitignore", b"*\n") is False
    assert not (tmp_path / "nowhere").exists()


def test_read_bytes_and_is_regular_file_do_not_follow_links(tmp_path: Path) -> None:
    secret = tmp_path / "secret"
    secret.write_bytes(b"s")
    (tmp_path / "view").symlink_to(secret)
    assert safefs.is_regular_file(secret) and not safefs.is_regular_file(tmp_path / "view")
    with pytest.raises(IndexFolderUnsafe):
        safefs.read_bytes(tmp_path / "view")


def test_check_socket(tmp_path: Path) -> None:
    path = tmp_path / "daemon.sock"
    assert safefs.check_socket(path) is False
    server = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    server.bind(str(path))
    try:
        assert safefs.check_socket(path) is True
    finally:
        server.close()
    path.unlink()
    path.write_bytes(b"")
    with pytest.raises(IndexFolderUnsafe, match="not a socket of yours"):
        safefs.check_socket(path)


def test_check_index_dir_refuses_a_link_inside(tmp_path: Path) -> None:
    folder = tmp_path / "idx"
    folder.mkdir(mode=0o700)
    safefs.check_index_dir(folder)
    (folder / "anything").symlink_to("/")
    with pytest.raises(IndexFolderUnsafe, match="anything: a symbolic link"):
        safefs.check_index_dir(folder)


def test_prepare_index_dir_adopts_an_empty_folder_and_refuses_a_full_one(tmp_path: Path) -> None:
    empty = tmp_path / "empty"
    empty.mkdir(mode=0o700)
    assert safefs.prepare_index_dir(empty) == []
    assert (empty / ".gitignore").read_text(encoding="utf-8") == safefs.GITIGNORE_TEXT
    assert safefs.is_index_folder(empty)
    assert safefs.prepare_index_dir(empty) == []  # an index folder already: accepted again
    full = tmp_path / "full"
    full.mkdir(mode=0o700)
    (full / "a.py").write_text("x = 1\n", encoding="utf-8")
    with pytest.raises(IndexFolderUnsafe, match="not a codeseek index"):
        safefs.prepare_index_dir(full)
    assert sorted(p.name for p in full.iterdir()) == ["a.py"]
