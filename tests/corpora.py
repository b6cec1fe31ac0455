"""Real code from package registries, fetched once and cached, never committed.

Each :class:`Corpus` names a registry package at an exact version and the files
of it that tests (and ``scripts/bench_index.py``) read. Fetching uses the
registries' ordinary clients: ``npm pack NAME@VERSION`` for npm, and
``apt-get download PKG=VERSION`` + ``dpkg-deb -x`` for Debian (after an
``apt-get update`` only when the package lists lack the version). Only the
wanted files are kept, in ``$XDG_CACHE_HOME/codeseek-test-corpora`` (default
``~/.cache/codeseek-test-corpora``), one folder per package and version.

The packages are other people's code; codeseek's tests only read them.
"""

from __future__ import annotations

import fnmatch
import os
import shutil
import subprocess
import tarfile
import tempfile
from dataclasses import dataclass
from pathlib import Path

from codeseek.config import load_settings
from codeseek.parse import parse_source
from codeseek.scan import SkipFile, read_source, scan_repository
from codeseek.units import CodeUnit


class CorpusUnavailable(Exception):
    """A corpus cannot be fetched here (no client for its registry); args[0] says why."""


@dataclass(frozen=True)
class Corpus:
    """One pinned package and the source files of it that are read.

    Attributes:
        language: the codeseek language name its files are read as.
        registry: ``npm`` or ``debian``.
        package: the package name in that registry.
        version: the exact version.
        root: the folder inside the unpacked package that holds the files.
        include: glob patterns (relative to ``root``, ``/``-separated) of the files kept.
        exclude: glob patterns of files left out among those.
    """

    language: str
    registry: str
    package: str
    version: str
    root: str
    include: tuple[str, ...]
    exclude: tuple[str, ...] = ()

    @property
    def label(self) -> str:
        """``registry package version``, as test comments and reports name it."""
        return f"{self.registry} {self.package} {self.version}"

    @property
    def folder_name(self) -> str:
        safe = self.package.replace("/", "_").replace("@", "")
        return f"{self.registry}-{safe}-{self.version}".replace("~", "_")

    def wanted(self, rel_path: str) -> bool:
        """Whether a file (relative to ``root``) belongs to the corpus."""
        return any(fnmatch.fnmatchcase(rel_path, pattern) for pattern in self.include) and not any(
            fnmatch.fnmatchcase(rel_path, pattern) for pattern in self.exclude
        )


# One corpus per language: small, real, and documented with doc comments.
CORPORA: dict[str, Corpus] = {
    "javascript": Corpus("javascript", "npm", "express", "4.19.2", "package",
                         ("index.js", "lib/*.js", "lib/*/*.js")),
    "typescript": Corpus("typescript", "npm", "@tanstack/query-core", "5.51.1", "package/src",
                         ("*.ts",), ("*.d.ts",)),
    "tsx": Corpus("tsx", "npm", "@tanstack/react-query", "5.51.1", "package/src",
                  ("*.tsx", "__tests__/*.tsx")),
    "go": Corpus("go", "debian", "golang-github-spf13-pflag-dev",
                 "1.0.6~git20210604-d5e0c0615ace-1",
                 "usr/share/gocode/src/github.com/spf13/pflag", ("*.go",)),
    "rust": Corpus("rust", "debian", "librust-semver-dev", "1.0.14-1",
                   "usr/share/cargo/registry/semver-1.0.14", ("src/*.rs", "src/*/*.rs")),
    "java": Corpus("java", "npm", "cordova-plugin-file", "8.1.3", "package/src/android",
                   ("*.java",)),
    "c": Corpus("c", "debian", "v4l2loopback-dkms", "0.12.7-2", "usr/src/v4l2loopback-0.12.7",
                ("*.c", "*.h")),
    "cpp": Corpus("cpp", "debian", "googletest", "1.12.1-0.2", "usr/src/googletest",
                  ("googletest/src/*.cc", "googlemock/src/*.cc",
                   "googletest/include/gtest/*.h", "googlemock/include/gmock/*.h")),
    "ruby": Corpus("ruby", "debian", "ruby-thor", "1.2.1-2",
                   "usr/share/rubygems-integration/all/gems/thor-1.2.1/lib",
                   ("thor.rb", "thor/*.rb", "thor/*/*.rb")),
}


def cache_root() -> Path:
    """Where corpora are kept: ``$XDG_CACHE_HOME/codeseek-test-corpora`` or under ~/.cache."""
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "codeseek-test-corpora"


def fetch(corpus: Corpus) -> Path:
    """The corpus folder, fetched and unpacked on first use (raises CorpusUnavailable)."""
    target = cache_root() / corpus.folder_name
    if (target / ".complete").is_file():
        return target
    target.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(dir=target.parent, prefix=".fetch-") as scratch:
        work = Path(scratch)
        unpacked = work / "unpacked"
        unpacked.mkdir()
        if corpus.registry == "npm":
            _fetch_npm(corpus, work, unpacked)
        else:
            _fetch_debian(corpus, work, unpacked)
        staging = work / "kept"
        _keep_wanted(corpus, unpacked / corpus.root, staging)
        (staging / ".complete").write_text(corpus.label + "\n", encoding="utf-8")
        shutil.rmtree(target, ignore_errors=True)
        try:
            os.replace(staging, target)
        except OSError:
            if not (target / ".complete").is_file():  # else another run fetched it first
                raise
    return target


def fetch_or_skip(corpus: Corpus) -> Path:
    """:func:`fetch` for a test: skip it where the corpus cannot be fetched, but fail on CI
    (where setup installs every client, so a missing corpus is a broken set-up)."""
    import pytest

    try:
        return fetch(corpus)
    except CorpusUnavailable as exc:
        if os.environ.get("CI"):
            pytest.fail(f"{corpus.label}: {exc}")
        pytest.skip(f"{corpus.label}: {exc}")


def units_of(repo: Path) -> list[CodeUnit]:
    """Every unit of a repository, as `codeseek index` stores them (paths relative to it)."""
    settings = load_settings(repo)
    units: list[CodeUnit] = []
    for source in scan_repository(settings).files:
        try:
            data = read_source(source, settings.max_file_bytes)
        except SkipFile:
            continue
        units.extend(parse_source(source.path, data, source.spec).units)
    return units


def files(corpus: Corpus) -> list[Path]:
    """The corpus's source files, sorted (fetching it first if needed)."""
    folder = fetch(corpus)
    return sorted(p for p in folder.rglob("*") if p.is_file() and p.name != ".complete")


def _keep_wanted(corpus: Corpus, root: Path, staging: Path) -> None:
    if not root.is_dir():
        raise CorpusUnavailable(f"{corpus.label}: no folder {corpus.root} in the package")
    kept = 0
    for path in sorted(root.rglob("*")):
        rel = path.relative_to(root).as_posix()
        if path.is_file() and not path.is_symlink() and corpus.wanted(rel):
            destination = staging / rel
            destination.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(path, destination)
            kept += 1
    if not kept:
        raise CorpusUnavailable(f"{corpus.label}: no file matches {corpus.include}")


def _fetch_npm(corpus: Corpus, work: Path, unpacked: Path) -> None:
    if shutil.which("npm") is None:
        raise CorpusUnavailable("npm is not installed (needed to fetch npm corpora)")
    spec = f"{corpus.package}@{corpus.version}"
    result = _run(["npm", "pack", spec, "--silent", "--pack-destination", str(work)], work)
    tarballs = sorted(work.glob("*.tgz"))
    if result.returncode != 0 or not tarballs:
        raise RuntimeError(f"npm pack {spec} failed: {result.stderr.strip()[-500:]}")
    with tarfile.open(tarballs[0]) as archive:
        archive.extractall(unpacked, filter="data")


def _fetch_debian(corpus: Corpus, work: Path, unpacked: Path) -> None:
    if shutil.which("apt-get") is None or shutil.which("dpkg-deb") is None:
        raise CorpusUnavailable("apt-get and dpkg-deb are needed to fetch Debian corpora")
    spec = f"{corpus.package}={corpus.version}"
    result = _run(["apt-get", "download", spec], work)
    if result.returncode != 0 and os.geteuid() == 0:
        _run(["apt-get", "update"], work)  # the package lists may be missing or stale
        result = _run(["apt-get", "download", spec], work)
    debs = sorted(work.glob("*.deb"))
    if result.returncode != 0 or not debs:
        raise RuntimeError(f"apt-get download {spec} failed: {result.stderr.strip()[-500:]}")
    extracted = _run(["dpkg-deb", "-x", str(debs[0]), str(unpacked)], work)
    if extracted.returncode != 0:
        raise RuntimeError(f"dpkg-deb -x {debs[0].name} failed: {extracted.stderr.strip()}")


def _run(command: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(command, cwd=cwd, capture_output=True, text=True, timeout=600,
                          check=False)


STDLIB_QUESTIONS = Path(__file__).parent / "data" / "questions" / "stdlib.jsonl"
STDLIB_SKIP = ("test", "tests", "idle_test", "site-packages", "__pycache__")


def stdlib_question_subset(target: Path) -> Path:
    """A small standard-library copy: the modules that the standard-library question set
    (``tests/data/questions/stdlib.jsonl``) answers from, at their own relative paths, so
    every question of the set can be asked of it (about 3,700 units, where the whole copy
    has about 19,000). For the benchmarks that compare embedding tiers in minutes."""
    import json
    import sysconfig

    stdlib = Path(sysconfig.get_paths()["stdlib"])
    paths = sorted({answer["path"] for line in STDLIB_QUESTIONS.read_text("utf-8").splitlines()
                    if line.strip() for answer in json.loads(line)["answers"]})
    for path in paths:
        if any(part in STDLIB_SKIP for part in Path(path).parts):
            continue
        (target / path).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(stdlib / path, target / path)
    return target
