"""Seals: a keyed digest that tells codeseek's own cache files from planted ones.

The HNSW file is a cache of the vectors in SQLite, read by a C++ library that
trusts what it reads: a file altered by hand, by a failing disk, or planted in
a cloned repository's ``.codeseek/`` folder could make it read out of bounds.
So the file codeseek saves is sealed: an HMAC-SHA256 of its bytes under a key
that only this user holds (``seal.key`` in the user's cache folder, mode 0600,
made on first need), recorded in the store's manifest. A file whose seal does
not verify is never loaded; the vectors are rebuilt from SQLite instead, which
costs time, never correctness. Without a usable key nothing verifies, so the
cache is always rebuilt.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
from pathlib import Path

from codeseek import safefs
from codeseek.errors import CodeseekError

KEY_NAME = "seal.key"
KEY_BYTES = 32
_CHUNK = 1 << 20


def key(cache_dir: Path, *, create: bool) -> bytes | None:
    """This user's sealing key; with ``create``, made if missing. None when there is
    none and none can be made (an unwritable cache folder): nothing then verifies."""
    path = cache_dir / KEY_NAME
    try:
        data = safefs.read_bytes(path)
    except FileNotFoundError:
        data = b""
    except (OSError, CodeseekError):  # unreadable, a link, not a regular file
        return None
    if len(data) == KEY_BYTES:
        return data
    if not create or data:
        return None  # a key of the wrong size is never repaired silently
    try:
        cache_dir.mkdir(parents=True, exist_ok=True, mode=0o700)
        if not safefs.create_new(path, secrets.token_bytes(KEY_BYTES)):
            return key(cache_dir, create=False)  # another process made it first
    except OSError:
        return None
    return key(cache_dir, create=False)


def seal_of(secret: bytes, path: Path) -> str | None:
    """The seal of a regular file's bytes (read without following a link); None when the
    file cannot be read."""
    digest = hmac.new(secret, digestmod=hashlib.sha256)
    try:
        fd = safefs.open_regular(path, os.O_RDONLY)
    except (OSError, CodeseekError):  # missing, a link, not a regular file
        return None
    with os.fdopen(fd, "rb") as handle:
        while chunk := handle.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def verifies(secret: bytes | None, path: Path, recorded: str | None) -> bool:
    """Whether the file at ``path`` carries the recorded seal under this key."""
    if secret is None or not recorded:
        return False
    actual = seal_of(secret, path)
    return actual is not None and hmac.compare_digest(actual, recorded)
