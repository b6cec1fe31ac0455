"""codeseek's Python units checked against Python's own ``ast`` module.

The reference throughout is the standard library's ``ast``: it lists every
``def``/``async def``/``class`` with its line span, and ``ast.get_docstring``
says what the docstring is. Qualified names and kinds are derived from the
ast scopes the way Python itself names them (PEP 3155's ``__qualname__``,
without the ``<locals>`` marker codeseek leaves out).
"""

from __future__ import annotations

import ast
import sysconfig
import textwrap
from dataclasses import dataclass
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from codeseek.languages import LanguageSpec, spec_for_path
from codeseek.parse import ParseResult, parse_source
from codeseek.units import KINDS, CodeUnit, lexical_codes

STDLIB = Path(sysconfig.get_paths()["stdlib"])

# A fixed, sorted list of standard-library modules of varied size and style:
# decorators, properties, nested classes, defs under if/try inside class bodies,
# async code, redefinitions and non-ASCII text.
STDLIB_MODULES = sorted([
    "abc.py",
    "argparse.py",
    "ast.py",
    "asyncio/base_events.py",
    "asyncio/tasks.py",
    "bisect.py",
    "calendar.py",
    "collections/__init__.py",
    "configparser.py",
    "contextlib.py",
    "csv.py",
    "dataclasses.py",
    "difflib.py",
    "email/message.py",
    "enum.py",
    "fractions.py",
    "functools.py",
    "gettext.py",
    "heapq.py",
    "http/client.py",
    "inspect.py",
    "ipaddress.py",
    "json/decoder.py",
    "json/encoder.py",
    "logging/__init__.py",
    "pathlib.py",
    "pprint.py",
    "queue.py",
    "selectors.py",
    "shlex.py",
    "shutil.py",
    "socket.py",
    "statistics.py",
    "string.py",
    "subprocess.py",
    "tarfile.py",
    "textwrap.py",
    "threading.py",
    "typing.py",
    "unittest/case.py",
    "urllib/parse.py",
    "xml/etree/ElementTree.py",
    "zipfile.py",
])

_DEFS = (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)
Definition = ast.FunctionDef | ast.AsyncFunctionDef | ast.ClassDef


@dataclass(frozen=True)
class RefUnit:
    """One definition as Python's ast describes it."""

    qualname: str
    name: str
    kind: str
    start_line: int
    end_line: int
    doc: str
    code: str
    ordinal: int


def python_spec() -> LanguageSpec:
    spec = spec_for_path("module.py")
    assert spec is not None and spec.name == "python"
    return spec


def parse(source: str | bytes, path: str = "module.py") -> ParseResult:
    data = source.encode("utf-8") if isinstance(source, str) else source
    return parse_source(path, data, python_spec())


def reference_units(source: bytes) -> list[RefUnit]:
    """Every definition in ``source`` per ``ast``, in source order."""
    # reference: Python's ast module (ast.parse, lineno/end_lineno, ast.get_docstring)
    tree = ast.parse(source)
    lines = source.splitlines(keepends=True)
    found: list[tuple[Definition, str, str]] = []
    _visit_scope(tree, [], in_class=False, out=found)
    found.sort(key=lambda item: (item[0].lineno, item[0].col_offset))
    seen: dict[str, int] = {}
    units: list[RefUnit] = []
    for node, qualname, kind in found:
        assert node.end_lineno is not None and node.end_col_offset is not None
        # ast gives byte columns; the code runs from the start of the def line
        # to ast's end of the definition
        code = b"".join(lines[node.lineno - 1 : node.end_lineno - 1])
        code += lines[node.end_lineno - 1][: node.end_col_offset]
        units.append(RefUnit(
            qualname=qualname, name=node.name, kind=kind, start_line=node.lineno,
            end_line=node.end_lineno, doc=ast.get_docstring(node) or "",
            code=code.decode("utf-8-sig"), ordinal=seen.get(qualname, 0),
        ))
        seen[qualname] = seen.get(qualname, 0) + 1
    return units


def _visit_scope(
    node: ast.AST, prefix: list[str], in_class: bool, out: list[tuple[Definition, str, str]]
) -> None:
    """Collect definitions under ``node``; ``prefix`` names the enclosing scopes.

    A def is a method when its innermost enclosing scope is a class, also when
    it sits under an ``if``/``try`` inside the class body (it still becomes a
    class attribute): the scope rule Python uses for ``__qualname__`` (PEP 3155).
    """
    for child in ast.iter_child_nodes(node):
        if isinstance(child, _DEFS):
            is_class = isinstance(child, ast.ClassDef)
            kind = "class" if is_class else ("method" if in_class else "function")
            out.append((child, ".".join([*prefix, child.name]), kind))
            _visit_scope(child, [*prefix, child.name], in_class=is_class, out=out)
        else:
            _visit_scope(child, prefix, in_class=in_class, out=out)


def as_reference(unit: CodeUnit) -> RefUnit:
    return RefUnit(
        qualname=unit.qualname, name=unit.name, kind=unit.kind, start_line=unit.start_line,
        end_line=unit.end_line, doc=unit.doc, code=unit.code, ordinal=unit.ordinal,
    )


def mismatches(expected: list[RefUnit], got: list[RefUnit]) -> list[str]:
    """Human-readable differences, keyed by (qualname, start line)."""
    problems: list[str] = []
    by_key = {(u.qualname, u.start_line): u for u in got}
    expected_keys = {(u.qualname, u.start_line) for u in expected}
    for ref in expected:
        unit = by_key.get((ref.qualname, ref.start_line))
        if unit is None:
            problems.append(f"missing {ref.kind} {ref.qualname} at line {ref.start_line}")
            continue
        for field_name in ("name", "kind", "end_line", "doc", "code", "ordinal"):
            want, have = getattr(ref, field_name), getattr(unit, field_name)
            if want != have:
                problems.append(
                    f"{ref.qualname} (line {ref.start_line}) {field_name}: "
                    f"ast says {want!r:.120}, codeseek says {have!r:.120}"
                )
    for unit in got:
        if (unit.qualname, unit.start_line) not in expected_keys:
            problems.append(f"extra {unit.kind} {unit.qualname} at line {unit.start_line}")
    return problems


def assert_agrees_with_ast(source: bytes, label: str) -> ParseResult:
    result = parse(source, label)
    expected = reference_units(source)
    problems = mismatches(expected, [as_reference(u) for u in result.units])
    assert not problems, (
        f"{label}: {len(problems)} disagreements with ast over {len(expected)} definitions, "
        "first ones:\n  " + "\n  ".join(problems[:8])
    )
    assert len(result.units) == len(expected)
    return result


# --- the standard library, module by module ---------------------------------------------


@pytest.mark.parametrize("module", STDLIB_MODULES)
def test_stdlib_module_agrees_with_ast(module: str) -> None:
    path = STDLIB / module
    if not path.is_file():
        pytest.skip(f"{module} is not in this Python's standard library")
    source = path.read_bytes()
    result = assert_agrees_with_ast(source, module)
    assert not result.has_errors  # reference: ast.parse accepts the module
    uids = [unit.uid for unit in result.units]
    assert len(uids) == len(set(uids)), "uids must be unique within a file"
    assert all(unit.path == module and unit.language == "python" for unit in result.units)


def test_stdlib_sample_is_large_enough() -> None:
    present = [m for m in STDLIB_MODULES if (STDLIB / m).is_file()]
    assert len(present) >= 30, f"only {len(present)} of the chosen modules exist here"


# --- small cases, each compared with ast ------------------------------------------------

SMALL_CASES: dict[str, str] = {
    "decorators": '''
        import functools

        @functools.lru_cache(maxsize=None)
        @staticmethod
        def cached(x):
            """Cached value."""
            return x

        class Shelf:
            @property
            def size(self):
                """How many."""
                return 3

            @size.setter
            def size(self, value):
                self._size = value
        ''',
    "async_def": '''
        async def fetch(url):
            """Fetch one page."""
            async with session(url) as reply:
                return await reply.text()

        class Client:
            async def close(self):
                """Close the connection."""
        ''',
    "nested_functions": '''
        def plan_route(stops):
            """Order the stops."""
            def score(stop):
                """Lower is better."""
                def weight(x):
                    return x * 2
                return weight(stop)
            return sorted(stops, key=score)
        ''',
    "method_in_nested_class": '''
        class Outer:
            """Outer doc."""
            class Inner:
                """Inner doc."""
                def run(self):
                    """Run it."""
                    return 1

            def helper(self):
                def local():
                    return 2
                return local()
        ''',
    "class_in_function": '''
        def factory():
            class Made:
                def method(self):
                    return 1
            return Made
        ''',
    "fstring_is_not_a_docstring": '''
        NAME = "x"

        def greet():
            f"""Hello {NAME}."""
            return NAME
        ''',
    "bytes_is_not_a_docstring": '''
        def raw():
            b"""Bytes, not a docstring."""
            return 0
        ''',
    "concatenated_docstring": '''
        def joined():
            "First part, " 'second part.'
            return 1

        def joined_lines():
            ("Across "
             "two lines.")
        ''',
    "comment_before_docstring": '''
        def commented():
            # a comment first
            """The docstring after a comment."""
            return 1
        ''',
    "class_without_docstring": '''
        class Plain:
            value = 1

            def get(self):
                return self.value
        ''',
    "string_after_statement_is_not_a_docstring": '''
        def late():
            x = 1
            """Not a docstring."""
            return x
        ''',
    "tuple_is_not_a_docstring": '''
        def pair():
            "a", "b"
        ''',
    "parenthesized_docstring": '''
        def wrapped():
            ("Wrapped in parentheses.")
        ''',
    "indented_docstring_is_cleaned": '''
        class Tidy:
            def method(self):
                """Summary line.

                    Indented detail.
                Back at the margin.
                """
        ''',
    "escapes_and_raw": r'''
        def escapes():
            "Tab\there, unicode \u00e9, octal \101."

        def raw_doc():
            r"""Raw \d+ stays."""
        ''',
    "one_line_bodies": '''
        def tiny(): "Tiny doc."
        class Tiny: pass
        def semi(): "Doc."; return 1
        ''',
    "defs_under_if_in_class": '''
        import sys

        class Portable:
            if sys.platform == "win32":
                def path(self):
                    return "a"
            else:
                def path(self):
                    return "b"
            try:
                def extra(self):
                    return 1
            except NameError:
                pass
        ''',
    "trailing_comment_not_in_span": '''
        def ends():
            return 1
            # trailing comment

        # between definitions
        def next_one():
            pass
        ''',
    "non_ascii": '''
        def größe(länge):
            """Gibt die Größe zurück — ünïcödé."""
            return länge
        ''',
}


@pytest.mark.parametrize("case", sorted(SMALL_CASES))
def test_small_case_agrees_with_ast(case: str) -> None:
    source = textwrap.dedent(SMALL_CASES[case]).lstrip("\n").encode("utf-8")
    assert_agrees_with_ast(source, f"{case}.py")


def units_of(source: str) -> dict[str, CodeUnit]:
    result = parse(textwrap.dedent(source).lstrip("\n"))
    assert not result.has_errors
    return {u.uid: u for u in result.units}


def test_decorator_line_is_not_the_start_line() -> None:
    units = units_of(SMALL_CASES["decorators"])
    cached = units["module.py::cached"]
    # reference: ast FunctionDef.lineno is the def line; the decorators come before it
    tree = ast.parse(textwrap.dedent(SMALL_CASES["decorators"]).lstrip("\n"))
    node = next(n for n in ast.walk(tree) if isinstance(n, ast.FunctionDef))
    assert cached.start_line == node.lineno
    assert min(d.lineno for d in node.decorator_list) < cached.start_line
    assert cached.code.startswith("def cached(x):")


def test_kinds_of_nested_definitions() -> None:
    units = units_of(SMALL_CASES["method_in_nested_class"])
    # reference: PEP 3155 qualified names (Outer.Inner.run) without "<locals>"
    assert units["module.py::Outer"].kind == "class"
    assert units["module.py::Outer.Inner"].kind == "class"
    assert units["module.py::Outer.Inner.run"].kind == "method"
    assert units["module.py::Outer.helper"].kind == "method"
    assert units["module.py::Outer.helper.local"].kind == "function"


def test_async_def_is_a_unit() -> None:
    units = units_of(SMALL_CASES["async_def"])
    # reference: ast.AsyncFunctionDef nodes for both definitions
    assert units["module.py::fetch"].kind == "function"
    assert units["module.py::fetch"].doc == "Fetch one page."
    assert units["module.py::Client.close"].kind == "method"


@pytest.mark.parametrize(("case", "uid"), [
    ("fstring_is_not_a_docstring", "module.py::greet"),
    ("bytes_is_not_a_docstring", "module.py::raw"),
    ("class_without_docstring", "module.py::Plain"),
    ("string_after_statement_is_not_a_docstring", "module.py::late"),
    ("tuple_is_not_a_docstring", "module.py::pair"),
])
def test_no_docstring(case: str, uid: str) -> None:
    source = textwrap.dedent(SMALL_CASES[case]).lstrip("\n")
    unit = units_of(SMALL_CASES[case])[uid]
    node = next(n for n in ast.walk(ast.parse(source)) if isinstance(n, _DEFS))
    assert ast.get_docstring(node) is None  # reference: ast.get_docstring
    assert unit.doc == ""
    assert unit.doc_span is None
    assert unit.code_without_doc == unit.code


def test_concatenated_and_commented_docstrings() -> None:
    joined = units_of(SMALL_CASES["concatenated_docstring"])
    commented = units_of(SMALL_CASES["comment_before_docstring"])
    # reference: ast.get_docstring joins adjacent literals (the parser concatenates them)
    assert joined["module.py::joined"].doc == "First part, second part."
    assert joined["module.py::joined_lines"].doc == "Across two lines."
    # reference: ast.get_docstring (comments are not statements)
    assert commented["module.py::commented"].doc == "The docstring after a comment."


def test_redefinition_gets_next_ordinal_and_distinct_uid() -> None:
    source = textwrap.dedent('''
        def area(w, h):
            return w * h

        def area(w, h):
            """Redefined: Python keeps the second."""
            return w * h

        class Box:
            def area(self):
                return 0
        ''').lstrip("\n")
    units = parse(source).units
    # reference: ast lists both FunctionDef nodes named "area" at module level
    tops = [u for u in units if u.qualname == "area"]
    assert [u.ordinal for u in tops] == [0, 1]
    assert [u.start_line for u in tops] == [
        n.lineno for n in ast.parse(source).body if isinstance(n, ast.FunctionDef)
    ]
    assert tops[0].uid != tops[1].uid
    assert tops[1].doc == "Redefined: Python keeps the second."
    assert len({u.uid for u in units}) == len(units) == 4


def test_code_without_doc_removes_only_the_docstring() -> None:
    source = textwrap.dedent('''
        class Meter:
            def read(self, channel):
                """Read one channel.

                Args:
                    channel: which one.
                """
                value = self.raw[channel]
                return value * 2
        ''').lstrip("\n")
    unit = units_of(source)["module.py::Meter.read"]
    stripped = textwrap.dedent(unit.code_without_doc)
    original = textwrap.dedent(unit.code)
    # reference: ast; the stripped code parses, has no docstring, and keeps the
    # rest of the body statement for statement
    stripped_def = ast.parse(stripped).body[0]
    original_def = ast.parse(original).body[0]
    assert isinstance(stripped_def, ast.FunctionDef)
    assert isinstance(original_def, ast.FunctionDef)
    assert ast.get_docstring(stripped_def) is None
    assert ast.get_docstring(original_def) == unit.doc
    assert [ast.dump(s) for s in stripped_def.body] == [
        ast.dump(s) for s in original_def.body[1:]
    ]
    # reference: ast; exactly the docstring statement's lines are gone
    doc_statement = original_def.body[0]
    assert doc_statement.end_lineno is not None
    doc_lines = doc_statement.end_lineno - doc_statement.lineno + 1
    assert len(original.splitlines()) - len(stripped.splitlines()) == doc_lines
    assert "Read one channel" not in unit.code_without_doc


@pytest.mark.parametrize(("doc", "summary"), [
    ("Convert the reading.\n\nArgs:\n    x: the input.", "Convert the reading."),
    ("Convert the reading.\nArgs:\n    x: the input.", "Convert the reading."),
    ("Convert the reading\nacross two lines.\n\nMore detail.",
     "Convert the reading across two lines."),
    ("Convert.\n\nReturns:\n    the result.", "Convert."),
    ("Convert.\n:param x: the input.", "Convert."),
])
def test_doc_summary_stops_at_sections(doc: str, summary: str) -> None:
    source = f'def convert(x):\n    """{doc}"""\n    return x\n'
    unit = parse(source).units[0]
    # reference: ast.get_docstring gives the doc
    node = ast.parse(source).body[0]
    assert isinstance(node, ast.FunctionDef)
    assert unit.doc == ast.get_docstring(node)
    # common practice: PEP 257 summary paragraph; Google-style "Args:"/"Returns:"
    # sections and reST ":param" fields are not part of it
    assert unit.doc_summary == summary


def test_carriage_return_line_endings() -> None:
    body = 'class Old:\n    """Classic line ends."""\n    def get(self):\n        return 1\n'
    for newline in ("\r\n", "\r"):
        source = body.replace("\n", newline).encode("utf-8")
        # reference: ast (Python reads \r\n and a lone \r as line ends)
        expected = reference_units(source)
        got = parse(source).units
        assert [(u.qualname, u.start_line, u.end_line, u.doc) for u in got] == [
            (r.qualname, r.start_line, r.end_line, r.doc) for r in expected
        ], repr(newline)


def test_byte_order_mark_is_not_part_of_the_code() -> None:
    source = b"\xef\xbb\xbf" + b'def first():\n    """Doc."""\n    return 1\n'
    # reference: ast (Python drops a UTF-8 byte-order mark before parsing)
    assert_agrees_with_ast(source, "bom.py")
    assert not parse(source).units[0].code.startswith("\ufeff")


def test_invalid_escape_parses_quietly(recwarn: pytest.WarningsRecorder) -> None:
    source = 'def pattern():\n    """Match \\d+ digits."""\n'
    unit = parse(source).units[0]
    assert unit.doc == "Match \\d+ digits."  # reference: Python keeps an unknown escape as is
    assert not [w for w in recwarn if issubclass(w.category, (DeprecationWarning, SyntaxWarning))]


# --- syntax errors ----------------------------------------------------------------------

VALID_THREE = '''
def before(a):
    """Before the damage."""
    return a

def damaged(b):
    return b

class After:
    """After the damage."""
    def method(self):
        return 3
'''.lstrip("\n")


def test_syntax_error_keeps_recovered_units() -> None:
    broken = VALID_THREE.replace("def damaged(b):", "def damaged(b:")
    with pytest.raises(SyntaxError):
        ast.parse(broken)  # reference: Python rejects the file
    result = parse(broken)
    assert result.has_errors
    # reference: ast of the intact file; the untouched definitions keep their places
    intact = {r.qualname: r for r in reference_units(VALID_THREE.encode())}
    got = {u.qualname: u for u in result.units}
    for name in ("before", "After", "After.method"):
        assert name in got, f"{name} not recovered; got {sorted(got)}"
        ref = intact[name]
        assert (got[name].start_line, got[name].end_line, got[name].doc) == (
            ref.start_line, ref.end_line, ref.doc)


def test_valid_file_has_no_errors() -> None:
    ast.parse(VALID_THREE)  # reference: Python accepts it
    assert not parse(VALID_THREE).has_errors


# --- properties: never raises, lines always in range -------------------------------------


def check_well_formed(source: bytes) -> None:
    result = parse(source)
    # reference: Python's universal newlines (\n, \r\n, \r), as bytes.splitlines counts them
    line_count = len(source.splitlines())
    for unit in result.units:
        assert 1 <= unit.start_line <= unit.end_line <= line_count, (unit, line_count)
        assert unit.kind in KINDS
        assert unit.qualname.endswith(unit.name)
        if unit.doc_span is not None:
            start, end = unit.doc_span
            assert 0 <= start <= end <= len(unit.code)


_PY_ALPHABET = st.sampled_from(list("defclasync():'\"\\#@ \t\n\rxyz_=.,[]{}fbr0123") + [
    "def ", "class ", "async def ", "    ", '"""', "'''", "\n    ", "é", "\x00", "\ufeff"])


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.one_of(st.text(), st.lists(_PY_ALPHABET, max_size=60).map("".join)))
def test_arbitrary_text_never_raises(text: str) -> None:
    check_well_formed(text.encode("utf-8", "surrogatepass"))


@settings(max_examples=60, deadline=None)
@given(st.binary(max_size=400))
def test_arbitrary_bytes_never_raise(data: bytes) -> None:
    check_well_formed(data)


_TRUNCATED = STDLIB / "textwrap.py"


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_truncated_stdlib_file_never_raises(data: st.DataObject) -> None:
    if not _TRUNCATED.is_file():
        pytest.skip("textwrap.py missing from this standard library")
    source = _TRUNCATED.read_bytes()
    start = data.draw(st.integers(0, len(source)), label="start")
    end = data.draw(st.integers(start, len(source)), label="end")
    check_well_formed(source[:end])
    check_well_formed(source[start:end])


# --- the lexical entry: inner units folded to their signatures ---------------------------


@pytest.mark.parametrize("module", ["textwrap.py", "json/decoder.py", "queue.py", "calendar.py"])
def test_lexical_code_folds_direct_members_as_ast_sees_them(module: str) -> None:
    """Reference: Python's ``ast`` on real standard-library code. A class's lexical
    code keeps each method's ``def`` line but none of the lines inside its body."""
    path = STDLIB / module
    if not path.is_file():
        pytest.skip(f"{module} is not in this Python's standard library")
    source = path.read_bytes()
    result = parse(source, module)
    codes = dict(zip((u.qualname for u in result.units), lexical_codes(result.units),
                     strict=True))
    lines = source.decode("utf-8").splitlines()
    counts: dict[str, int] = {}
    for line in lines:
        counts[line.strip()] = counts.get(line.strip(), 0) + 1
    checked = 0
    for node in ast.walk(ast.parse(source)):
        if not isinstance(node, ast.ClassDef) or node.name not in codes:
            continue  # nested classes are named by their path; top-level ones suffice
        folded = codes[node.name]
        for member in node.body:
            if not isinstance(member, ast.FunctionDef | ast.AsyncFunctionDef):
                continue
            assert f"def {member.name}(" in folded
            first_body_line = member.body[0].lineno
            assert member.end_lineno is not None
            for number in range(first_body_line, member.end_lineno + 1):
                text = lines[number - 1].strip()
                if len(text) > 8 and counts[text] == 1:  # a line found once in the file
                    assert text not in folded, (module, node.name, number)
                    checked += 1
    assert checked > 20


def test_lexical_code_folds_each_level_once() -> None:
    source = textwrap.dedent('''\
        class Depot:
            """Where vans park overnight."""

            capacity = 12

            def park(self, van):
                """Park one van."""
                def slot_for(van):
                    return hash(van.plate) % self.capacity
                return slot_for(van) + 1
        ''').encode()
    units = {u.qualname: u for u in parse(source, "depot.py").units}
    codes = dict(zip(units, lexical_codes(list(units.values())), strict=True))

    def lines(text: str) -> list[str]:  # indentation does not matter to keyword matching
        return [line.strip() for line in text.splitlines() if line.strip()]

    assert lines(codes["Depot"]) == ["class Depot:", "capacity = 12", "def park(self, van):"]
    assert lines(codes["Depot.park"]) == ["def park(self, van):", "def slot_for(van):",
                                          "return slot_for(van) + 1"]
    assert codes["Depot.park.slot_for"] == units["Depot.park.slot_for"].code
