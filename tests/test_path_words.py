"""The words of a unit's path on the keyword side (``units.path_words``, ``PATH_WORDS_IN``)."""

from __future__ import annotations

import re
import sysconfig
from pathlib import Path, PurePosixPath

from codeseek.units import PATH_WORDS_IN, CodeUnit, path_words


def test_path_words_split_folders_and_file_name() -> None:
    assert path_words("email/_header_value_parser.py") == "email header value parser"
    assert path_words("src/HTTPServer.java") == "src http server"
    assert path_words("Makefile") == "makefile"
    assert path_words("a/.hidden") == "a hidden"  # a dot file keeps its name


def test_path_words_agree_with_pathlib_on_the_standard_library() -> None:
    # outside check: pathlib's own parts and stem of real standard-library paths; for a path
    # of lowercase words and underscores the words are those parts split at underscores
    root = Path(sysconfig.get_paths()["stdlib"])
    checked = 0
    for file in sorted(root.rglob("*.py"))[:3000]:
        relative = PurePosixPath(file.relative_to(root).as_posix())
        parts = [*relative.parent.parts, relative.stem]
        if not all(re.fullmatch(r"[a-z_]+", part) for part in parts):
            continue
        expected = [word for part in parts for word in part.split("_") if word]
        assert path_words(str(relative)).split() == expected, relative
        checked += 1
    assert checked > 200


# an invented fixture: a function whose code never names its folder
HOIST = '''\
def hoist(load):
    """Raise a load off the quay."""
    return load.weight * 2
'''


def test_path_words_go_to_the_field_asked_for() -> None:
    # what scripts/bench_quality.py stage 3d measures: each placement, and none
    unit = CodeUnit(path="harbour/cranes/lift.py", language="python", kind="function",
                    name="hoist", qualname="hoist", signature="def hoist(load):",
                    doc="Raise a load off the quay.", start_line=1, end_line=3, code=HOIST)
    plain = unit.lexical_fields(path_in=None)
    assert "cranes" not in " ".join(plain.values())
    for column in plain:
        fields = unit.lexical_fields(path_in=column)
        assert fields[column] == f"{plain[column]} harbour cranes lift"
        assert {k: v for k, v in fields.items() if k != column} == {
            k: v for k, v in plain.items() if k != column}
    assert unit.lexical_fields() == unit.lexical_fields(path_in=PATH_WORDS_IN)
