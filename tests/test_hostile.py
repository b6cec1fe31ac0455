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




# == a property-based sweep over random bytes ==
