"""Searchable first, refined behind (codeseek/refine.py), on the fake backend: its static
tier (FakeTierEmbedder, 128 dimensions) stands in for the static model and FakeEmbedder
(256) for the full one; the two have different model ids, as the real tiers do."""

from __future__ import annotations

import io
import json
import os
import shutil
import signal
import subprocess
import sys
import threading
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest

import codeseek.refine as refine_module
from codeseek import open_index
from codeseek.api import Index
from codeseek.cli import main
from codeseek.embed import FakeEmbedder, Progress
from codeseek.errors import ConfigError
from codeseek.refine import QueryTraffic, pending_units, refinement_of
from codeseek.store import Store
from codeseek.watch import Watcher

PROJECT = Path(__file__).resolve().parent.parent
QUERIES = ["parse a station code", "price a fare with discounts", "zone of a stop",
           "read the timetable file", "rider card balance"]


def _run(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


def _started(repo: Path, **kwargs: object) -> Index:
    """An index of ``repo`` built with the static tier, its refinement not begun."""
    index = open_index(repo, create=True, backend="fake", **kwargs)  # type: ignore[arg-type]
    index.update(refine=True)
    return index


def _snapshot(store: Store) -> tuple[list[tuple], dict[tuple[str, str], bytes], dict[str, str]]:
    """Units (every column but the row id), vectors by (model, content hash) and the
    manifest keys a build decides, read straight from SQLite."""
    units = sorted(store._query(
        "SELECT f.path, f.language, f.sha256, u.uid, u.kind, u.name, u.qualname, u.signature, "
        "u.doc, u.start_line, u.end_line, u.code, u.doc_start, u.doc_end, u.ordinal, "
        "u.content_hash FROM units u JOIN files f ON f.id=u.file_id"))
    vectors = {(model, digest): bytes(blob) for digest, model, blob in
               store._query("SELECT content_hash, model_id, vector FROM vectors")}
    manifest = {key: value for key, value in store.manifest().items()
                if key in ("model_id", "dim", "lexical_text")}
    return units, vectors, manifest


def _assert_equals_fresh_full_build(index: Index, repo: Path, tmp_path: Path) -> None:
    fresh_repo = tmp_path / "fresh"
    shutil.copytree(repo, fresh_repo, ignore=shutil.ignore_patterns(".codeseek"))
    with open_index(fresh_repo, create=True, backend="fake") as fresh:
        fresh.update()
        units, vectors, manifest = _snapshot(fresh.store)
        fresh_hits = [[(h.path, h.qualname) for h in hits]
                      for hits in fresh.search_many(QUERIES, 10)]
    got_units, got_vectors, got_manifest = _snapshot(index.store)
    assert got_units == units
    assert got_manifest == manifest
    assert got_vectors.keys() == vectors.keys()
    # reference: numpy, on the float32 rows themselves
    for key, blob in vectors.items():
        np.testing.assert_array_equal(np.frombuffer(got_vectors[key], np.float32),
                                      np.frombuffer(blob, np.float32))
    assert [[(h.path, h.qualname) for h in hits]
            for hits in index.search_many(QUERIES, 10)] == fresh_hits


class CrashingEmbedder(FakeEmbedder):
    """The full tier's stand-in, failing on its ``crash_at``-th encode (a crash mid-run)."""

    def __init__(self, crash_at: int) -> None:
        super().__init__()
        self.crash_at = crash_at

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        if self.calls + 1 == self.crash_at:
            self.crash_at = 0  # once
            raise RuntimeError("injected crash")
        return super().encode(texts, progress)


def test_searchable_with_the_static_tier_before_any_refinement(sample_copy: Path) -> None:
    with _started(sample_copy) as index:
        assert index.refining and index.tier == "static"
        state = refinement_of(index.store)
        assert state is not None and state.refined == 0
        assert state.total == index.store.counts()["units"] > 0
        hits = index.search("price a fare with discounts", 5)
        assert hits and {h.tier for h in hits} == {"static"}
        assert any("fare" in h.qualname.lower() for h in hits)


def test_default_update_is_unchanged(sample_copy: Path) -> None:
    with open_index(sample_copy, create=True, backend="fake") as index:
        index.update()
        assert not index.refining and index.tier == "full"
        assert "refinement" not in index.status().to_json()
    code, out, _ = _run("status", str(sample_copy), "--json")
    assert code == 0 and "refinement" not in json.loads(out)


def test_progress_in_status_text_and_json(sample_copy: Path) -> None:
    with _started(sample_copy) as index:
        assert index.refine(limit=40) == 40
        total = index.store.counts()["units"]
        # reference: SQLite directly, units that have a full-model vector
        full = FakeEmbedder().model_id
        refined = index.store._query(
            "SELECT COUNT(*) FROM units u JOIN vectors v ON v.content_hash=u.content_hash "
            "AND v.model_id=?", (full,))[0][0]
    code, out, _ = _run("status", str(sample_copy), "--json")
    record = json.loads(out)["refinement"]
    assert code == 0
    assert record["refined"] == refined and 40 <= refined < total == record["total"]
    assert record["tier"] == "full" and record["model_id"] == full
    assert record["seconds_left"] is not None and record["seconds_left"] >= 0
    code, out, _ = _run("status", str(sample_copy))
    assert f"refining     {refined} of {total} units with the full tier" in out
    from codeseek.tui.render import index_summary

    with open_index(sample_copy, backend="fake") as index:
        status = index.status()
    assert f"· refining {refined} of {total} units" in index_summary(status, "in process")


def test_most_documented_files_are_refined_first(sample_copy: Path) -> None:
    with _started(sample_copy) as index:
        documented: dict[str, int] = {}
        for stored in index.store.iter_units():
            documented[stored.unit.path] = (documented.get(stored.unit.path, 0)
                                            + bool(stored.unit.doc))
        order = [s.unit.path for s in pending_units(index.store, FakeEmbedder().model_id,
                                                     10_000)]
        counts = [documented[path] for path in order]
        assert counts == sorted(counts, reverse=True) and counts[0] > counts[-1]


def test_refinement_ends_equal_to_a_fresh_full_build(sample_copy: Path, tmp_path: Path) -> None:
    with _started(sample_copy) as index:
        index.refine(limit=30)
        # a change mid-refinement is embedded with the static tier, then refined too
        target = sample_copy / "python" / "kestrune" / "billing" / "fares.py"
        target.write_text(target.read_text(encoding="utf-8") + "\n\ndef surcharge_for_night"
                          "_rides(fare):\n    \"\"\"Add the night surcharge.\"\"\"\n"
                          "    return fare * 1.2\n", encoding="utf-8")
        (sample_copy / "python" / "kestrune" / "uploads.py").unlink()
        index.update()
        assert index.refining
        index.refine()
        assert not index.refining and index.tier == "full"
        assert "refinement" not in index.status().to_json()
        assert {h.tier for h in index.search("night surcharge", 5)} == {"full"}
        _assert_equals_fresh_full_build(index, sample_copy, tmp_path)


def test_fully_refined_ranking_before_the_switch_is_the_full_ranking(sample_copy: Path,
                                                                     tmp_path: Path) -> None:
    """At 100% refined, the fused ranking is the full tier's (the merge rule changes each
    tier's scores by an increasing affine map only)."""
    with _started(sample_copy) as index:
        while index._refiner is None or index._refiner.step(64):
            if index._refiner is None:
                index.refine(limit=1)
        assert index.refining  # every vector is there; the switch has not happened
        hits = index.search_many(QUERIES, 10)
        assert {h.tier for answer in hits for h in answer} == {"full"}
        order = [[(h.path, h.qualname) for h in answer] for answer in hits]
    fresh_repo = tmp_path / "fresh"
    shutil.copytree(sample_copy, fresh_repo, ignore=shutil.ignore_patterns(".codeseek"))
    with open_index(fresh_repo, create=True, backend="fake") as fresh:
        fresh.update()
        assert [[(h.path, h.qualname) for h in answer]
                for answer in fresh.search_many(QUERIES, 10)] == order


def test_a_crash_mid_refinement_resumes_where_it_stopped(sample_copy: Path,
                                                         tmp_path: Path) -> None:
    import codeseek.api

    with _started(sample_copy) as index:
        hashes = len(pending_units(index.store, FakeEmbedder().model_id, 10_000))
    crashing = CrashingEmbedder(crash_at=3)
    with open_index(sample_copy, backend="fake", refine_embedder=crashing) as index, \
            pytest.MonkeyPatch.context() as patch:
        patch.setattr(codeseek.api, "UNITS_PER_REFINE_BATCH", 16)
        with pytest.raises(RuntimeError, match="injected crash"):
            index.refine()
        committed = crashing.texts_encoded
        assert committed == 32  # two batches committed before the crash
        assert refinement_of(index.store).refined >= committed  # type: ignore[union-attr]
        assert index.search("zone of a stop", 5)  # still searchable, partly refined
    resumed = FakeEmbedder()
    with open_index(sample_copy, backend="fake", refine_embedder=resumed) as index:
        assert index.refining
        index.refine()
        assert resumed.texts_encoded == hashes - committed  # nothing embedded twice
        assert not index.refining
        _assert_equals_fresh_full_build(index, sample_copy, tmp_path)


KILLED_CHILD = """
import os, signal, sys
from codeseek import open_index
from codeseek.embed import FakeEmbedder
import codeseek.api
codeseek.api.UNITS_PER_REFINE_BATCH = 16

class Killed(FakeEmbedder):
    def encode(self, texts, progress=None):
        if self.calls == 2:
            os.kill(os.getpid(), signal.SIGKILL)
        return super().encode(texts, progress)

with open_index(sys.argv[1], backend="fake", refine_embedder=Killed()) as index:
    index.refine()
"""


def test_kill_9_mid_refinement_resumes(sample_copy: Path, tmp_path: Path) -> None:
    _started(sample_copy).close()
    env = {**os.environ, "PYTHONPATH": str(PROJECT)}
    child = subprocess.run([sys.executable, "-c", KILLED_CHILD, str(sample_copy)], env=env,
                           capture_output=True, text=True, timeout=60)
    assert child.returncode == -signal.SIGKILL, child.stderr
    with open_index(sample_copy, backend="fake") as index:
        state = refinement_of(index.store)
        assert state is not None and 32 <= state.refined < state.total
    code, out, err = _run("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    assert "refined" in out
    with open_index(sample_copy, backend="fake") as index:
        assert not index.refining
        _assert_equals_fresh_full_build(index, sample_copy, tmp_path)


def test_searches_during_refinement_never_fail(sample_copy: Path) -> None:
    import codeseek.api

    errors: list[BaseException] = []
    tiers: set[str | None] = set()
    with _started(sample_copy) as index, pytest.MonkeyPatch.context() as patch:
        patch.setattr(codeseek.api, "UNITS_PER_REFINE_BATCH", 4)
        # searches never stop here: the refiner gives way only briefly, or would wait
        # its longest between every batch (test_a_refinement_gives_way_to_searches)
        patch.setattr(refine_module, "MAX_YIELD_SECONDS", 0.01)
        done = threading.Event()

        def ask() -> None:
            while not done.is_set():
                try:
                    for answer in index.search_many(QUERIES, 10):
                        assert answer
                        tiers.update(h.tier for h in answer)
                except BaseException as exc:  # noqa: BLE001 - collected for the assert
                    errors.append(exc)
                    return

        asker = threading.Thread(target=ask)
        asker.start()
        try:
            while index.refining:
                index.refine(limit=4)
        finally:
            done.set()
            asker.join()
        assert not errors, errors
        assert "full" in tiers
        assert {h.tier for h in index.search("zone of a stop", 10)} == {"full"}


class Clock:
    """A clock the test moves by hand (``sleep`` moves it too)."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.now += seconds


def test_query_traffic_is_busy_during_a_search_and_for_a_quiet_spell_after() -> None:
    clock = Clock()
    traffic = QueryTraffic(clock)
    assert not traffic.busy()
    assert traffic.give_way(clock.sleep) == 0.0  # nobody searching: no wait
    with traffic.searching():
        with traffic.searching():
            pass
        assert traffic.busy()  # the outer search still runs
        clock.now += 10 * refine_module.QUIET_SECONDS
        assert traffic.busy()
    assert traffic.busy()  # just ended
    clock.now += refine_module.QUIET_SECONDS / 2
    assert traffic.busy()
    waited = traffic.give_way(clock.sleep)  # the rest of the quiet spell
    assert 0 < waited <= refine_module.QUIET_SECONDS / 2 + 0.011
    assert not traffic.busy()


def test_giving_way_is_bounded_however_busy_searching_is() -> None:
    clock = Clock()
    traffic = QueryTraffic(clock)
    with traffic.searching():
        waited = traffic.give_way(clock.sleep)
    assert refine_module.MAX_YIELD_SECONDS <= waited <= refine_module.MAX_YIELD_SECONDS + 0.011


def test_a_refinement_gives_way_to_searches(sample_copy: Path,
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(refine_module, "QUIET_SECONDS", 0.05)
    monkeypatch.setattr(refine_module, "MAX_YIELD_SECONDS", 60.0)
    index = _started(sample_copy)
    target = index.refine_embedder
    assert isinstance(target, FakeEmbedder)
    search_started, search_may_end = threading.Event(), threading.Event()

    def long_search() -> None:
        with index.traffic.searching():  # a search under way, as search_many holds it
            search_started.set()
            search_may_end.wait(30)

    searcher = threading.Thread(target=long_search)
    searcher.start()
    search_started.wait(30)
    refiner = threading.Thread(target=index.refine, kwargs={"limit": 8})
    refiner.start()
    refiner.join(0.5)
    try:
        assert refiner.is_alive() and target.texts_encoded == 0  # waiting, not encoding
    finally:
        search_may_end.set()
        searcher.join(30)
        refiner.join(30)
    assert not refiner.is_alive()
    assert target.texts_encoded == 8  # then it went on
    assert index._refiner is not None and index._refiner.waited >= 0.5
    index.close()


def test_the_watcher_refines_between_changes(sample_copy: Path) -> None:
    with _started(sample_copy) as index:
        watcher = Watcher(index)
        steps = 0
        while watcher.refine_step():
            steps += 1
        assert steps >= 0 and not index.refining and index.tier == "full"
        assert watcher.state.last_error is None


def test_cli_index_refine_and_watch_option(sample_copy: Path) -> None:
    code, out, err = _run("index", str(sample_copy), "--backend", "fake", "-q", "--refine")
    assert code == 0, err
    units = json.loads(_run("status", str(sample_copy), "--json")[1])["units"]
    assert f"refined {units} units with the full tier" in out
    code, _, err = _run("index", str(sample_copy), "--backend", "fake", "--tier", "static",
                        "--refine")
    assert code != 0 and "--refine embeds toward" in err
    from codeseek.cli import build_parser

    assert build_parser().parse_args(["watch", "--refine"]).refine is True
    assert build_parser().parse_args(["watch", "--no-refine"]).refine is False
    assert build_parser().parse_args(["watch"]).refine is None  # decided by size
    assert build_parser().parse_args(["index", "--no-refine"]).refine is False


def _source_bytes(repo: Path) -> int:
    """The bytes of the files an index of ``repo`` parses, by os.stat (the reference),
    over the files the scan lists."""
    from codeseek.config import load_settings
    from codeseek.scan import scan_repository

    files = scan_repository(load_settings(repo)).files
    assert files
    return sum(os.stat(source.abs_path).st_size for source in files)


def _write_toml(repo: Path, text: str) -> None:
    (repo / "codeseek.toml").write_text(text, encoding="utf-8")


def test_a_new_index_above_the_size_is_refined_by_default(sample_copy: Path) -> None:
    size = _source_bytes(sample_copy)
    _write_toml(sample_copy, f"refine_above_bytes = {size - 1}\n")  # one byte under
    with open_index(sample_copy, create=True, backend="fake") as index:
        refine, notice = index.choose_refinement()
        assert refine and notice is not None
        assert f"{size / 1e6:.1f} MB" in notice and "--no-refine" in notice
        assert index.choose_refinement(False) == (False, None)  # --no-refine
    _write_toml(sample_copy, f"refine_above_bytes = {size}\n")  # not above it
    with open_index(sample_copy, create=True, backend="fake") as index:
        assert index.choose_refinement() == (False, None)
        assert index.choose_refinement(True) == (True, None)  # --refine


def test_the_size_rule_leaves_existing_and_static_indexes_alone(sample_copy: Path) -> None:
    _write_toml(sample_copy, "refine_above_bytes = 1\n")
    with open_index(sample_copy, create=True, backend="fake", tier="static") as index:
        assert index.choose_refinement() == (False, None)  # nothing slower to refine toward
    with open_index(sample_copy, create=True, backend="fake") as index:
        index.update()  # a full build: the index holds units now
        assert index.choose_refinement() == (False, None)
    _write_toml(sample_copy, "refine_above_bytes = 1\nrefine = false\n")
    shutil.rmtree(sample_copy / ".codeseek")
    with open_index(sample_copy, create=True, backend="fake") as index:
        assert index.choose_refinement() == (False, None)  # codeseek.toml said no
    _write_toml(sample_copy, "refine = true\n")
    with open_index(sample_copy, create=True, backend="fake") as index:
        assert index.choose_refinement() == (True, None)  # said yes, whatever the size


@pytest.mark.parametrize("line, problem", [
    ('refine = "yes"', "refine must be true or false"),
    ("refine_above_bytes = 2.5", "refine_above_bytes must be a whole number"),
    ("refine_above_bytes = 0", "refine_above_bytes must be positive"),
])
def test_refine_settings_in_codeseek_toml_are_checked(sample_copy: Path, line: str,
                                                     problem: str) -> None:
    _write_toml(sample_copy, line + "\n")
    code, out, err = _run("index", str(sample_copy), "--backend", "fake", "-q")
    assert code != 0 and out == ""
    assert err.count("\n") == 1 and problem in err and "codeseek.toml" in err


def test_cli_index_and_watch_refine_a_large_new_index_by_default(sample_copy: Path) -> None:
    _write_toml(sample_copy, "refine_above_bytes = 1000\n")
    code, out, err = _run("index", str(sample_copy), "--backend", "fake")
    assert code == 0, err
    assert "searchable first with the static tier" in err
    units = json.loads(_run("status", str(sample_copy), "--json")[1])["units"]
    assert f"refined {units} units with the full tier" in out
    code, out, err = _run("index", str(sample_copy), "--backend", "fake")  # not new now
    assert code == 0 and "refined" not in out and "searchable first" not in err

    shutil.rmtree(sample_copy / ".codeseek")
    code, out, err = _run("index", str(sample_copy), "--backend", "fake", "--no-refine")
    assert code == 0 and "refined" not in out and "searchable first" not in err
    status = json.loads(_run("status", str(sample_copy), "--json")[1])
    assert status["tier"] == "full" and status.get("refinement") is None

    import codeseek.daemon

    shutil.rmtree(sample_copy / ".codeseek")
    asked: list[bool] = []
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(codeseek.daemon, "run_foreground",
                      lambda index, log, poll=False, refine=False: asked.append(refine))
        assert _run("watch", str(sample_copy), "--backend", "fake")[0] == 0
        assert _run("watch", str(sample_copy), "--backend", "fake", "--no-refine")[0] == 0
    assert asked == [True, False]


def test_refine_toward_the_static_tier_is_refused(sample_copy: Path) -> None:
    with open_index(sample_copy, create=True, backend="fake", tier="static") as index, \
            pytest.raises(ConfigError, match="--tier full"):
        index.update(refine=True)


def test_watch_refine_serves_throughout_and_ends_on_the_full_tier(sample_copy: Path) -> None:
    import time

    import codeseek.watch
    from codeseek.client import DaemonClient
    from codeseek.daemon import Daemon

    with open_index(sample_copy, create=True, backend="fake") as index, \
            pytest.MonkeyPatch.context() as patch:
        patch.setattr(codeseek.watch, "UNITS_PER_REFINE_BATCH", 16)
        # this client searches every 50 ms: the refiner's longest wait between batches
        # is cut short, or it would wait that long every batch
        patch.setattr(refine_module, "MAX_YIELD_SECONDS", 0.01)
        daemon = Daemon(index, reconcile_seconds=3600, debounce=0.05, refine=True)
        daemon.start()
        try:
            client = DaemonClient(index.settings.index_dir)
            new = sample_copy / "python" / "kestrune" / "lanterns.py"
            new.write_text('def count_teal_lanterns(street):\n    """Count the teal '
                           'lanterns on a street."""\n    return len(street)\n',
                           encoding="utf-8")
            seen: list[dict[str, object] | None] = []
            tiers: set[str | None] = set()
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline:
                record = client.status()["index"]
                seen.append(record.get("refinement"))
                tiers.update(h.tier for h in client.search("count the teal lanterns", 5))
                if record.get("refinement") is None and record["tier"] == "full":
                    break
                time.sleep(0.05)
            assert seen[0] is not None  # searchable (and answering) before it is refined
            assert seen[-1] is None and index.tier == "full"
            assert tiers <= {"static", "full"} and "full" in tiers
            hits = client.search("count the teal lanterns", 1)
            assert [h.qualname for h in hits] == ["count_teal_lanterns"]
            assert hits[0].tier == "full"
            assert daemon.watcher.state.last_error is None
        finally:
            daemon.stop()


def test_slots_reorder_only_the_refined_units_and_end_on_the_full_ranking() -> None:
    """``slots``: the refined candidates take the static scores among them in the full
    tier's order; unrefined ones keep theirs; with none unrefined, the full scores.
    References: numpy argsort of the static scores (0% refined) and of the full scores
    (everything refined)."""
    from codeseek.refine import merge_tiers

    generator = np.random.default_rng(11)
    static_scores = generator.uniform(-0.2, 0.8, 50)
    full_scores = generator.uniform(-0.2, 0.8, 50)  # another order altogether
    static = sorted(((i, float(s)) for i, s in enumerate(static_scores)),
                    key=lambda pair: (-pair[1], pair[0]))
    assert merge_tiers([], static, {}, 50, how="slots") == static  # 0%: static as it is
    every = {i: float(full_scores[i]) for i in range(50)}
    merged = merge_tiers(sorted(every.items(), key=lambda p: -p[1]), static, every, 50,
                         how="slots")
    # everything refined: nothing to compare with, the full tier's own list
    assert [i for i, _ in merged] == [int(i) for i in np.argsort(-full_scores, kind="stable")]
    assert [s for _, s in merged] == sorted((float(s) for s in full_scores), reverse=True)
    refined_ids = set(range(0, 50, 3))
    part = {i: float(full_scores[i]) for i in refined_ids}
    merged = dict(merge_tiers(sorted(part.items(), key=lambda p: -p[1]), static, part, 50,
                              how="slots"))
    for i in set(range(50)) - refined_ids:
        assert merged[i] == float(static_scores[i])  # unrefined: untouched
    order = sorted(refined_ids, key=lambda i: -merged[i])
    assert order == sorted(refined_ids, key=lambda i: -full_scores[i])
    assert sorted(merged[i] for i in refined_ids) == sorted(
        float(static_scores[i]) for i in refined_ids)


def test_merge_maps_static_onto_full_and_falls_back_to_static() -> None:
    """The two tiers' cosines put on one scale (refine.merge_tiers): when the full tier's
    cosines are an increasing line of the static ones, the merged list at any share
    refined is the full tier's own ranking (reference: numpy argsort of the full scores);
    with fewer refined pairs than MIN_PAIRS it is the static ranking unchanged."""
    from codeseek.refine import MIN_PAIRS, fit_static_to_full, merge_tiers

    generator = np.random.default_rng(7)
    static_scores = generator.uniform(-0.2, 0.8, 60)
    full_scores = 0.5 * static_scores + 0.3  # another scale, the same order
    expected = [int(i) for i in np.argsort(-full_scores, kind="stable")[:40]]
    static = sorted(((i, float(s)) for i, s in enumerate(static_scores)),
                    key=lambda pair: -pair[1])
    for share in (0.25, 0.5, 0.75, 1.0):
        refined_ids = set(range(0, 60, max(1, round(1 / share))))
        full = sorted(((i, float(full_scores[i])) for i in refined_ids),
                      key=lambda pair: -pair[1])
        refined = {i: float(full_scores[i]) for i, _ in static if i in refined_ids}
        for how in ("linear", "matched"):
            merged = merge_tiers(full, static, refined, 40, how=how)
            assert [i for i, _ in merged] == expected
    line = fit_static_to_full(dict(static), {i: float(full_scores[i]) for i in range(10)})
    assert line is not None and np.allclose(line, (0.5, 0.3))
    # an exact line: matching mean and spread gives the same line (numpy's polyfit too)
    matched = fit_static_to_full(dict(static), {i: float(full_scores[i]) for i in range(10)},
                                 matched=True)
    reference = np.polyfit([static_scores[i] for i in range(10)],
                           [full_scores[i] for i in range(10)], 1)
    assert matched is not None and np.allclose(matched, reference)
    # noisy pairs: least squares shrinks the slope by the correlation, matching does not
    noisy = full_scores + generator.normal(0, 0.2, 60)
    pairs = {i: float(noisy[i]) for i in range(60)}
    shrunk = fit_static_to_full(dict(static), pairs)
    spread = fit_static_to_full(dict(static), pairs, matched=True)
    assert shrunk is not None and spread is not None
    correlation = float(np.corrcoef(static_scores, noisy)[0, 1])
    assert np.isclose(spread[0], noisy.std() / static_scores.std())
    assert np.isclose(shrunk[0], correlation * spread[0])
    few = {i: float(full_scores[i]) for i in range(MIN_PAIRS - 1)}
    assert merge_tiers(sorted(few.items(), key=lambda p: -p[1]), static, few, 40,
                       how="linear") == static[:40]


@pytest.mark.parametrize("how", ["standardised", "linear", "matched", "slots"])
def test_searches_mid_refinement_rank_as_designed(sample_copy: Path, how: str) -> None:
    """Through the served path on the fake tiers: at 0% refined the dense side is the
    static tier's ranking; with every unit refined (before the switch) it is the full
    tier's exact ranking (reference: numpy brute force over the stored full vectors)."""
    from codeseek.refine import RefiningSearcher
    from codeseek.vectors import exact_search

    index = _started(sample_copy)
    searcher = index.searcher()
    assert isinstance(searcher, RefiningSearcher)
    searcher.tier_map = how
    query = QUERIES[0]
    static_vector = searcher.query_vectors([query])[0]
    with searcher.lock.read():
        static = searcher.dense(static_vector, 200, None)
    captured: list[list[tuple[int, float]]] = []
    import codeseek.refine as refine_module

    real_fuse = refine_module.fuse

    def spy(dense, lexical, fusion, enclosing=None):  # type: ignore[no-untyped-def]
        captured.append(list(dense))
        return real_fuse(dense, lexical, fusion, enclosing)

    refine_module.fuse = spy  # type: ignore[assignment]
    try:
        index.search(query, 10)
        assert [i for i, _ in captured[-1]] == [i for i, _ in static]
        total = index.store.counts()["units"]
        index.refine(limit=total - 1)  # all but one: still refining
        index.search(query, 10)
        labels, matrix = index.store.unit_vectors(searcher.full.model_id, searcher.full.dim)
        full = exact_search(searcher.full.encode([query])[0], labels, matrix, 200)
        cosine = dict(full)
        got = [cosine[i] for i, _ in captured[-1] if i in cosine]
        half = len(full) // 2  # refined units ranked by their full cosines (ties: any order)
        np.testing.assert_allclose(got[:half], [score for _, score in full][:half], atol=1e-6)
    finally:
        refine_module.fuse = real_fuse  # type: ignore[assignment]
        index.close()


def test_refined_units_static_cosines_equal_numpy_over_the_stored_rows(
        sample_copy: Path) -> None:
    """The static cosine of a refined candidate comes from the rows the searcher keeps
    beside the full ones; reference: numpy's dot product over the static vectors read
    straight from the store, after a batch and again after a change of the index."""
    from codeseek.refine import RefiningSearcher

    index = _started(sample_copy)
    try:
        index.refine(limit=40)
        searcher = index.searcher()
        assert isinstance(searcher, RefiningSearcher)

        def check() -> None:
            vector = searcher.query_vectors([QUERIES[1]])[0]
            with searcher.lock.read():
                searcher._reload()
                refined = [int(label) for label in searcher._labels[: searcher._count]]
                got = searcher._static_cosines(vector, refined)
            labels, matrix = index.store.unit_vectors(searcher.model_id, searcher.vectors.dim,
                                                      refined)
            expected = dict(zip((int(label) for label in labels), matrix @ vector,
                                strict=True))
            assert refined and sorted(got) == sorted(expected) == sorted(refined)
            np.testing.assert_allclose([got[u] for u in refined],
                                       [expected[u] for u in refined], atol=1e-6)

        check()
        index.refine(limit=40)  # another batch: rows appended
        check()
        target = sample_copy / "python" / "kestrune" / "lanterns.py"
        target.write_text('def count_teal_lanterns(street):\n    """Count the teal lanterns '
                          'on a street."""\n    return len(street)\n', encoding="utf-8")
        index.update()  # a new generation: every row read again
        index.refine(limit=40)
        check()
    finally:
        index.close()
