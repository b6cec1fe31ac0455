"""Terminal-safe text: repository content is shown, never obeyed by the terminal."""

from __future__ import annotations

import os

from codeseek.display import printable, printable_block


def test_escape_sequences_are_shown_not_sent() -> None:
    title_then_clear = "\x1b]0;owned\x07\x1b[2J"
    assert printable(title_then_clear) == "\\x1b]0;owned\\x07\\x1b[2J"
    assert "\x1b" not in printable_block(f"def f():\n    '''{title_then_clear}'''\n")


def test_one_line_keeps_a_name_with_a_newline_on_one_line() -> None:
    assert printable("dock\nstation.py") == "dock\\nstation.py"
    assert printable("a\tb\rc") == "a\\tb\\rc"


def test_a_block_keeps_its_lines_and_tabs() -> None:
    assert printable_block("if x:\r\n\treturn 1\n") == "if x:\n\treturn 1\n"
    assert printable_block("a\rb") == "a\\rb"


def test_c1_controls_and_direction_overrides_are_escaped() -> None:
    # U+202E RIGHT-TO-LEFT OVERRIDE and U+2066 LEFT-TO-RIGHT ISOLATE: UAX #9's explicit
    # directional formatting characters; U+009B is the one-byte CSI of ECMA-48.
    assert printable("a\u202eb\u2066c\x9b") == "a\\u202eb\\u2066c\\x9b"


def test_undecodable_bytes_of_a_file_name_show_as_bytes() -> None:
    # os.fsdecode keeps bytes that are not UTF-8 as lone surrogates (PEP 383)
    name = os.fsdecode(b"tarif\xe9.py")
    assert printable(name) == "tarif\\xe9.py"


def test_ordinary_text_is_unchanged() -> None:
    text = "Prix du trajet: 1,50 € — ライド"
    assert printable(text) == text
    assert printable_block(text) == text
