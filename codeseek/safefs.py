"""Safe file operations for the index folder: nothing is followed through a link.

A repository may commit a ``.codeseek/`` folder of its own, holding symbolic
links to files elsewhere (``daemon.lock -> ~/.bashrc``). So the index folder
is checked before it is used (:func:`check_index_dir`: a real folder of the
user's, that no one else can write to, holding no link and nothing of another
user's), and every file in it is opened with ``O_NOFOLLOW`` (new ones with
``O_EXCL`` too), refusing anything that is not a regular file (a FIFO would
block). Writes that replace a file go through :func:`replacing`: a new temp
file beside the target, fsync, ``os.replace`` (which replaces a link, never
writes through it), fsync of the folder.

Every refusal is an :class:`~codeseek.errors.IndexFolderUnsafe` naming the
path and what to do. Only the index folder's own state is checked; a repository
that changes it while codeseek runs is outside what these checks promise.
"""

from __future__ import annotations

import errno
import os
import secrets
import stat
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from codeseek.errors import FileRefused, IndexFolderUnsafe, IndexWriteError

USER_ONLY = 0o600
FOLDER_MODE = 0o700
GITIGNORE_NAME = ".gitignore"
GITIGNORE_TEXT = "# codeseek's index folder: never commit it\n*\n"
MARKER_NAMES = ("index.sqlite3",)  # a folder holding one of these is an index already
_NOFOLLOW = os.O_NOFOLLOW | os.O_CLOEXEC | os.O_NONBLOCK


def _user() -> int:
    return os.geteuid()


def lstat_or_none(path: Path) -> os.stat_result | None:
    """The path's own status (a link is not followed); None when it does not exist."""
    try:
        return os.lstat(path)
    except FileNotFoundError:
        return None


def _link_error(path: Path) -> IndexFolderUnsafe:
    return IndexFolderUnsafe(
        f"{path}: a symbolic link in the index folder; codeseek never follows links there "
        "(a cloned repository could aim one at your files): remove it")


# -- the folder ----------------------------------------------------------------------


def check_index_dir(path: Path) -> None:
    """Refuse an index folder that is not safe to write in (see the module docstring)."""
    info = lstat_or_none(path)
    if info is None:
        return
    if stat.S_ISLNK(info.st_mode):
        raise IndexFolderUnsafe(
            f"{path}: the index folder is a symbolic link; codeseek never follows links "
            "there: remove the link, or name the real folder with --index-dir")
    if not stat.S_ISDIR(info.st_mode):
        raise IndexFolderUnsafe(f"{path}: the index folder is not a folder")
    if info.st_uid != _user():
        raise IndexFolderUnsafe(
            f"{path}: the index folder belongs to another user (uid {info.st_uid}); "
            "codeseek keeps an index only in a folder of yours")
    if info.st_mode & stat.S_IWOTH:
        raise IndexFolderUnsafe(
            f"{path}: other users can write to the index folder (mode "
            f"{stat.S_IMODE(info.st_mode):04o}); use a folder of your own, or `chmod o-w` it")
    try:
        entries = list(os.scandir(path))
    except OSError as exc:
        raise IndexFolderUnsafe(f"{path}: cannot list the index folder: {exc}") from exc
    for entry in entries:
        mode = entry.stat(follow_symlinks=False)
        if stat.S_ISLNK(mode.st_mode):
            raise _link_error(Path(entry.path))
        if mode.st_uid != _user():
            raise IndexFolderUnsafe(
                f"{entry.path}: belongs to another user (uid {mode.st_uid}); codeseek uses "
                "an index folder only when everything in it is yours: remove it")


def is_index_folder(path: Path) -> bool:
    """Whether a folder already holds a codeseek index (or its ignore file)."""
    if any(is_regular_file(path / name) for name in MARKER_NAMES):
        return True
    try:
        return read_bytes(path / GITIGNORE_NAME) == GITIGNORE_TEXT.encode()
    except (OSError, IndexFolderUnsafe):
        return False


def prepare_index_dir(path: Path, repo: Path | None = None) -> list[str]:
    """Make the index folder ready for a new index; returns warnings to show once.

    A folder codeseek creates gets mode 0700 and a ``.gitignore`` holding ``*``.
    An existing folder keeps its mode: it is refused if it fails
    :func:`check_index_dir` or holds files that are not an index (inside the
    repository they would be hidden from git and from the index; elsewhere they
    are someone's files), and a warning says so if other users can read it.
    """
    info = lstat_or_none(path)
    try:
        if info is None:
            path.parent.mkdir(parents=True, exist_ok=True)
            os.mkdir(path, FOLDER_MODE)
            os.chmod(path, FOLDER_MODE)  # the umask may have narrowed the owner's bits
            create_new(path / GITIGNORE_NAME, GITIGNORE_TEXT.encode())
            return []
    except FileExistsError:
        pass  # made by a process beside this one: check it like any existing folder
    except OSError as exc:
        raise IndexWriteError(f"{path}: cannot create the index folder: {exc}") from exc
    check_index_dir(path)
    info = os.lstat(path)
    if not is_index_folder(path):
        others = sorted(os.listdir(path))
        if others:
            inside = repo is not None and path.resolve().is_relative_to(repo.resolve())
            why = ("an index there would hide them from git and from the index"
                   if inside else "codeseek keeps its index in a folder of its own")
            raise IndexFolderUnsafe(
                f"{path}: the folder holds files that are not a codeseek index "
                f"({others[0]}, ...); {why}: name a new or empty folder, such as "
                f"{path / '.codeseek'}")
        try:
            create_new(path / GITIGNORE_NAME, GITIGNORE_TEXT.encode())
        except OSError as exc:
            raise IndexWriteError(f"{path}: cannot write in the index folder: {exc}") from exc
    mode = stat.S_IMODE(info.st_mode)
    if mode & 0o077:
        return [f"the index folder {path} is open to other users (mode {mode:04o}); "
                "codeseek leaves its mode as it is and makes its files readable by you "
                f"only (`chmod 700 {path}` closes it)"]
    return []


# -- files ---------------------------------------------------------------------------


def is_regular_file(path: Path) -> bool:
    """Whether the path is a regular file itself (a link to one is not)."""
    info = lstat_or_none(path)
    return info is not None and stat.S_ISREG(info.st_mode)


def open_regular(path: Path, flags: int, mode: int = USER_ONLY) -> int:
    """``os.open`` that follows no link and accepts only a regular file; returns the fd."""
    try:
        fd = os.open(path, flags | _NOFOLLOW, mode)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise _link_error(path) from exc
        raise
    if not stat.S_ISREG(os.fstat(fd).st_mode):
        os.close(fd)
        raise IndexFolderUnsafe(f"{path}: not a regular file; codeseek writes only its own "
                                "files in the index folder: remove it")
    return fd


def open_lock(path: Path) -> BinaryIO:
    """A lock file opened for reading and writing (created 0600 if missing)."""
    try:
        fd = open_regular(path, os.O_RDWR | os.O_CREAT)
    except OSError as exc:
        raise IndexWriteError(f"{path}: cannot create the lock file: {exc}") from exc
    return os.fdopen(fd, "rb+", buffering=0)


def create_new(path: Path, data: bytes = b"", mode: int = USER_ONLY) -> bool:
    """Create a file that must not exist yet (``O_EXCL``); False when something is there."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | _NOFOLLOW, mode)
    except FileExistsError:
        return False
    with os.fdopen(fd, "wb") as handle:
        handle.write(data)
    return True


def read_bytes(path: Path) -> bytes:
    """A regular file's bytes, read without following a link."""
    with os.fdopen(open_regular(path, os.O_RDONLY), "rb") as handle:
        return handle.read()


def read_regular_file(path: Path, cap: int) -> bytes:
    """The bytes of a file the repository holds (a setting or ignore file, a source file),
    read only if it is a regular file itself and at most ``cap`` bytes.

    Opened with ``O_NOFOLLOW | O_NONBLOCK`` and checked with ``fstat`` on the open
    descriptor, so neither a link (to ``/dev/zero``, to a file outside) nor a FIFO
    (an ``open`` or ``read`` that never returns) is read, even one swapped in after
    a caller's ``lstat``. Raises :class:`FileRefused` (its message is the reason,
    without the path) for a link, a file that is not regular or one over ``cap``;
    OSError (missing, unreadable) passes through.
    """
    try:
        fd = os.open(path, os.O_RDONLY | _NOFOLLOW)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise FileRefused("a symbolic link (not followed)") from exc
        raise
    with os.fdopen(fd, "rb") as handle:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise FileRefused("not a regular file")
        if info.st_size > cap:
            raise FileRefused(f"larger than {cap} bytes")
        data = handle.read(cap + 1)
    if len(data) > cap:  # it grew after the fstat
        raise FileRefused(f"larger than {cap} bytes")
    return data


def check_socket(path: Path) -> bool:
    """Whether ``path`` is a socket of this user's (False when nothing is there).

    Raises :class:`IndexFolderUnsafe` for anything else under that name (a link,
    a file, another user's socket), which codeseek must neither use nor remove.
    """
    info = lstat_or_none(path)
    if info is None:
        return False
    if stat.S_ISLNK(info.st_mode):
        raise _link_error(path)
    if not stat.S_ISSOCK(info.st_mode) or info.st_uid != _user():
        raise IndexFolderUnsafe(f"{path}: not a socket of yours; codeseek neither uses nor "
                                "removes it: remove it yourself")
    return True


# -- atomic replacement ----------------------------------------------------------------


@dataclass(frozen=True)
class Pending:
    """A temp file being written beside its target (``file`` is open for writing)."""

    file: BinaryIO
    path: Path


@contextmanager
def replacing(target: Path, mode: int = USER_ONLY) -> Iterator[Pending]:
    """Write a new version of ``target`` atomically.

    Yields a temp file in the same folder (``O_EXCL | O_NOFOLLOW``); write to
    ``pending.file`` or, for a library that writes by name, to ``pending.path``.
    On a clean exit the file is flushed and fsynced, renamed over the target
    (``os.replace``: a link at the target is replaced, never written through)
    and the folder is fsynced. On an error the temp file is removed. OSError
    passes through for the caller to translate.
    """
    folder = target.parent
    while True:
        temp = folder / f".tmp-{secrets.token_hex(6)}-{target.name}"
        try:
            fd = os.open(temp, os.O_RDWR | os.O_CREAT | os.O_EXCL | _NOFOLLOW, mode)
            break
        except FileExistsError:
            continue
    handle = os.fdopen(fd, "rb+")
    try:
        yield Pending(handle, temp)
        handle.flush()
        os.fsync(handle.fileno())
        handle.close()
        os.replace(temp, target)
        fsync_dir(folder)
    except BaseException:
        handle.close()
        temp.unlink(missing_ok=True)
        raise


def write_atomic(target: Path, data: bytes, mode: int = USER_ONLY) -> None:
    """Replace ``target`` by ``data`` atomically (see :func:`replacing`)."""
    with replacing(target, mode) as pending:
        pending.file.write(data)


def fsync_dir(folder: Path) -> None:
    """Make a rename in ``folder`` durable."""
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
