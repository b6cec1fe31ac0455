"""Filter values as people type them: language names, unit words, file patterns.

Light (no numpy): the command line checks its options with these before it
talks to a daemon or loads an index, and :meth:`codeseek.search.Filters.validate`
applies the same checks to every caller of the library.

* A language name is matched without regard to case (``Python`` is ``python``).
* A unit is one of the stored kinds (``function``, ``method``, ``class``) or a
  word a language itself uses for what codeseek stores as a class (``struct``,
  ``trait``, ``interface``, ``enum``, ``module``, ...). Those words are read from
  the registry: the node types each language's query captures as ``@class``,
  where the node type's first word is a keyword of that language's grammar.
* A file pattern is a gitignore-style pattern; one that can match nothing (an
  unclosed ``[``, a lone ``!``, a trailing ``\\``, a comment) is refused.
  :func:`files_pattern` rewrites a pattern typed in a folder of the repository
  into one relative to the repository root, the way git reads a pathspec given
  in a subfolder.
"""

from __future__ import annotations

import os
import re
from functools import cache
from pathlib import Path

from codeseek.display import printable
from codeseek.errors import InvalidQuery
from codeseek.languages import LanguageSpec, all_specs, spec_by_name
from codeseek.units import KINDS

CLASS_KIND = "class"
_TOKEN = re.compile(r'"(?:\\.|[^"\\])*"|[()\[\]]|@[\w.]+|[^\s()\[\]"]+')
_GLOB_SPECIALS = re.compile(r"([\\*?\[])")


# -- languages and units ---------------------------------------------------------------


def language_name(word: str) -> str:
    """The registry name of a language, matched without regard to case."""
    return spec_by_name(word.lower()).name


@cache
def unit_words() -> dict[str, str]:
    """Every word ``--unit`` accepts, mapped to the stored kind it selects."""
    words = {kind: kind for kind in KINDS}
    for spec in all_specs():
        for word in sorted(_class_words(spec)):
            words.setdefault(word, CLASS_KIND)
    return words


def unit_kind(word: str) -> str:
    """The stored kind a unit word selects (case does not matter)."""
    kind = unit_words().get(word.lower())
    if kind is None:
        others = sorted(w for w, k in unit_words().items() if w not in KINDS)
        raise InvalidQuery(f"unknown unit '{printable(word)}'; choose one of: {', '.join(KINDS)}, "
                           f"or a language's own word for a class: {', '.join(others)}")
    return kind


def _class_words(spec: LanguageSpec) -> set[str]:
    """The first words of the node types a language's query captures as a class.

    A word counts only if the grammar has it as a keyword (``struct_item`` gives
    ``struct``; ``variable_declarator`` gives nothing). A node type that is a
    variant of another captured one (``abstract_class_declaration`` beside
    ``class_declaration``) adds no word of its own.
    """
    captured = _class_node_types(spec.query_source())
    language = spec.language()
    words: set[str] = set()
    for node_type in captured:
        first, _, rest = node_type.partition("_")
        if rest in captured:
            continue
        if language.id_for_node_kind(first, False) is not None:
            words.add(first)
    return words


def _class_node_types(query: str) -> set[str]:
    """Node types inside every pattern captured ``@class`` (its ``@name`` nodes left out)."""
    source = "\n".join(line for line in query.splitlines() if not line.lstrip().startswith(";"))
    tokens = _TOKEN.findall(source)
    open_nodes: list[tuple[int, str]] = []
    closed: list[tuple[int, int, str]] = []  # (first token, last token, node type)
    for at, token in enumerate(tokens):
        if token == "(":
            name = tokens[at + 1] if at + 1 < len(tokens) else ""
            open_nodes.append((at, name))
        elif token == ")" and open_nodes:
            start, name = open_nodes.pop()
            closed.append((start, at, name))
    captured: set[str] = set()
    for start, end, _ in closed:
        if end + 1 < len(tokens) and tokens[end + 1] == "@class":
            for inner_start, inner_end, name in closed:
                named = inner_end + 1 < len(tokens) and tokens[inner_end + 1] == "@name"
                if start <= inner_start and inner_end <= end and not named \
                        and re.fullmatch(r"[a-z][a-z0-9_]*", name):
                    captured.add(name)
    return captured


# -- file patterns ---------------------------------------------------------------------


def check_files_pattern(pattern: str) -> None:
    """Refuse a file pattern that can never match (with the reason)."""
    import pathspec

    reason = _pattern_problem(pattern)
    if reason is None:
        try:
            spec = pathspec.GitIgnoreSpec.from_lines([pattern])
        except (ValueError, TypeError) as exc:  # GitIgnorePatternError is a ValueError
            reason = str(exc)
        else:
            if not any(getattr(p, "regex", None) is not None for p in spec.patterns):
                reason = "it matches no path"
    if reason is not None:
        raise InvalidQuery(f"invalid file pattern '{printable(pattern)}': {reason}")


def _pattern_problem(pattern: str) -> str | None:
    body = pattern[1:] if pattern.startswith("!") else pattern
    if not pattern.strip():
        return "it is empty"
    if not body.strip():
        return "'!' needs a pattern after it"
    if pattern.startswith("#"):
        return r"a leading '#' makes it a comment; write '\#' for the character"
    if (len(body) - len(body.rstrip("\\"))) % 2:
        return r"a '\' at the end escapes nothing"
    if _unclosed_bracket(body):
        return "a '[' is never closed"
    return None


def _unclosed_bracket(pattern: str) -> bool:
    """Whether a ``[`` opens a character class that never ends (git's wildmatch rules)."""
    at = 0
    while at < len(pattern):
        char = pattern[at]
        if char == "\\":
            at += 2
            continue
        if char == "[":
            end = at + 1
            if end < len(pattern) and pattern[end] in "!^":
                end += 1
            if end < len(pattern) and pattern[end] == "]":
                end += 1  # a ']' first in the class is the character itself
            close = pattern.find("]", end)
            if close < 0:
                return True
            at = close + 1
            continue
        at += 1
    return False


def files_pattern(pattern: str, root: Path, cwd: Path) -> str:
    """A pattern typed in ``cwd`` as the same pattern relative to the repository ``root``.

    As git reads a pathspec given in a subfolder: a relative pattern applies
    within the folder you stand in (``billing/`` in ``python/kestrune`` means
    ``python/kestrune/**/billing/``); ``./x`` and ``../x`` start from it; an
    absolute path inside the repository names that place, and one outside it
    is refused, while a leading ``/`` that names no place on disk anchors the
    pattern at the folder you stand in, as in a ``.gitignore``. Standing outside
    the repository, a plain pattern is relative to the repository root (as
    before), while ``./x``, ``../x`` and absolute paths must still land inside
    it. ``root`` and ``cwd`` are absolute and resolved.
    """
    check_files_pattern(pattern)
    negate = "!" if pattern.startswith("!") else ""
    body = pattern[len(negate):]
    if os.path.isabs(body) and _names_a_place(body, root):
        rel = _inside(Path(os.path.normpath(body)), root, pattern)
        # the path is the user's own text: its glob characters stay glob characters
        return negate + _anchored(rel, "", body.endswith("/"))
    parts = body.split("/")
    leading = 0
    while leading < len(parts) and parts[leading] in (".", ".."):
        leading += 1
    if leading:
        folder = Path(os.path.normpath(cwd.joinpath(*parts[:leading])))
        rel = _inside(folder, root, pattern)
        rest = "/".join(parts[leading:])
        return negate + _anchored(_escape(rel), rest, False)
    base = _relative(cwd, root)
    if not base:
        return pattern
    stem = body.rstrip("/")
    anchored = "/" in stem
    joiner = "/" if anchored else "/**/"
    return f"{negate}/{_escape(base)}{joiner}{body.lstrip('/')}"


def _names_a_place(body: str, root: Path) -> bool:
    """Whether a pattern with a leading ``/`` is a path on disk (inside the repository, or
    under a top folder that exists) rather than a gitignore pattern anchored at its folder
    (``/python/``)."""
    path = Path(os.path.normpath(body))
    return _relative(path, root) is not None or os.path.lexists(Path(*path.parts[:2]))


def _anchored(folder: str, rest: str, trailing_slash: bool) -> str:
    """A root-anchored pattern for ``rest`` inside ``folder`` (both may be empty)."""
    if not folder and not rest:
        return "*"  # the whole repository
    if not rest:
        return f"/{folder}/" if trailing_slash else f"/{folder}"
    return f"/{folder}/{rest}" if folder else f"/{rest}"


def _relative(folder: Path, root: Path) -> str | None:
    """``folder`` relative to ``root`` in POSIX form ("" for the root), None if outside."""
    try:
        rel = folder.relative_to(root)
    except ValueError:
        return None
    return "" if rel == Path(".") else rel.as_posix()


def _inside(folder: Path, root: Path, pattern: str) -> str:
    rel = _relative(folder, root)
    if rel is None:
        raise InvalidQuery(f"file pattern '{printable(pattern)}' points outside the "
                           f"repository {root}")
    return rel


def _escape(text: str) -> str:
    """A literal folder name as gitignore-pattern text."""
    return _GLOB_SPECIALS.sub(r"\\\1", text)


# -- modification times ----------------------------------------------------------------

_AGE = re.compile(r"(\d+)([smhdw])")
_AGE_SECONDS = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 7 * 86400}
SINCE_FORMS = "an ISO date (2026-11-30), a date and time (2026-11-30T14:00) or an age " \
              "(90m, 12h, 3d, 2w)"


def since_time(text: str, now: float | None = None) -> float:
    """The time ``--since`` names, in seconds since 1970: an ISO 8601 date (local
    midnight), a date and time (local time unless it gives an offset), or an age
    counted back from ``now`` (``90m``, ``12h``, ``3d``, ``2w``; also ``s``)."""
    import datetime
    import time

    word = text.strip()
    age = _AGE.fullmatch(word.lower())
    if age:
        seconds = int(age.group(1)) * _AGE_SECONDS[age.group(2)]
        return (time.time() if now is None else now) - seconds
    try:
        moment = datetime.datetime.fromisoformat(word)  # a bare date is midnight
        return moment.timestamp()  # naive: local time, as the files' times are shown
    except (ValueError, OverflowError, OSError):
        raise InvalidQuery(f"--since wants {SINCE_FORMS}, not '{printable(text)}'") from None
