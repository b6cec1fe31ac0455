"""Indexing: incremental updates, the content-hash cache, and the HNSW cache's recovery."""

from __future__ import annotations

import shutil
from collections.abc import Callable
from pathlib import Path

import pytest
from sample_files import sample_source_files

from codeseek import FakeEmbedder, open_index
from codeseek.api import Index
from codeseek.units import LEXICAL_TEXT
from codeseek.vectors import HNSW_NAME


def build(repo: Path, embedder: FakeEmbedder | None = None) -> Index:
    index = open_index(repo, create=True, embedder=embedder or FakeEmbedder())
    index.update()
    return index


def ranking(index: Index, query: str, k: int = 10) -> list[tuple[str, str]]:
    return [(h.path, h.qualname) for h in index.search(query, k)]


def unit_set(index: Index) -> set[tuple[str, str, str]]:
    return {(s.unit.path, s.unit.qualname, s.content_hash) for s in index.store.iter_units()}


def test_unchanged_tree_embeds_nothing(sample_copy: Path) -> None:
    embedder = FakeEmbedder()
    index = build(sample_copy, embedder)
    first = embedder.texts_encoded
    assert first == index.status().units  # every unit embedded once (no duplicate texts)
    summary = index.update()
    assert (summary.added, summary.changed, summary.removed, summary.embedded) == (0, 0, 0, 0)
    assert summary.files_parsed == 0
    assert embedder.texts_encoded == first


def test_edit_reembeds_only_the_changed_unit(sample_copy: Path) -> None:
    embedder = FakeEmbedder()
    index = build(sample_copy, embedder)
    target = sample_copy / "python" / "kestrune" / "uploads.py"
    lines = target.read_text(encoding="utf-8").splitlines(keepends=True)
    at = next(i for i, line in enumerate(lines) if "def push_batch_with_backoff" in line)
    new = 'def unrelated_helper():\n    """Count the teal lanterns."""\n    return 7\n\n\n'
    target.write_text("".join(lines[:at]) + new + "".join(lines[at:]), encoding="utf-8")
    before = embedder.texts_encoded
    summary = index.update()
    assert summary.added == 1 and summary.changed == 0 and summary.removed == 0
    assert summary.embedded == 1 and embedder.texts_encoded == before + 1
    top = index.search("count the teal lanterns", 1)[0]
    assert top.qualname == "unrelated_helper"
    # the units below the insertion moved down: their stored lines follow
    moved = next(h for h in index.search("push batch with backoff", 10)
                 if h.qualname == "push_batch_with_backoff")
    lines = target.read_text(encoding="utf-8").splitlines()
    assert "push_batch_with_backoff" in lines[moved.start_line - 1]


def test_moving_a_folder_reembeds_nothing(sample_copy: Path) -> None:
    embedder = FakeEmbedder()
    index = build(sample_copy, embedder)
    before_units = {(u[1], u[2]) for u in unit_set(index)}
    before = embedder.texts_encoded
    shutil.move(sample_copy / "python" / "kestrune" / "billing",
                sample_copy / "python" / "kestrune" / "payments_moved")
    summary = index.update()
    assert summary.embedded == 0 and embedder.texts_encoded == before
    assert {(u[1], u[2]) for u in unit_set(index)} == before_units
    paths = {u[0] for u in unit_set(index)}
    assert not any("/billing/" in p for p in paths)
    assert any("/payments_moved/" in p for p in paths)


def test_deleted_file_leaves_results(sample_copy: Path) -> None:
    index = build(sample_copy)
    (sample_copy / "python" / "kestrune" / "maintenance.py").unlink()
    summary = index.update()
    assert summary.files_removed == 1 and summary.removed > 0
    assert all(h.path != "python/kestrune/maintenance.py"
               for h in index.search("assign a mechanic to a repair ticket", 20))


def test_incremental_equals_fresh_build(sample_copy: Path, tmp_path: Path) -> None:
    index = build(sample_copy)
    (sample_copy / "python" / "kestrune" / "ratelimit.py").unlink()
    shutil.move(sample_copy / "go", sample_copy / "golang")
    fares = sample_copy / "python" / "kestrune" / "billing" / "fares.py"
    fares.write_text(fares.read_text(encoding="utf-8").replace("\"\"\"", "\"\"\" ", 2),
                     encoding="utf-8")
    index.update()
    fresh = open_index(sample_copy, index_dir=tmp_path / "fresh", create=True,
                       embedder=FakeEmbedder())
    fresh.update()
    assert unit_set(index) == unit_set(fresh)
    query = "decode the status packet"
    assert ranking(index, query) == ranking(fresh, query)


@pytest.mark.parametrize("damage", ["delete", "truncate", "garbage"])
def test_damaged_vector_file_is_rebuilt_with_the_same_results(sample_copy: Path,
                                                              damage: str) -> None:
    index = build(sample_copy)
    queries = ["refund a rider", "plan the van route", "heartbeat timeout"]
    expected = [ranking(index, q) for q in queries]
    index.close()
    hnsw = sample_copy / ".codeseek" / HNSW_NAME
    if damage == "delete":
        hnsw.unlink()
    elif damage == "truncate":
        hnsw.write_bytes(hnsw.read_bytes()[: hnsw.stat().st_size // 3])
    else:
        hnsw.write_bytes(b"\x00garbage" * 50)
    reopened = open_index(sample_copy, embedder=FakeEmbedder())
    assert [ranking(reopened, q) for q in queries] == expected
    assert reopened.searcher().vectors.rebuilt
    assert reopened.status().vectors_in_sync  # the rebuilt file was saved and recorded


def test_stale_vector_file_is_not_trusted(sample_copy: Path) -> None:
    index = build(sample_copy)
    hnsw = sample_copy / ".codeseek" / HNSW_NAME
    old = hnsw.read_bytes()
    (sample_copy / "python" / "kestrune" / "maintenance.py").unlink()
    index.update()
    expected = ranking(index, "assign a mechanic")
    index.close()
    hnsw.write_bytes(old)  # a file from an older generation, as after a crash
    reopened = open_index(sample_copy, embedder=FakeEmbedder())
    assert ranking(reopened, "assign a mechanic") == expected
    assert reopened.searcher().vectors.rebuilt


def test_index_folder_is_private_and_ignores_itself(sample_copy: Path) -> None:
    build(sample_copy)
    folder = sample_copy / ".codeseek"
    assert folder.stat().st_mode & 0o777 == 0o700
    assert (folder / ".gitignore").read_text(encoding="utf-8").splitlines()[-1] == "*"


def test_bad_files_never_break_the_index(sample_copy: Path) -> None:
    pkg = sample_copy / "python" / "kestrune"
    (pkg / "broken.py").write_text("def fine():\n    '''Still here.'''\n    return 1\n\n"
                                   "def broken(:\n    pass\n", encoding="utf-8")
    (pkg / "blob.py").write_bytes(b"\x00\x01\x02" * 1000)
    (pkg / "latin.py").write_bytes("def caf\xe9(): pass\n".encode("latin-1"))
    with (pkg / "huge.py").open("wb") as handle:
        handle.write(b"x = 1\n" * (50 * 1024 * 1024 // 6))  # a 50 MB file
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    summary = index.update()
    assert "python/kestrune/broken.py" in summary.syntax_warnings
    assert any(h.qualname == "fine" for h in index.search("still here", 5))
    skipped = index.status().skipped
    assert skipped["binary"] == 1
    assert skipped["not valid UTF-8"] == 1
    assert skipped["larger than max_file_bytes"] == 1


def test_file_vanishing_mid_update_is_counted(sample_copy: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    from codeseek import indexer

    victim = sample_copy / "python" / "kestrune" / "config.py"
    real_read = indexer.read_source

    def vanish_then_read(source, max_bytes):  # type: ignore[no-untyped-def]
        if source.abs_path == victim and victim.exists():
            victim.unlink()
        return real_read(source, max_bytes)

    monkeypatch.setattr(indexer, "read_source", vanish_then_read)
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    summary = index.update()
    assert summary.skipped["vanished during scan"] == 1
    assert summary.files == len(sample_source_files()) - 1


def test_file_over_the_parse_budget_is_counted_not_fatal(sample_copy: Path,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    from codeseek import indexer
    from codeseek.parse import ParseBudgetExceeded
    from codeseek.scan import REASON_PARSE_BUDGET

    real_parse = indexer.parse_source

    def slow_for_one(path, data, spec):  # type: ignore[no-untyped-def]
        if path == "python/kestrune/uploads.py":
            raise ParseBudgetExceeded(REASON_PARSE_BUDGET)
        return real_parse(path, data, spec)

    monkeypatch.setattr(indexer, "parse_source", slow_for_one)
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    summary = index.update()
    assert summary.skipped[REASON_PARSE_BUDGET] == 1
    assert summary.files == len(sample_source_files()) - 1
    assert index.status().skipped[REASON_PARSE_BUDGET] == 1


# -- the lexical entries: a class's methods folded to their signatures -------------------

DEPOT = '''\
class Depot:
    """Where the vans park overnight."""

    def park(self, van):
        """Give a van its bay."""
        return self.bays.index(van.plate) + WINDSHEAR_OFFSET

    def leave(self, van):
        """Free a van's bay."""
        self.bays.remove(van.plate)
'''


def keyword_hits(index: Index, words: str) -> list[str]:
    from codeseek.search import lexical_match

    ids = [row_id for row_id, _ in index.store.lexical_search(lexical_match(words), 10)]
    names = {s.id: s.unit.qualname for s in index.store.iter_units()}
    return [names[i] for i in ids]


def test_a_word_of_a_method_body_finds_the_method_not_its_class(tmp_path: Path) -> None:
    (tmp_path / "depot.py").write_text(DEPOT, encoding="utf-8")
    index = build(tmp_path)
    assert keyword_hits(index, "windshear") == ["Depot.park"]
    assert keyword_hits(index, "leave bay")[0] == "Depot.leave"
    assert "Depot" in keyword_hits(index, "leave")  # the method's name stays in the class's
    # an edit of the method's body reaches both entries
    (tmp_path / "depot.py").write_text(DEPOT.replace("WINDSHEAR_OFFSET", "CROSSWIND_OFFSET"),
                                       encoding="utf-8")
    index.update()
    assert keyword_hits(index, "windshear") == []
    assert keyword_hits(index, "crosswind") == ["Depot.park"]


def test_an_index_with_entries_made_the_old_way_is_rewritten_once(tmp_path: Path) -> None:
    (tmp_path / "depot.py").write_text(DEPOT, encoding="utf-8")
    index = build(tmp_path)
    store = index.store
    # make the entries as codeseek made them before (methods' bodies in the class's entry)
    with store.transaction():
        store._exec("DELETE FROM units_fts")
        for stored in store.iter_units():
            store._insert_lexical(stored.id, stored.unit, None)
        store._exec("DELETE FROM manifest WHERE key='lexical_text'")
    assert keyword_hits(index, "windshear") == ["Depot.park", "Depot"]
    summary = index.update()
    assert keyword_hits(index, "windshear") == ["Depot.park"]
    assert summary.embedded == 0  # only the keyword entries changed
    assert index.store.manifest()["lexical_text"] == LEXICAL_TEXT


def keyword_entries(index: Index) -> dict[str, tuple[str, ...]]:
    rows = {row[0]: tuple(row[1:]) for row in index.store._query(
        "SELECT rowid, names, signature, doc, code FROM units_fts")}
    return {s.unit.uid: rows[s.id] for s in index.store.iter_units()}


FILLER = "\n".join(f"    private int bay{number} = {number};" for number in range(40))
LONG_DEPOT = f"""class Depot {{
    private int maxRetries = 3;
{FILLER}
    /** Gives a van its bay, counted from the gate. */
    public int park(Van van) {{ return maxRetries + WINDSHEAR; }}
}}
"""


@pytest.mark.parametrize(("name", "edit"), [
    # a blank line between a doc and its method: the method loses its doc, so the class's
    # entry keeps the comment (the class's embedded text, its words only, is unchanged)
    ("blank line under a doc", lambda text: text.replace(
        "gate. */\n", "gate. */\n\n")),
    ("doc marker made plain", lambda text: text.replace("/** Gives", "/* Gives")),
    ("identifier respelt", lambda text: text.replace("maxRetries", "max_retries")),
])
def test_keyword_entries_after_an_edit_equal_a_fresh_build(
        tmp_path: Path, name: str, edit: Callable[[str], str]) -> None:
    repo = tmp_path / "repo"
    repo.mkdir()
    source = repo / "Depot.java"
    source.write_text(LONG_DEPOT, encoding="utf-8")
    index = build(repo)
    source.write_text(edit(LONG_DEPOT), encoding="utf-8")
    index.update()
    fresh = open_index(repo, index_dir=tmp_path / "fresh", create=True,
                       embedder=FakeEmbedder())
    fresh.update()
    assert keyword_entries(index) == keyword_entries(fresh)


def test_threads_sharing_a_store_never_nest_transactions(sample_copy: Path) -> None:
    """A search saving its vector file while a refinement or an update commits: both
    use the index's one SQLite connection, and SQLite refuses a BEGIN inside an open
    transaction ("cannot start a transaction within a transaction"), so the store lets
    one transaction at a time run on it."""
    import threading

    with open_index(sample_copy, create=True, backend="fake") as index:
        index.update()
        store = index.store
        errors: list[BaseException] = []
        start = threading.Barrier(4)

        def commit(worker: int) -> None:
            start.wait()
            try:
                for step in range(200):
                    with store.transaction():
                        store.set_manifest(**{f"probe_{worker}": str(step)})
            except BaseException as exc:  # noqa: BLE001 - collected for the assert
                errors.append(exc)

        threads = [threading.Thread(target=commit, args=(n,)) for n in range(4)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
        assert not errors, errors[0]
        manifest = store.manifest()
        assert [manifest[f"probe_{n}"] for n in range(4)] == ["199"] * 4
