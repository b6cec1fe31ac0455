"""Units of a file or a tree, straight from the parser: no index, no model."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

from codeseek.config import load_settings
from codeseek.errors import RepositoryNotFound, UnsupportedLanguage
from codeseek.languages import language_names, spec_for_path
from codeseek.parse import parse_source
from codeseek.scan import SkipFile, content_reason, read_source, scan_repository
from codeseek.units import CodeUnit


def outline_path(path: Path) -> Iterator[CodeUnit]:
    """The units of one file, or of every indexable file under a folder."""
    if path.is_file():
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
        yield from parse_source(path.as_posix(), data, spec).units
        return
    if not path.is_dir():
        raise RepositoryNotFound(f"{path}: no such file or folder")
    settings = load_settings(path)
    for source in scan_repository(settings).files:
        try:
            data = read_source(source, settings.max_file_bytes)
        except SkipFile:
            continue
        yield from parse_source(source.path, data, source.spec).units
