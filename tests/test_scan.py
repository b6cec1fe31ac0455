"""codeseek's file discovery checked against git and against the file system.

Ignore rules are compared with git itself (``git ls-files --others
--exclude-standard`` on a fresh repository, where every file is untracked):
the files codeseek looks at must be exactly the files git does not ignore.
"""

from __future__ import annotations

import os
import random
import shutil
import subprocess
import sysconfig
from collections.abc import Iterable
from pathlib import Path

import pytest

from codeseek.config import load_settings
from codeseek.languages import spec_for_path
from codeseek.scan import (
    BINARY_SNIFF_BYTES,
    REASON_BINARY,
    REASON_CACHE,
    REASON_GENERATED,
    REASON_IGNORED,
    REASON_NOT_UTF8,
    REASON_SECRET,
    REASON_SYMLINK,
    REASON_TOO_LARGE,
    REASON_VANISHED,
    REASON_VCS,
    REASON_VENDOR,
    ScanResult,
    SkipFile,
    SourceFile,
    read_source,
    scan_repository,
)

GIT = shutil.which("git")
needs_git = pytest.mark.skipif(GIT is None, reason="git is not installed")


# --- helpers ----------------------------------------------------------------------------


def write(root: Path, rel: str, content: str | bytes = "x = 1\n") -> Path:
    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8")
    return path


def git(root: Path, *args: str) -> str:
    """Run git in ``root`` with no user or system configuration."""
    assert GIT is not None
    home = root.parent / f"{root.name}-home"
    home.mkdir(exist_ok=True)
    env = {
        **os.environ,
        "HOME": str(home),
        "XDG_CONFIG_HOME": str(home / ".config"),
        "GIT_CONFIG_NOSYSTEM": "1",
        "GIT_CONFIG_GLOBAL": os.devnull,
    }
    done = subprocess.run(
        [GIT, *args], cwd=root, env=env, capture_output=True, text=True, check=True
    )
    return done.stdout


def git_init(root: Path, info_exclude: Iterable[str] = ()) -> None:
    git(root, "init", "-q", ".")
    (root / ".git" / "info").mkdir(parents=True, exist_ok=True)
    (root / ".git" / "info" / "exclude").write_text(
        "".join(f"{line}\n" for line in info_exclude), encoding="utf-8"
    )


def git_not_ignored(root: Path) -> set[str]:
    """Files git would offer to add: nothing is tracked, so all files git does not ignore."""
    # reference: git ls-files --others --exclude-standard
    out = git(root, "ls-files", "--others", "--exclude-standard", "-z")
    return {path for path in out.split("\0") if path}


def scan(root: Path, **changes: object) -> ScanResult:
    settings = load_settings(root)
    if changes:
        settings = settings.with_changes(**changes)
    return scan_repository(settings)


def returned(result: ScanResult) -> set[str]:
    return {source.path for source in result.files}


def looked_at(result: ScanResult) -> set[str]:
    """Files that passed the ignore rules: returned or left out for another reason."""
    others = {
        path for path, reason in result.skipped_paths
        if reason != REASON_IGNORED and not path.endswith("/")
    }
    return returned(result) | others


def reasons(result: ScanResult) -> dict[str, str]:
    return dict(result.skipped_paths)


def assert_same_as_git(root: Path) -> None:
    result = scan(root)
    expected = git_not_ignored(root)
    seen = looked_at(result)
    assert seen == expected, (
        f"codeseek looks at {sorted(seen - expected)} that git ignores; "
        f"misses {sorted(expected - seen)} that git keeps"
    )
    expected_sources = {p for p in expected if spec_for_path(p) is not None}
    assert returned(result) == expected_sources


# --- ignore rules against git -----------------------------------------------------------

FEATURE_FILES = (
    "top_only.py", "sub/top_only.py", "keep.py", "debug.log", "notes.txt",
    "build/out.py", "src/build/deep.py", "src/build.py", "src/main.py", "src/app.js",
    "gen/x.py", "a/gen/b/c.py", "a/general.py",
    "docs/draft_1.py", "docs/a/b/draft_2.py", "docs/final.py", "other/docs/draft_3.py",
    "data/wanted.py", "data/other.py", "data/sub/x.py",
    "ignored_dir/keep.py", "ignored_dir/more.py",
    "lib/keep.py", "lib/x.py", "lib/sub/keep.py",
    "x.tmp.py", "sub/y.tmp.py", "sub/anchored_here.py", "sub/x/anchored_here.py",
    "sub/nested/n.py", "sub/deeper/nested/n.py", "sub/deeper/a.py", "sub/deeper/main.py",
    "local_only.py", "sub/local_only.py",
    "wl/a.js", "wl/b.py", "wl/d/c.py", "wl/d/e.ts",
    "#hash.py", "trail.py", "file1.py", "fileA.py", "qa.py", "qab.py",
    "m/a/b.py", "m/a/x/y/b.py", "m/b.py",
)

FEATURE_IGNORES = {
    ".gitignore": [
        "# a comment line",
        "*.log",
        "build/",  # a directory pattern, at any depth
        "/top_only.py",  # anchored at the root
        "**/gen/**",
        "docs/**/draft_*.py",
        "!keep.py",
        "*.tmp.py",
        "data/*",
        "!data/wanted.py",
        "ignored_dir/",
        "!ignored_dir/keep.py",  # git: cannot re-include below an ignored folder
        "lib/**",
        "!lib/keep.py",
        "\\#hash.py",
        "trail.py   ",  # trailing spaces are dropped
        "file[0-9].py",
        "q?.py",
        "m/**/b.py",
    ],
    "sub/.gitignore": [
        "!*.tmp.py",  # overrides the parent's *.tmp.py
        "top_only.py",
        "/anchored_here.py",
        "nested/",
    ],
    "sub/deeper/.gitignore": [
        "!nested/",  # re-includes the folder sub/.gitignore ignores, at this level
        "*.py",
        "!main.py",
    ],
    "wl/.gitignore": [
        "*",  # the allow-list idiom: ignore all, re-include folders and .py files
        "!*/",
        "!*.py",
    ],
}


def build_feature_tree(root: Path) -> None:
    for rel in FEATURE_FILES:
        write(root, rel)
    for rel, lines in FEATURE_IGNORES.items():
        write(root, rel, "".join(f"{line}\n" for line in lines))
    git_init(root, info_exclude=["local_only.py"])


@needs_git
def test_ignore_rules_match_git_on_feature_tree(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    build_feature_tree(root)
    assert_same_as_git(root)


@needs_git
def test_feature_tree_covers_each_rule(tmp_path: Path) -> None:
    """The feature tree really exercises the rules it names (checked with git)."""
    root = tmp_path / "repo"
    build_feature_tree(root)
    kept = git_not_ignored(root)  # reference: git ls-files --others --exclude-standard
    assert "ignored_dir/keep.py" not in kept  # negation below an ignored folder
    assert {"lib/keep.py", "data/wanted.py", "keep.py"} <= kept  # negations that work
    assert "sub/y.tmp.py" in kept and "x.tmp.py" not in kept  # child overrides parent
    assert "sub/deeper/nested/n.py" not in kept and "sub/deeper/main.py" in kept
    assert "top_only.py" not in kept and "local_only.py" not in kept
    assert {"wl/b.py", "wl/d/c.py"} <= kept and not {"wl/a.js", "wl/d/e.ts"} & kept
    result = scan(root)
    assert reasons(result)["ignored_dir/"] == REASON_IGNORED
    assert reasons(result)["top_only.py"] == REASON_IGNORED


FOLDER_POOL = ("src", "lib", "build", "gen", "docs", "data", "keep", "deep")
FILE_POOL = ("keep.py", "main.py", "util.py", "draft_1.py", "top_only.py", "note.tmp.py",
             "x1.py", "app.js", "types.ts", "readme.txt", "Main.py", "]x", " main.py",
             "main.py ", "!keep.py", "kéep.py", "keep.py\\")
PATTERN_POOL = (
    "*.py", "!*.py", "keep.py", "!keep.py", "/top_only.py", "top_only.py", "build/",
    "build", "!build/", "**/gen/**", "gen/", "docs/**/draft_*.py", "**/draft_*.py", "data/*",
    "!data/keep.py", "*", "!*/", "src/*.js", "lib/**", "!lib/keep.py", "x[0-9].py",
    "*.tmp.py", "!*.tmp.py", "/src/", "deep/**/util.py", "util.py  ", "#util.py", "*.js",
    "!app.js", "?ain.py", "main.py/", "keep/", "!keep/", "/deep", "**/data", "lib/*/",
    "*/main.py", "[!m]ain.py", "[[:upper:]]*.py", "deep/*", "!deep/main.py", "**",
    "**/src/", "src/**/", "src/**/*.py", "*.py/", "\\!keep.py", "[a-m]*.py", "[]]x",
    "[!]]*.py", "ma**.py", "**main.py", "/**/main.py", "src/**/deep/**", "lib/", "!/lib/",
    "!src/**", "deep/**/", "d*/", "*/", "*/*", "*/*/*.py", "**/**/util.py", "data/**/*",
    "!**/keep.py", " main.py", "main.py\\ ", "*.[jt]s", "[[:lower:]]ain.py", "k?ep/", "/*",
    "/*.py", "!/*.py", "[", "a[", "keep.py\\",
)


def build_random_tree(root: Path, seed: int) -> None:
    rng = random.Random(seed)
    folders = [""]
    frontier = [""]
    for _depth in range(3):
        next_frontier: list[str] = []
        for parent in frontier:
            for name in rng.sample(FOLDER_POOL, rng.randint(1, 3)):
                rel = f"{parent}/{name}" if parent else name
                folders.append(rel)
                next_frontier.append(rel)
        frontier = next_frontier
    for folder in folders:
        for name in rng.sample(FILE_POOL, rng.randint(2, 5)):
            write(root, f"{folder}/{name}" if folder else name)
        if folder == "" or rng.random() < 0.4:
            lines = rng.sample(PATTERN_POOL, rng.randint(1, 6))
            write(root, f"{folder}/.gitignore" if folder else ".gitignore",
                  "".join(f"{line}\n" for line in lines))
    git_init(root, info_exclude=rng.sample(PATTERN_POOL, rng.randint(0, 2)))


@needs_git
@pytest.mark.parametrize("seed", range(24))
def test_ignore_rules_match_git_on_random_trees(tmp_path: Path, seed: int) -> None:
    root = tmp_path / "repo"
    build_random_tree(root, seed)
    assert_same_as_git(root)


def folders_of(root: Path) -> list[str]:
    return sorted(
        p.relative_to(root).as_posix() for p in root.rglob("*")
        if p.is_dir() and ".git" not in p.relative_to(root).parts
    )


@needs_git
@pytest.mark.parametrize("tree", ["feature", "random-3", "random-7"])
def test_scan_of_one_folder_matches_git_pathspec(tmp_path: Path, tree: str) -> None:
    root = tmp_path / "repo"
    if tree == "feature":
        build_feature_tree(root)
    else:
        build_random_tree(root, int(tree.split("-")[1]))
    settings = load_settings(root)
    folders = folders_of(root)
    assert len(folders) >= 5
    for folder in folders:
        # reference: git ls-files --others --exclude-standard -- <folder>
        kept = git(root, "ls-files", "--others", "--exclude-standard", "-z", "--", folder)
        expected = {p for p in kept.split("\0") if p and spec_for_path(p) is not None}
        got = returned(scan_repository(settings, start=folder))
        assert got == expected, f"folder {folder}: {sorted(got ^ expected)}"


@needs_git
def test_exclude_setting_is_honoured(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    for rel in ("app/main.py", "legacy/old.py", "legacy/deep/older.py", "src/legacy/x.py",
                "tools/legacy.py"):
        write(root, rel)
    write(root, "codeseek.toml", '[codeseek]\nexclude = ["legacy/"]\n')
    settings = load_settings(root)
    assert settings.exclude == ("legacy/",)
    result = scan_repository(settings)
    # reference: git check-ignore semantics of the same pattern, given to git through
    # .git/info/exclude (no .gitignore here, so precedence does not matter)
    git_init(root, info_exclude=["legacy/"])
    expected = {p for p in git_not_ignored(root) if p.endswith(".py")}
    assert returned(result) == expected
    assert "app/main.py" in expected and "tools/legacy.py" in expected
    assert reasons(result)["legacy/"] == REASON_IGNORED


# --- folders and names codeseek never reads ---------------------------------------------


def test_fixed_folders_and_secret_names_are_never_returned(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    for rel in ("src/ok.py", "node_modules/pkg/index.js", "web/node_modules/lib/x.js",
                ".venv/lib/site.py", ".git/hooks/hook.py", ".codeseek/units.py",
                "src/__pycache__/cached.py", ".env", "config/.env.local", "certs/server.pem",
                "src/messages_pb2.py"):
        write(root, rel)
    result = scan(root)
    assert returned(result) == {"src/ok.py"}
    why = reasons(result)
    # common practice: these folders hold dependencies, history and caches, not sources
    assert why["node_modules/"] == REASON_VENDOR
    assert why["web/node_modules/"] == REASON_VENDOR
    assert why[".venv/"] == REASON_VENDOR
    assert why[".git/"] == REASON_VCS
    assert why["src/__pycache__/"] == REASON_CACHE
    assert why[".env"] == why["config/.env.local"] == why["certs/server.pem"] == REASON_SECRET
    assert why["src/messages_pb2.py"] == REASON_GENERATED
    assert not any(path.startswith(".codeseek") for path, _ in result.skipped_paths)
    assert result.skipped[REASON_SECRET] == 3


# --- symbolic links ---------------------------------------------------------------------


def test_symlinks_are_counted_not_followed(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    write(root, "real.py")
    write(root, "a/inner.py")
    outside = write(tmp_path, "outside/secret.py")
    try:
        (root / "link.py").symlink_to(root / "real.py")
        (root / "a" / "loop").symlink_to(root / "a", target_is_directory=True)
        (root / "a" / "up").symlink_to("..", target_is_directory=True)
        (root / "out").symlink_to(outside.parent, target_is_directory=True)
    except OSError:
        pytest.skip("this file system has no symbolic links")
    result = scan(root)  # must terminate despite the loops
    assert returned(result) == {"real.py", "a/inner.py"}
    why = reasons(result)
    # reference: os.path.islink says which entries are links
    links = {p.relative_to(root).as_posix() for p in root.rglob("*") if os.path.islink(p)}
    assert links == {"link.py", "a/loop", "a/up", "out"}
    assert {path for path, reason in why.items() if reason == REASON_SYMLINK} == links
    assert result.skipped[REASON_SYMLINK] == 4


# --- sizes ------------------------------------------------------------------------------


def test_size_limit_from_settings(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    write(root, "small.py", "a" * 100)
    write(root, "big.py", "a" * 101)
    result = scan(root, max_file_bytes=100)
    # reference: os.stat sizes against the limit
    assert os.stat(root / "small.py").st_size == 100 < os.stat(root / "big.py").st_size
    assert returned(result) == {"small.py"}
    assert reasons(result)["big.py"] == REASON_TOO_LARGE
    assert result.skipped[REASON_TOO_LARGE] == 1


def test_fifty_megabyte_file_is_skipped_with_default_limit(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    write(root, "ok.py")
    with (root / "huge.py").open("wb") as handle:
        handle.truncate(50 * 1024 * 1024)  # sparse: fast to make, 50 MB to stat
    settings = load_settings(root)
    assert os.stat(root / "huge.py").st_size > settings.max_file_bytes
    result = scan_repository(settings)
    assert returned(result) == {"ok.py"}
    assert reasons(result)["huge.py"] == REASON_TOO_LARGE


def test_file_that_grows_after_scan_is_too_large_on_read(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    write(root, "grows.py", "x = 1\n")
    (source,) = scan(root, max_file_bytes=50).files
    write(root, "grows.py", "x = 1\n" * 20)
    assert os.stat(source.abs_path).st_size > 50  # reference: os.stat
    with pytest.raises(SkipFile) as caught:
        read_source(source, 50)
    assert caught.value.args[0] == REASON_TOO_LARGE


# --- content: binary, encoding, generated, vanished -------------------------------------


def only_source(root: Path) -> SourceFile:
    (source,) = scan(root).files
    return source


def read_reason(path: Path, data: bytes, max_bytes: int = 1024 * 1024) -> str | None:
    write(path.parent, path.name, data)
    source = only_source(path.parent)
    try:
        read_source(source, max_bytes)
    except SkipFile as skip:
        return str(skip.args[0])
    return None


def test_binary_file_with_source_name(tmp_path: Path) -> None:
    data = b"def f():\n    return 1\n\x00\x01\x02\x03" + bytes(range(256))
    # value from memory: git calls a file binary when a NUL byte appears in its first
    # 8000 bytes; codeseek looks at the first BINARY_SNIFF_BYTES
    assert b"\0" in data[:8000] and BINARY_SNIFF_BYTES >= 8000
    assert read_reason(tmp_path / "repo" / "blob.py", data) == REASON_BINARY


def test_invalid_utf8(tmp_path: Path) -> None:
    data = "name = 'café'\n".encode("latin-1")
    with pytest.raises(UnicodeDecodeError):
        data.decode("utf-8")  # reference: Python's UTF-8 codec
    assert read_reason(tmp_path / "repo" / "latin.py", data) == REASON_NOT_UTF8


def test_valid_utf8_is_read(tmp_path: Path) -> None:
    data = "name = 'café ✓'\n".encode()
    assert data.decode("utf-8")  # reference: Python's UTF-8 codec
    assert read_reason(tmp_path / "repo" / "fine.py", data) is None


@pytest.mark.parametrize("header", [
    "# @generated by the schema tool\n",
    "# Code generated by a tool. DO NOT EDIT.\n",
])
def test_generated_marker(tmp_path: Path, header: str) -> None:
    data = (header + "def f():\n    return 1\n").encode()
    # common practice: "@generated" and "Code generated ... DO NOT EDIT." head files
    # written by tools
    assert read_reason(tmp_path / "repo" / "made.py", data) == REASON_GENERATED


def test_marker_deep_in_a_file_is_not_a_generated_header(tmp_path: Path) -> None:
    data = ("def f():\n    return 1\n" * 10 + "# mentions @generated later\n").encode()
    assert read_reason(tmp_path / "repo" / "handmade.py", data) is None


STDLIB = Path(sysconfig.get_paths()["stdlib"])


def test_stdlib_generated_and_handwritten_modules(tmp_path: Path) -> None:
    generated = STDLIB / "stringprep.py"
    handwritten = [STDLIB / name for name in ("argparse.py", "textwrap.py", "json/decoder.py")]
    if not generated.is_file() or not all(p.is_file() for p in handwritten):
        pytest.skip("standard library sources not available")
    # reference: stringprep.py's own first line says it is generated ("DO NOT EDIT");
    # the others are maintained by hand in CPython
    assert b"DO NOT EDIT" in generated.read_bytes().splitlines()[0]
    assert read_reason(tmp_path / "gen" / "stringprep.py", generated.read_bytes()) == (
        REASON_GENERATED)
    for number, path in enumerate(handwritten):
        target = tmp_path / f"hand{number}" / path.name
        assert read_reason(target, path.read_bytes()) is None, path


def test_minified_javascript_is_generated(tmp_path: Path) -> None:
    data = ("var a=1;" * 500 + "\n").encode()  # one 4000-character line
    # common practice: hand-written code has lines far shorter than 400 characters
    assert read_reason(tmp_path / "repo" / "bundle.js", data) == REASON_GENERATED


def test_file_vanishing_between_scan_and_read(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    write(root, "gone.py")
    source = only_source(root)
    (root / "gone.py").unlink()
    assert not source.abs_path.exists()  # reference: the file system
    with pytest.raises(SkipFile) as caught:
        read_source(source, 1024)
    assert caught.value.args[0] == REASON_VANISHED


def test_scan_result_fields(tmp_path: Path) -> None:
    root = tmp_path / "repo"
    path = write(root, "pkg/mod.py", "def f():\n    return 1\n")
    (source,) = scan(root).files
    info = os.stat(path)  # reference: os.stat
    assert source.path == "pkg/mod.py"
    assert source.abs_path == path.resolve()
    assert (source.size, source.mtime_ns) == (info.st_size, info.st_mtime_ns)
    assert source.spec.name == "python"



# --- one folder rule for the walk and the watcher ----------------------------------------


def test_walk_and_watcher_skip_the_same_folders(tmp_path: Path) -> None:
    """Every folder the walk never enters is one whose events the watcher drops, and the
    files the watcher would index from events on every path are the walk's files."""
    from codeseek import FakeEmbedder, open_index
    from codeseek.watch import Watcher, resolve_paths

    root = tmp_path / "repo"
    kept = ("src/ok.py", "src/deep/a/b.py", "docs/notes.py")
    skipped = (".git/hooks/h.py", ".hg/store/x.py", ".svn/x.py", ".bzr/x.py", "_darcs/x.py",
               "node_modules/pkg/i.js", "vendor/v.go", "web/third_party/t.py",
               "src/__pycache__/c.py", "ignored/i.py", "src/build/out.py")
    in_index = "index/units.py"  # written once the index exists: it refuses a full folder
    for rel in kept + skipped:
        write(root, rel)
    write(root, ".gitignore", "ignored/\nbuild/\n")
    write(tmp_path, "outside/o.py")
    try:
        (root / "linked").symlink_to(root / "src" / "deep", target_is_directory=True)
        (root / "linked_out").symlink_to(tmp_path / "outside", target_is_directory=True)
    except OSError:
        pytest.skip("this file system has no symbolic links")
    through_links = ("linked/a/b.py", "linked_out/o.py")
    index = open_index(root, create=True, embedder=FakeEmbedder(), index_dir=root / "index")
    write(root, in_index)
    skipped += (in_index,)
    try:
        walk = scan_repository(index.settings)
        walked = {p.rsplit("/", 1)[0] if "/" in p else "" for p in looked_at(walk)}
        # reference: the file system's own listing of every file, through the links too
        every = {p.relative_to(root).as_posix() for p in root.rglob("*")
                 if p.is_file() and p.name != ".gitignore"} | set(through_links)
        assert every >= set(kept + skipped + through_links)
        watcher = Watcher(index)
        for rel in sorted(every):
            watcher.notice(str(root / rel))
        noticed = watcher.queue.take(timeout=0, debounce=0)
        assert noticed == {rel for rel in every
                           if (rel.rsplit("/", 1)[0] if "/" in rel else "") in walked}
        assert noticed == set(kept)
        files, gone, _ = resolve_paths(index, watcher.rules, every)
        assert {f.path for f in files} == returned(walk) == set(kept)
        assert gone == []
    finally:
        index.close()
