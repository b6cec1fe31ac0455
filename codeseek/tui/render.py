"""What the panels show, as rich renderables built from search hits: no widgets here.

Every function is pure (apart from :class:`SourceCache` reading files), so the
look of a hit, the reader's header, the lines that matched and the index line
can be tested without running the app. Repository text (names, paths, docs,
code) passes through :mod:`codeseek.display` on its way to the screen, so a
control character in it is shown escaped, never obeyed.
"""

from __future__ import annotations

import os
import re
import time
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING

from rich.console import Console, ConsoleOptions, Group, RenderableType, RenderResult
from rich.measure import Measurement
from rich.segment import Segment
from rich.style import Style
from rich.syntax import Syntax
from rich.text import Text
from textual.content import Content

from codeseek.config import DEFAULT_MAX_FILE_BYTES
from codeseek.display import printable, printable_block
from codeseek.errors import FileRefused
from codeseek.languages import spec_for_path
from codeseek.safefs import read_regular_file
from codeseek.search import STOPWORDS, SearchHit
from codeseek.service import describe_refinement
from codeseek.tui.theme import CodeLook, code_look
from codeseek.units import split_identifier

if TYPE_CHECKING:
    from codeseek.api import IndexStatus

BAR_CELLS = 5
PREVIEW_MAX_LINES = 400
_WORD = re.compile(r"[A-Za-z0-9_]+")
_SCOPE_SPLIT = re.compile(r"\.|::")


# -- the hit list ----------------------------------------------------------------------


def score_bar(fraction: float, cells: int = BAR_CELLS) -> str:
    """A bar of filled and empty cells, readable without colour."""
    fraction = max(0.0, min(1.0, fraction))
    filled = round(fraction * cells)
    if fraction > 0 and filled == 0:
        filled = 1
    return "▰" * filled + "▱" * (cells - filled)


def score_cells(hit: SearchHit) -> str:
    """The hit's meaning match as a bar (its cosine), or ``words`` for a keyword-only match."""
    if hit.similarity is None:
        return "words"
    return score_bar(hit.similarity)


def first_doc_line(hit: SearchHit) -> str:
    """The doc's first sentence (or what fits of it)."""
    return printable(hit.doc_summary.split(". ")[0].strip())


def hit_prompt(hit: SearchHit) -> Content:
    """Two lines for one hit: bar, name, kind and language; then place and first doc line."""
    doc = first_doc_line(hit)
    return Content.assemble(
        (score_cells(hit), "$cs-bar"), " ",
        (printable(hit.qualname), "$cs-name bold"),
        (f"  {hit.kind} · {hit.language}", "$cs-meta"), "\n",
        "  ", (repo_tag(hit), "$cs-meta"),
        (f"{printable(hit.path)}:{hit.start_line}", "$cs-place"),
        (f"  {doc}" if doc else "", "$cs-doc italic"),
    )


def repo_tag(hit: SearchHit) -> str:
    """``[folder] `` naming the repository a hit of a search across several comes from
    (empty for a hit of one repository's search)."""
    return "" if hit.repo is None else f"[{printable(repo_label(hit.repo))}] "


# -- the reader ------------------------------------------------------------------------


def scope_chain(hit: SearchHit) -> list[str]:
    """Where the unit sits: folders, the file, then the enclosing classes and functions."""
    folders = [printable(part) for part in hit.path.split("/") if part]
    scopes = [printable(part) for part in _SCOPE_SPLIT.split(hit.qualname) if part][:-1]
    return folders + scopes


def reader_header(hit: SearchHit) -> Content:
    """The reader's header: name, kind, place, scope chain and doc."""
    return Content.assemble(
        (printable(hit.qualname), "$cs-name bold"),
        (f"  {hit.kind} · {hit.language}", "$cs-meta"), "\n",
        (repo_tag(hit), "$cs-meta"),
        (f"{printable(hit.path)}:{hit.start_line}-{hit.end_line}", "$cs-place"), "\n",
        ("in ", "$cs-meta"), (" › ".join(scope_chain(hit)), "$cs-scope"),
        ("\n" + printable_block(hit.doc_summary) if hit.doc_summary else "",
         "$cs-doc italic"),
    )


def _stem(word: str) -> str:
    return word[:5] if len(word) > 5 else word


def _words(text: str) -> set[str]:
    words: set[str] = set()
    for token in _WORD.findall(text):
        words.add(token.lower())
        words.update(split_identifier(token))
    return {_stem(w) for w in words if len(w) > 1 and w not in STOPWORDS}


def matching_lines(code: str, first_line: int, query: str) -> set[int]:
    """Line numbers of ``code`` (numbered from ``first_line``) sharing a word with the query."""
    wanted = _words(query)
    if not wanted:
        return set()
    return {first_line + offset for offset, line in enumerate(code.splitlines())
            if _words(line) & wanted}


@dataclass(frozen=True)
class UnitSource:
    """The code the reader shows for a hit."""

    code: str
    first_line: int
    note: str = ""


def repository_file(repo: Path, stored: str) -> Path | None:
    """The file a hit's stored path names, or None when it is not one of the repository's.

    A stored path comes from the index, which a cloned repository may have planted:
    an absolute path, a ``..`` part, or a link leading out of the repository is
    refused (the file must resolve inside the repository root).
    """
    relative = PurePosixPath(stored)
    if not stored or relative.is_absolute() or ".." in relative.parts or "\0" in stored:
        return None
    path = repo / relative
    try:
        inside = path.resolve().is_relative_to(repo.resolve())
    except (OSError, RuntimeError, ValueError):
        return None
    return path if inside else None


class SourceCache:
    """Reads units' code from the repository's files, keeping recently read files.

    Only a regular file inside the repository (:func:`repository_file`), opened
    without following a link or blocking on a FIFO, of at most ``max_bytes`` (the
    indexer's limit) is read; anything else shows the indexed first lines.
    """

    def __init__(self, repo: Path | None, keep: int = 32,
                 max_bytes: int = DEFAULT_MAX_FILE_BYTES) -> None:
        self.repo = repo
        self.keep = keep
        self.max_bytes = max_bytes
        self._files: dict[str, tuple[int, list[str]]] = {}

    def _lines(self, path: Path, cr_newlines: bool) -> list[str] | None:
        try:
            stamp = os.lstat(path).st_mtime_ns
        except OSError:
            return None
        key = f"{path}\0{cr_newlines}"
        cached = self._files.get(key)
        if cached is not None and cached[0] == stamp:
            return cached[1]
        try:
            text = read_regular_file(path, self.max_bytes).decode("utf-8", errors="replace")
        except (OSError, FileRefused):
            return None
        # lines end where the parser ends them: at "\n" (and at a lone "\r" in a language
        # where it ends a line); str.splitlines would also break at form feeds, "\x1c" to
        # "\x1e", "\x85" and "\u2028", and the reader would show the wrong lines
        text = text.replace("\r\n", "\n")
        if cr_newlines:
            text = text.replace("\r", "\n")
        lines = text.split("\n")
        if lines[-1] == "":
            lines.pop()
        if len(self._files) >= self.keep:
            self._files.pop(next(iter(self._files)))
        self._files[key] = (stamp, lines)
        return lines

    def unit(self, hit: SearchHit) -> UnitSource:
        """The unit's lines from its file; the indexed first lines if the file changed."""
        spec = spec_for_path(hit.path)
        cr_newlines = spec is not None and spec.cr_newlines
        root = self.repo if hit.repo is None else Path(hit.repo)  # several: the hit's own
        path = repository_file(root, hit.path) if root is not None else None
        lines = self._lines(path, cr_newlines) if path is not None else None
        if lines is None or hit.end_line > len(lines) or hit.start_line < 1:
            return UnitSource(hit.snippet, hit.start_line,
                              "the file changed or is gone; showing the indexed first lines")
        end = min(hit.end_line, hit.start_line + PREVIEW_MAX_LINES - 1)
        note = ""
        if end < hit.end_line:
            note = f"{hit.end_line - end} more lines; open it to read on"
        return UnitSource("\n".join(lines[hit.start_line - 1 : end]), hit.start_line, note)


ROW_MARK = "❱ "
"""What rich's Syntax draws before a highlighted line."""


class MarkedCode:
    """A Syntax whose row marker is drawn in the given style (rich draws it red)."""

    def __init__(self, syntax: Syntax, mark: Style) -> None:
        self.syntax = syntax
        self.mark = mark

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        for segment in console.render(self.syntax, options):
            if segment.text == ROW_MARK and not segment.control:
                yield Segment(ROW_MARK, self.mark)
            else:
                yield segment

    def __rich_measure__(self, console: Console, options: ConsoleOptions) -> Measurement:
        return Measurement.get(console, options, self.syntax)


def reader_code(hit: SearchHit, source: UnitSource, query: str,
                look: CodeLook | None = None) -> RenderableType:
    """Highlighted code with line numbers; lines sharing a word with the query are marked.

    Control characters in the code are shown escaped (tabs and newlines kept), so the
    line numbers stay those of the file. ``look``: default codeseek's dark style."""
    look = look if look is not None else code_look(dark=True, no_color=False)
    code = printable_block(source.code)
    syntax = Syntax(
        code, Syntax.guess_lexer(hit.path, code), theme=look.syntax,
        line_numbers=True, start_line=source.first_line,
        highlight_lines=matching_lines(code, source.first_line, query),
        word_wrap=False, background_color="default",
    )
    marked = MarkedCode(syntax, look.mark)
    if not source.note:
        return marked
    return Group(marked, Text(f"… {printable(source.note)}", style="italic"))


# -- the index line ------------------------------------------------------------------


def when(timestamp: float | None, now: float | None = None) -> str:
    """A short local time: the clock for today, else the date."""
    if timestamp is None:
        return "never"
    moment = time.localtime(timestamp)
    today = time.localtime(now if now is not None else time.time())
    if moment[:3] == today[:3]:
        return time.strftime("%H:%M", moment)
    return time.strftime("%Y-%m-%d", moment)


def index_summary(status: IndexStatus, service: str) -> str:
    """The index line when idle: repository, counts, freshness and the service state."""
    line = (f"{printable(repo_label(status.repo))} · {status.units:,} units · "
            f"{status.files:,} files · updated {when(status.updated_at)} · {service}")
    if status.refinement is not None:  # codeseek/refine.py
        line += f" · refining {describe_refinement(status.refinement)}"
    return line


def repo_label(repo: str | os.PathLike[str]) -> str:
    """The repository as shown in the title: its folder name."""
    return Path(repo).name or str(repo)
