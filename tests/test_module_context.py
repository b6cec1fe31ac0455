"""The module context that scripts/bench_quality.py (``--corpus context``) measures for the
unit text: a file's module doc, its first sentence, and the texts built with them."""

from __future__ import annotations

import ast
import importlib.util
import sys
import sysconfig
from pathlib import Path
from types import ModuleType

import pytest

from codeseek.evaluate import without_doc
from codeseek.units import CodeUnit

SCRIPT = Path(__file__).resolve().parent.parent / "scripts" / "bench_quality.py"
STDLIB = Path(sysconfig.get_paths()["stdlib"])


@pytest.fixture(scope="module")
def bench() -> ModuleType:
    spec = importlib.util.spec_from_file_location("bench_quality_under_test", SCRIPT)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


def unit(path: str, doc: str = "", qualname: str = "hoist") -> CodeUnit:
    code = f'def {qualname}(load):\n    """{doc}"""\n    return load\n' if doc else \
        f"def {qualname}(load):\n    return load\n"
    start = code.index('"""') if doc else 0
    return CodeUnit(path=path, language="python", kind="function", name=qualname,
                    qualname=qualname, signature=f"def {qualname}(load):", doc=doc,
                    start_line=1, end_line=3, code=code,
                    doc_span=(start, code.index("\n", start)) if doc else None)


def test_python_module_sentence_follows_ast_on_the_standard_library(bench: ModuleType) -> None:
    # reference: Python's own ast.get_docstring on the real top-level modules of the
    # standard library; the sentence is the start of that docstring, at most 100 characters
    told = 0
    for path in sorted(STDLIB.glob("*.py")):
        try:
            expected = ast.get_docstring(ast.parse(path.read_bytes())) or ""
        except (SyntaxError, ValueError):
            continue
        sentence = bench.first_sentence(bench.module_doc(path))
        assert bool(sentence) == bool(expected.strip()), path.name
        assert len(sentence) <= bench.SUMMARY_CHARS
        assert " ".join(expected.split()).startswith(sentence), path.name
        told += bool(sentence)
    assert told > 100
    # shutil.py's docstring opens (checked in the file): "Utility functions for copying
    # and archiving files and directory trees."
    assert bench.first_sentence(bench.module_doc(STDLIB / "shutil.py")) == (
        "Utility functions for copying and archiving files and directory trees.")


def test_go_package_comment_is_the_comment_right_above_the_package_clause(
        bench: ModuleType, tmp_path: Path) -> None:
    # Go's doc convention (from memory): the package comment is the comment directly
    # before the package clause, with no blank line between; a licence header apart
    # from it by a blank line is not part of it
    lines = tmp_path / "lines.go"
    lines.write_text("// Copyright the harbour crew.\n\n// Package cranes lifts containers "
                     "off the quay. It keeps a log.\n// More detail.\npackage cranes\n")
    block = tmp_path / "block.go"
    block.write_text("/*\nPackage tides predicts the water level at each berth.\n*/\n"
                     "package tides\n")
    bare = tmp_path / "bare.go"
    bare.write_text("// Copyright the harbour crew.\n\npackage cranes\n\nfunc Lift() {}\n")
    assert bench.module_doc(lines) == (
        "Package cranes lifts containers off the quay. It keeps a log.\nMore detail.")
    assert bench.first_sentence(bench.module_doc(lines)) == (
        "Package cranes lifts containers off the quay.")
    assert bench.module_doc(block) == "Package tides predicts the water level at each berth."
    assert bench.module_doc(bare) == ""
    assert bench.module_doc(tmp_path / "missing.go") == ""
    ruby = tmp_path / "crane.rb"
    ruby.write_text("# Cranes of the quay.\nclass Crane\nend\n")
    assert bench.module_doc(ruby) == ""  # no convention for a file's doc there


def test_first_sentence_is_cut_at_a_word_boundary(bench: ModuleType) -> None:
    long = "Lift " + "heavy " * 40 + "crates. Then rest."
    cut = bench.first_sentence(long)
    assert len(cut) <= bench.SUMMARY_CHARS and long.startswith(cut) and cut.endswith("heavy")


def test_a_unit_whose_doc_holds_the_module_doc_is_not_told_it(bench: ModuleType) -> None:
    summary = "Lift containers off the quay."
    assert bench.module_context(unit("cranes.py", "Lift containers off the quay."),
                                summary) == ""
    assert bench.module_context(unit("cranes.py", "Lift containers off the quay.\n\nMore."),
                                summary) == ""
    assert bench.module_context(unit("cranes.py", "Lower a crate."), summary) == summary
    assert bench.module_context(unit("cranes.py"), summary) == summary


def test_context_texts_add_to_the_shipped_text(bench: ModuleType, tmp_path: Path) -> None:
    documented = unit("harbour/crane_yard.py", "Raise a load off the quay.")
    shipped = without_doc(documented).embed_text()
    head, rest = shipped.split("\n", 1)
    bare = without_doc(documented)
    assert bench.context_text(bare, "Cranes.", False, False) == shipped
    assert bench.context_text(bare, "Cranes.", True, False) == (
        f"{head} in harbour crane yard\n{rest}")
    assert bench.context_text(bare, "Cranes.", False, True) == f"{head}\nCranes.\n{rest}"
    assert bench.context_text(bare, "Cranes.", True, True) == (
        f"{head} in harbour crane yard\nCranes.\n{rest}")
    assert bench.context_text(bare, "", False, True) == shipped
    # what a real index embeds with it: the unit keeps its doc, the module sentence is read
    # from the file, and withheld where the unit's own doc holds it
    (tmp_path / "harbour").mkdir()
    (tmp_path / "harbour" / "crane_yard.py").write_text(
        '"""Cranes of the yard. They lift."""\n')
    text = bench.index_text(tmp_path, True, True)(documented)
    assert text == (f"{head} in harbour crane yard\nCranes of the yard.\n"
                    f"{documented.embed_text().split(chr(10), 1)[1]}")
    assert "Raise a load off the quay." in text
    echo = unit("harbour/crane_yard.py", "Cranes of the yard. They lift.")
    assert "\nCranes of the yard.\n" not in bench.index_text(tmp_path, False, True)(echo)
