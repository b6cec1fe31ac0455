"""Settings: where relative paths in codeseek.toml, arguments and variables lead."""

from __future__ import annotations

import io
from pathlib import Path

import pytest

from codeseek.cli import main
from codeseek.config import load_settings


def repository(tmp_path: Path, toml: str) -> Path:
    repo = tmp_path / "repo"
    (repo / "pkg" / "deep").mkdir(parents=True)
    (repo / "pkg" / "fares.py").write_text('def fare():\n    """Price a ride."""\n',
                                           encoding="utf-8")
    (repo / "codeseek.toml").write_text(toml, encoding="utf-8")
    return repo


def test_relative_paths_in_codeseek_toml_are_relative_to_the_repository(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    repo = repository(tmp_path, '[codeseek]\nindex_dir = "build/idx"\n')
    monkeypatch.chdir(repo / "pkg" / "deep")
    settings = load_settings(repo, env={})
    assert settings.index_dir == repo / "build" / "idx"
    # the same file read from the root, or through a relative repository path, agrees
    monkeypatch.chdir(repo)
    assert load_settings(".", env={}).index_dir == repo / "build" / "idx"
    monkeypatch.chdir(repo / "pkg")
    assert load_settings("..", env={}).index_dir == repo / "build" / "idx"


def test_relative_arguments_and_variables_are_relative_to_where_the_user_stands(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    repo = repository(tmp_path, '[codeseek]\nindex_dir = "build/idx"\n')
    here = repo / "pkg"
    monkeypatch.chdir(here)
    assert load_settings(repo, index_dir="mine", env={}).index_dir == here / "mine"
    assert load_settings(repo, env={"CODESEEK_INDEX_DIR": "env-idx"}).index_dir \
        == here / "env-idx"
    assert load_settings(repo, model="m", env={}).model == here / "m"
    assert load_settings(repo, env={"CODESEEK_MODEL": "../m"}).model == repo / "m"


def test_index_from_a_subfolder_writes_the_index_codeseek_toml_names(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    repo = repository(tmp_path, '[codeseek]\nindex_dir = "idx"\n')
    monkeypatch.chdir(repo / "pkg")
    monkeypatch.delenv("CODESEEK_INDEX_DIR", raising=False)
    out, err = io.StringIO(), io.StringIO()
    assert main(["index", "..", "--backend", "fake", "-q"], out=out, err=err) == 0, \
        err.getvalue()
    assert (repo / "idx").is_dir()
    assert not (repo / "pkg" / "idx").exists()
    assert main(["search", "price a ride", "--repo", "..", "--backend", "fake"],
                out=out, err=err) == 0, err.getvalue()
    assert "pkg/fares.py" in out.getvalue()
