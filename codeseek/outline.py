"""Units of a file or a tree, straight from the parser: no index, no model.

Paths are shown the way the caller named them: a file as given, the files of a
folder as that folder joined with their path inside it (``sample_repo/go`` ->
``sample_repo/go/dockd/packet.go``), so every line can be opened as printed.
A folder is read with the same rules as an index (ignore files, skipped
kinds of files); a file that is left out, including one whose parse runs past
the time budget, is reported to ``on_skip`` with its reason.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path, PurePosixPath

from codeseek.config import Settings, load_settings
from codeseek.errors import RepositoryNotFound, UnsupportedLanguage
from codeseek.languages import language_names, spec_for_path
from codeseek.parse import parse_source
from codeseek.scan import (
    REASON_IGNORED,
    REASON_INDEX,
    REASON_VANISHED,
    IgnoreRules,
    ScanResult,
    SkipFile,
    check_file,
    content_reason,
    entered,
    read_source,
    scan_repository,
)
from codeseek.units import CodeUnit

SkipCallback = Callable[[str, str], None]
"""Called as ``on_skip(path, reason)`` for each file of a folder that is left out."""


def outline_path(path: Path, on_skip: SkipCallback | None = None) -> Iterator[CodeUnit]:
    """The units of one file, or of every indexable file under a folder."""
    if path.is_file():
        yield from _outline_file(path)
        return
    if not path.is_dir():
        raise RepositoryNotFound(f"{path}: no such file or folder")
    settings = load_settings(path)
    scan = scan_repository(settings)
    for skipped_path, reason in scan.skipped_paths:
        if on_skip is not None:
            on_skip(_shown(path, skipped_path), reason)
    for source in scan.files:
        shown = _shown(path, source.path)
        try:
            data = read_source(source, settings.max_file_bytes)
            units = parse_source(shown, data, source.spec).units
        except SkipFile as skip:
            if on_skip is not None:
                on_skip(shown, str(skip.args[0]))
            continue
        yield from units


def outline_repository_file(settings: Settings, rel_path: str) -> list[CodeUnit]:
    """The units of one file of the repository (``rel_path``: relative to its root,
    ``/``-separated, already checked to lie inside it), read with the index's own
    rules: a file the index leaves out (ignored, in a vendored, cache or
    version-control folder, a secret, generated, binary, a symbolic link, in a
    linked folder, too large...) is refused with its reason, as ``status --skipped``
    gives it, and nothing of it is read."""
    try:
        return _outline_repository_file(settings, rel_path)
    except OSError as exc:  # a name too long for the file system, a loop of links...
        raise RepositoryNotFound(f"{rel_path}: cannot read: {exc.strerror or exc}") from exc


def _outline_repository_file(settings: Settings, rel_path: str) -> list[CodeUnit]:
    rules = IgnoreRules(settings.repo, settings.exclude)
    result = ScanResult()
    folder = rel_path.rsplit("/", 1)[0] if "/" in rel_path else ""
    if not entered(settings, rules, folder, result):
        reason = result.skipped_paths[0][1] if result.skipped_paths else REASON_INDEX
        raise UnsupportedLanguage(f"{rel_path}: left out: {reason}")
    absolute = settings.repo / rel_path
    if not absolute.is_symlink() and absolute.is_dir():
        raise RepositoryNotFound(f"{rel_path}: a folder, not a file")
    if rules.is_ignored(rel_path, is_dir=False):
        raise UnsupportedLanguage(f"{rel_path}: left out: {REASON_IGNORED}")
    source = check_file(settings, rel_path, str(absolute), result)
    if source is None:
        reason = result.skipped_paths[-1][1]
        if reason == REASON_VANISHED:
            raise RepositoryNotFound(f"{rel_path}: no such file")
        raise UnsupportedLanguage(f"{rel_path}: left out: {reason}")
    try:
        data = read_source(source, settings.max_file_bytes)
        return list(parse_source(rel_path, data, source.spec).units)
    except SkipFile as skip:
        if skip.args[0] == REASON_VANISHED:
            raise RepositoryNotFound(f"{rel_path}: no such file") from None
        raise UnsupportedLanguage(f"{rel_path}: left out: {skip.args[0]}") from None


def _outline_file(path: Path) -> Iterator[CodeUnit]:
    spec = spec_for_path(path.name)
    if spec is None:
        raise UnsupportedLanguage(
            f"{path}: no supported language for this file; codeseek reads "
            f"{', '.join(language_names())}"
        )
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise RepositoryNotFound(f"{path}: cannot read: {exc.strerror}") from exc
    reason = content_reason(data, len(data))
    if reason is not None:
        raise UnsupportedLanguage(f"{path}: left out: {reason}")
    try:
        units = parse_source(path.as_posix(), data, spec).units
    except SkipFile as skip:
        raise UnsupportedLanguage(f"{path}: left out: {skip.args[0]}") from None
    yield from units


def _shown(folder: Path, rel_path: str) -> str:
    """A path inside ``folder`` as the caller would write it (no leading ``./``)."""
    return str(PurePosixPath(folder.as_posix()) / rel_path).removeprefix("./")
