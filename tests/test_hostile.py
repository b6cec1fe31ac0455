"""Hostile input and faults, in one place: every case ends in a one-line error
(or a documented skip) and leaves an index equal to a fresh build.

Sections (one per area, so each can grow without touching the others):
the index folder and files written outside it; terminal output; file names
and bytes; configuration and command-line values; the daemon; full disk and
read-only folders; a property-based sweep over random bytes.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import pytest

from codeseek.api import Index
from codeseek.errors import InvalidQuery

# == the index folder: nothing written outside the repository and its index ==




# == terminal output: control characters escaped, JSON exact ==




# == file names and bytes: non-UTF-8 names, newlines in names ==




# == configuration and command-line values ==


def _cli(*argv: str) -> tuple[int, str, str]:
    import io

    from codeseek.cli import main

    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


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
        code, out, err = _cli("search", "fare", "--repo", str(sample_copy), "--backend",
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




# == the daemon: requests, locks, sockets, first build ==




# == full disk, read-only index, damaged store, a build in progress ==




# == a property-based sweep over random bytes ==
