"""Every grammar against hostile input: garbage, truncated real files, deep nesting, slow parses.

Nothing here may crash or hang: a parse either yields units whose lines lie in
the file, or is abandoned at the per-file time budget with
:class:`~codeseek.parse.ParseBudgetExceeded` (counted as a skipped file). The
truncated files are real registry code (``tests/corpora.py``, each corpus
named there); hypothesis makes the garbage.
"""

from __future__ import annotations

import itertools
import os
import re
from collections.abc import Callable
from pathlib import Path

import pytest
from corpora import CORPORA, CorpusUnavailable, files
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from codeseek.languages import LanguageSpec, all_specs, spec_by_name
from codeseek.outline import outline_path
from codeseek.parse import MAX_NESTING, ParseBudgetExceeded, ParseResult, parse_source
from codeseek.scan import REASON_PARSE_BUDGET, SkipFile

SPECS = {spec.name: spec for spec in all_specs()}
DEPTH = 10_000


def parse_or_skip(source: bytes, spec: LanguageSpec) -> ParseResult | None:
    """The result, or None when the budget ran out (the only allowed failure)."""
    try:
        return parse_source(f"input{spec.extensions[0]}", source, spec)
    except ParseBudgetExceeded as skip:
        assert skip.args[0] == REASON_PARSE_BUDGET
        return None


def assert_sane(result: ParseResult | None, source: bytes, spec: LanguageSpec) -> None:
    if result is None:
        return
    if spec.cr_newlines:
        # where a lone carriage return ends a line (Python's lexical rules: CR, LF or CRLF
        # terminate a physical line), lines are counted and code is found as the
        # language reads the file; elsewhere a lone CR is whitespace inside a line
        source = re.sub(rb"\r(?!\n)", b"\n", source)
    lines = source.count(b"\n") + 1
    text = source.decode("utf-8", "replace")
    for unit in result.units:
        assert 1 <= unit.start_line <= unit.end_line <= lines
        assert unit.name and unit.qualname.endswith(unit.name)
        assert unit.kind in ("function", "method", "class")
        assert unit.code.strip() in text or "\ufffd" in unit.code


# -- garbage ---------------------------------------------------------------------------------

_TOKENS = st.sampled_from(["(", ")", "{", "}", "[", "]", "<", ">", ";", ",", ".", "::", "=>",
                           "/**", "*/", "//", "///", "#", "\"", "'", "`", "\n", " ", "\t",
                           "def", "end", "fn", "func", "class", "function", "impl", "struct",
                           "template", "namespace", "return", "@", "x", "Dock", "é", "\r"])


@pytest.mark.parametrize("language", sorted(SPECS))
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.binary(max_size=3000))
def test_random_bytes_never_crash(language: str, data: bytes) -> None:
    assert_sane(parse_or_skip(data, SPECS[language]), data, SPECS[language])


@pytest.mark.parametrize("language", sorted(SPECS))
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tokens=st.lists(_TOKENS, max_size=400))
@example(tokens=["fn x() {", "\r", "}"])  # a lone CR: a line end in Python, whitespace in Rust
@example(tokens=["def", " ", "x", "(", ")", ":", "\r", " ", "x", "\r"])
def test_token_soup_never_crashes(language: str, tokens: list[str]) -> None:
    data = "".join(tokens).encode("utf-8")
    assert_sane(parse_or_skip(data, SPECS[language]), data, SPECS[language])


# -- truncated real files --------------------------------------------------------------------


def real_files(language: str, count: int) -> list[Path]:
    corpus = CORPORA[language]  # Python: test_parse_python.py truncates stdlib modules
    try:
        found = files(corpus)
    except CorpusUnavailable as exc:
        if os.environ.get("CI"):
            pytest.fail(f"{corpus.label}: {exc}")
        pytest.skip(f"{corpus.label}: {exc}")
    return sorted(found, key=lambda p: p.stat().st_size, reverse=True)[:count]


@pytest.mark.parametrize("language", sorted(CORPORA))
def test_truncated_real_files_never_crash(language: str) -> None:
    spec = spec_by_name(language)
    for path in real_files(language, 3):
        data = path.read_bytes()
        cuts = {len(data) * share // 9 for share in range(1, 9)}
        cuts |= {cut + 1 for cut in cuts}  # often the middle of a UTF-8 sequence or token
        for cut in sorted(cuts):
            truncated = data[:cut]
            assert_sane(parse_or_skip(truncated, spec), truncated, spec)


# -- deep nesting ----------------------------------------------------------------------------


def brackets(opening: str, closing: str) -> bytes:
    return (opening * DEPTH + closing * DEPTH).encode()


# One deeply nested definition per language: every level is a unit candidate.
NESTED: dict[str, Callable[[], bytes]] = {
    "python": lambda: brackets("f(", ")"),
    "javascript": lambda: brackets("function f() {", "}"),
    "typescript": lambda: brackets("namespace N {", "}"),
    "tsx": lambda: brackets("<a>", "</a>"),
    "go": lambda: b"package p\nfunc f() {" + brackets("func() {", "}()") + b"}",
    "rust": lambda: brackets("fn f() {", "}"),
    "java": lambda: brackets("class A {", "}"),
    "c": lambda: b"int f(void) " + brackets("{", "}"),
    "cpp": lambda: brackets("namespace n {", "}"),
    "ruby": lambda: brackets("def f\n", "end\n"),
}


@pytest.mark.parametrize(("language", "shape"),
                         list(itertools.product(sorted(SPECS), ["()", "[]", "{}", "nested"])))
def test_ten_thousand_nested_brackets(language: str, shape: str) -> None:
    data = NESTED[language]() if shape == "nested" else brackets(shape[0], shape[1])
    result = parse_or_skip(data, SPECS[language])
    assert_sane(result, data, SPECS[language])
    if result is not None:
        # deeper definitions stay inside their ancestor: the unit list stays small
        assert len(result.units) <= MAX_NESTING


def test_nested_definitions_are_cut_at_max_nesting() -> None:
    result = parse_source("deep.js", brackets("function f() {", "}"), spec_by_name("javascript"))
    assert len(result.units) == MAX_NESTING
    assert result.units[-1].qualname == ".".join(["f"] * MAX_NESTING)


# -- the per-file time budget ----------------------------------------------------------------


class SteppingClock:
    """A clock that moves one second each time it is read (no real time involved)."""

    def __init__(self) -> None:
        self.reads = 0

    def __call__(self) -> float:
        self.reads += 1
        return float(self.reads)


def big_source() -> bytes:
    # a long real-looking file: enough work for tree-sitter to report progress often
    body = "".join(f"function step{i}(a) {{ return a + {i}; }}\n" for i in range(3000))
    return body.encode()


def test_a_parse_past_its_budget_is_abandoned_mid_parse() -> None:
    spec = spec_by_name("javascript")
    clock = SteppingClock()
    with pytest.raises(ParseBudgetExceeded) as raised:
        parse_source("slow.js", big_source(), spec, budget=10.0, clock=clock)
    assert isinstance(raised.value, SkipFile)
    assert raised.value.args[0] == REASON_PARSE_BUDGET
    # one read to set the deadline, ten within budget, the eleventh stops tree-sitter:
    # the parse was halted from its progress callback, not run to the end
    assert clock.reads == 12


def test_the_parser_is_reusable_after_an_abandoned_parse() -> None:
    spec = spec_by_name("javascript")
    with pytest.raises(ParseBudgetExceeded):
        parse_source("slow.js", big_source(), spec, budget=3.0, clock=SteppingClock())
    result = parse_source("small.js", b"function ok() {}\n", spec)
    assert [u.qualname for u in result.units] == ["ok"]


def test_within_budget_the_clock_changes_nothing() -> None:
    spec = spec_by_name("javascript")
    patient = parse_source("a.js", big_source(), spec, budget=1e12, clock=SteppingClock())
    default = parse_source("a.js", big_source(), spec)
    assert [u.qualname for u in patient.units] == [u.qualname for u in default.units]
    assert len(default.units) == 3000


def test_outline_counts_a_file_over_budget(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.parse

    (tmp_path / "slow.js").write_text("function slow() {}\n", encoding="utf-8")
    monkeypatch.setattr(codeseek.parse, "PARSE_BUDGET_SECONDS", -1.0)
    skipped: list[tuple[str, str]] = []
    units = list(outline_path(tmp_path, on_skip=lambda path, reason: skipped.append((path,
                                                                                      reason))))
    assert units == []
    assert skipped == [(f"{tmp_path.as_posix()}/slow.js", REASON_PARSE_BUDGET)]
