"""``codeseek outline``: the units of a file or a tree, without an index or a model.

The expected units are those of ``sample_repo/`` (invented demo code whose
units are known by construction); the record fields and line format are the
ones the issue asks for.
"""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

from codeseek.cli import main
from codeseek.languages import language_names, spec_for_path
from codeseek.parse import parse_source

LINE = re.compile(r"^(?P<path>\S+):(?P<start>\d+)-(?P<end>\d+) (?P<kind>function|method|class) "
                  r"(?P<qualname>\S.*)$")
FIELDS = {"path": str, "language": str, "kind": str, "name": str, "qualname": str,
          "signature": str, "start_line": int, "end_line": int, "has_doc": bool,
          "doc_summary": str}


def run_cli(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


def test_tree_lines_have_the_documented_format(sample_copy: Path) -> None:
    code, out, err = run_cli("outline", str(sample_copy))
    assert code == 0, err
    lines = out.splitlines()
    seen_suffixes = set()
    for line in lines:
        match = LINE.match(line)
        assert match, line
        path = Path(match["path"])
        assert path.is_file() and path.is_relative_to(sample_copy)
        assert 1 <= int(match["start"]) <= int(match["end"])
        seen_suffixes.add(path.suffix)
    assert {".py", ".js", ".ts", ".tsx", ".go", ".rs"} <= seen_suffixes
    assert not any("build/" in line for line in lines)  # ignored by sample_repo's .gitignore


def test_paths_are_shown_as_the_caller_named_the_folder(sample_copy: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(sample_copy.parent)
    code, out, _ = run_cli("outline", f"{sample_copy.name}/go")
    assert code == 0
    assert out.splitlines()[0].startswith(f"{sample_copy.name}/go/dockd/packet.go:")


def test_json_records_carry_every_field(sample_copy: Path) -> None:
    code, out, err = run_cli("outline", str(sample_copy), "--json")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    for record in records:
        assert {key: type(record[key]) for key in FIELDS} == FIELDS
        spec = spec_for_path(record["path"])
        assert spec is not None and record["language"] == spec.name
    by_name = {(Path(r["path"]).relative_to(sample_copy).as_posix(), r["qualname"]): r
               for r in records}
    # units of the sample repository, known by construction
    decode = by_name["go/dockd/packet.go", "DecodeStatusPacket"]
    assert decode["kind"] == "function" and decode["has_doc"]
    assert decode["signature"] == "func DecodeStatusPacket(raw []byte) (*DockStatus, error)"
    assert by_name["go/dockd/service.go", "(*AlertNotifier).NotifyLowBattery"]["kind"] == "method"
    forecast = by_name["ts/ops-dashboard/dockHealth.ts", "BatteryForecast.hoursUntilFlat"]
    assert forecast["language"] == "typescript" and forecast["kind"] == "method"
    card = by_name["ts/ops-dashboard/StationCard.tsx", "StationCard"]
    assert card["language"] == "tsx" and card["doc_summary"].startswith("The card on the")
    overload = by_name["ts/ops-dashboard/dockHealth.ts", "parseStationCode"]
    assert overload["has_doc"] and "@throws" not in overload["doc_summary"]
    cap = by_name["rust/fares/src/lib.rs", "impl FareRule for DailyCap::adjust"]
    assert cap["kind"] == "method" and cap["name"] == "adjust"


def test_a_file_outline_is_what_the_parser_extracts(sample_copy: Path) -> None:
    target = sample_copy / "ts" / "ops-dashboard" / "dockHealth.ts"
    code, out, _ = run_cli("outline", str(target), "--json")
    assert code == 0
    spec = spec_for_path(target.name)
    assert spec is not None
    parsed = parse_source(target.as_posix(), target.read_bytes(), spec).units
    records = [json.loads(line) for line in out.splitlines()]
    assert [(r["qualname"], r["start_line"], r["end_line"]) for r in records] == [
        (u.qualname, u.start_line, u.end_line) for u in parsed]


def test_outline_builds_no_index_and_loads_no_model(sample_copy: Path) -> None:
    probe = ("import sys\nfrom codeseek.cli import main\n"
             f"main(['outline', {str(sample_copy)!r}], out=open('/dev/null', 'w'))\n"
             "heavy = ['torch', 'onnxruntime', 'sentence_transformers', 'hnswlib', 'tokenizers']\n"
             "print(sorted(m for m in heavy if m in sys.modules))\n")
    result = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                            check=True, timeout=120)
    assert result.stdout.strip() == "[]"
    assert not (sample_copy / ".codeseek").exists()


def test_a_file_of_no_known_language_is_one_error_line(sample_copy: Path) -> None:
    target = sample_copy / "README.md"
    code, out, err = run_cli("outline", str(target))
    assert code == 1 and out == ""
    assert err == (f"error: {target}: no supported language for this file; codeseek reads "
                   f"{', '.join(language_names())}\n")
