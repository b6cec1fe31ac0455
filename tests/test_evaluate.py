"""Recall checks on held-out docstrings (fast tier: the fake embedder)."""

from __future__ import annotations

import io
import json
import re
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from codeseek.api import Index
from codeseek.cli import main
from codeseek.embed import FakeEmbedder
from codeseek.errors import InvalidSplit, TooFewExamples
from codeseek.evaluate import (
    CANDIDATES,
    WHOLE,
    DocumentIndex,
    EvalReport,
    PoolSampler,
    Split,
    bootstrap_ci,
    build_documents,
    clean_summary,
    evaluate_units,
    mean_reciprocal_rank,
    mrr_difference,
    query_of,
    rank_histogram,
    rank_of_true,
    recall_at,
    render_html,
    select_cases,
    strip_leading_name,
    summarise,
)
from codeseek.search import Searcher, fuse
from codeseek.units import CodeUnit

SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"


def unit(name: str, doc: str = "", body: str = "pass", path: str = "m.py",
         language: str = "python") -> CodeUnit:
    code = f"def {name}():\n    {body}\n"
    return CodeUnit(path=path, language=language, kind="function", name=name, qualname=name,
                    signature=f"def {name}():", doc=doc, start_line=1, end_line=2, code=code)


def run_cli(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


# -- metrics against scikit-learn ------------------------------------------------------


def test_mrr_equals_label_ranking_average_precision() -> None:
    from sklearn.metrics import label_ranking_average_precision_score

    rng = np.random.default_rng(7)
    scores = np.round(rng.normal(size=(300, 40)), 1)  # rounded: many ties
    truth = rng.integers(0, 40, size=300)
    ranks = np.array([rank_of_true(row, int(t)) for row, t in zip(scores, truth, strict=True)])
    one_hot = np.zeros_like(scores, dtype=int)
    one_hot[np.arange(300), truth] = 1
    # reference: scikit-learn's label_ranking_average_precision_score, which with one
    # relevant item per row is the mean reciprocal rank (ties counted against the item)
    assert mean_reciprocal_rank(ranks) == pytest.approx(
        label_ranking_average_precision_score(one_hot, scores), abs=1e-12)


@pytest.mark.parametrize("k", [1, 5, 10])
def test_recall_at_k_equals_top_k_accuracy(k: int) -> None:
    from sklearn.metrics import top_k_accuracy_score

    rng = np.random.default_rng(k)
    scores = rng.normal(size=(500, 30))  # continuous: no ties
    truth = rng.integers(0, 30, size=500)
    ranks = np.array([rank_of_true(row, int(t)) for row, t in zip(scores, truth, strict=True)])
    # reference: scikit-learn's top_k_accuracy_score
    assert recall_at(ranks, k) == pytest.approx(
        top_k_accuracy_score(truth, scores, k=k, labels=np.arange(30)), abs=1e-12)


def test_missing_items_count_as_zero() -> None:
    ranks = np.array([1, 0, 2, 0])
    assert mean_reciprocal_rank(ranks) == pytest.approx((1 + 0.5) / 4)
    assert recall_at(ranks, 1) == 0.25
    assert recall_at(ranks, 10) == 0.5


def test_bootstrap_interval_matches_scipy() -> None:
    from scipy.stats import bootstrap

    rng = np.random.default_rng(3)
    values = (rng.random(400) < 0.3).astype(float)
    low, high = bootstrap_ci(values, seed=1, samples=4000)
    # reference: scipy.stats.bootstrap, percentile method (another random stream, so the
    # bounds agree to within Monte Carlo error)
    ref = bootstrap((values,), np.mean, method="percentile", n_resamples=4000,
                    random_state=2).confidence_interval
    assert low == pytest.approx(ref.low, abs=0.01)
    assert high == pytest.approx(ref.high, abs=0.01)
    assert low < values.mean() < high
    assert bootstrap_ci(values, seed=1, samples=4000) == (low, high)


def test_mrr_difference_is_a_paired_bootstrap_matching_scipy() -> None:
    from scipy.stats import bootstrap

    rng = np.random.default_rng(5)
    first = rng.integers(0, 6, size=300)
    second = np.where(rng.random(300) < 0.5, first, rng.integers(0, 6, size=300))
    mean, (low, high) = mrr_difference(first, second, seed=1, samples=4000)
    assert mean == pytest.approx(mean_reciprocal_rank(first) - mean_reciprocal_rank(second))
    # reference: scipy.stats.bootstrap with paired=True (cases resampled together), the
    # percentile method; another random stream, so the bounds agree to Monte Carlo error
    ref = bootstrap((reciprocal(first), reciprocal(second)),
                    lambda a, b, axis=-1: np.mean(a - b, axis=axis), paired=True,
                    method="percentile", n_resamples=4000, random_state=2).confidence_interval
    assert low == pytest.approx(ref.low, abs=0.01)
    assert high == pytest.approx(ref.high, abs=0.01)


def reciprocal(ranks: np.ndarray) -> np.ndarray:
    """1 / rank, 0 for a miss (written out here, not taken from codeseek)."""
    return np.array([1.0 / r if r else 0.0 for r in ranks])


# -- the report's words ----------------------------------------------------------------


def made_report(ranks: dict[str, list[int]], *, adapter: bool = False) -> EvalReport:
    """A report of given ranks on the whole index of 50 units, 125 training pairs."""
    results = tuple(summarise(method, WHOLE, 50, np.array(r), 0) for method, r in ranks.items())
    return EvalReport(repository="toy", model="fake", split=Split(), holdout=20,
                      training=125, corpus=50, results=results, adapter=adapter)


def test_report_names_a_best_method_only_when_its_lead_is_significant() -> None:
    report = made_report({"lexical": [2] * 20, "dense": [0] * 20, "served": [1] * 20})
    lines = report.to_text().splitlines()
    assert lines[-1] == (
        "best on the whole index (50 units): served (MRR 1.000), ahead of lexical (MRR 0.500) "
        "by 0.500 (95% interval of the difference 0.500 to 0.500) on 20 docstrings")
    assert report.to_json()["best"] == {"all": "served"}
    assert report.to_json()["tied"] == {"all": []}
    alone = made_report({"served": [1, 2] * 10})
    assert alone.to_text().splitlines()[-1] == (
        "only one method on the whole index (50 units): served (MRR 0.750) on 20 docstrings")


def test_report_says_no_significant_difference_inside_the_interval() -> None:
    served = [1, 2, 1, 1, 1, 1, 0, 2, 2, 1, 1, 1, 3, 1, 2, 1, 0, 1, 2, 1]
    dense = [1, 1, 2, 1, 3, 1, 0, 1, 2, 1, 1, 4, 1, 1, 2, 1, 0, 1, 1, 2]
    report = made_report({"lexical": [0] * 20, "dense": dense, "served": served})
    _, (low, high) = mrr_difference(served, dense, seed=0)
    assert low < 0 < high  # the lead is inside the interval
    assert report.to_text().splitlines()[-1] == (
        "no significant difference on the whole index (50 units) between served (MRR "
        f"{mean_reciprocal_rank(np.array(served)):.3f}) and dense (MRR "
        f"{mean_reciprocal_rank(np.array(dense)):.3f}) on 20 docstrings (the 95% interval of "
        f"the difference, {low:.3f} to {high:.3f}, includes 0)")
    assert report.to_json()["best"] == {"all": "served"}
    assert report.to_json()["tied"] == {"all": ["dense"]}
    level = made_report({"lexical": [1] * 20, "dense": [1] * 20, "served": [1] * 20})
    assert level.to_text().splitlines()[-1] == (
        "no significant difference on the whole index (50 units) between lexical (MRR 1.000), "
        "dense (MRR 1.000) and served (MRR 1.000) on 20 docstrings (the 95% interval of each "
        "one's difference from lexical includes 0)")


def test_report_header_names_training_pairs_only_with_an_adapter() -> None:
    ranks = {"dense": [1] * 20, "served": [1] * 20}
    plain, tuned = made_report(ranks).to_text(), made_report(ranks, adapter=True).to_text()
    assert plain.splitlines()[:2] == [
        "recall checks on 20 held-out docstrings of toy",
        "(20% held out by unit, seed 0; model fake; served ranking: fusion of standardised "
        "scores (dense weight 0.6))"]
    assert tuned.splitlines()[1] == (
        "(20% held out by unit, seed 0; model fake; served ranking: fusion of standardised "
        "scores (dense weight 0.6), with the query adapter tuned on the 125 training pairs)")
    page = render_html(made_report(ranks))
    assert "training pairs" not in page
    assert "no significant difference on the whole index" in page


# -- queries ---------------------------------------------------------------------------


@pytest.mark.parametrize(("doc", "expected"), [
    ("Return the :func:`os.path.join` of *parts*.\n\nMore text.",
     "Return the os.path.join of parts."),
    ("Load ``config.toml`` and the **environment**.", "Load config.toml and the environment."),
    ("See {@link Fleet#rebalance} for the rules.\n@param x the thing",
     "See Fleet#rebalance for the rules."),
    ("Formats the [`Fare`] as [crowns](https://example.org).", "Formats the Fare as crowns."),
    ("Compute the mean.\nArgs:\n    xs: numbers", "Compute the mean."),
    ("A <b>bold</b> claim\nthat spans lines.", "A bold claim that spans lines."),
])
def test_clean_summary(doc: str, expected: str) -> None:
    assert clean_summary(doc) == expected


def test_a_leading_name_is_stripped() -> None:
    go = unit("NotifyLowBattery", language="go",
              doc="NotifyLowBattery pages whoever is on call.")
    assert query_of(go) == ("pages whoever is on call.", True)
    method = CodeUnit(path="a.go", language="go", kind="method", name="Seen",
                      qualname="(*HeartbeatTracker).Seen", signature="", doc="", start_line=1,
                      end_line=1, code="")
    assert strip_leading_name("Seen records that a packet arrived.", method) == (
        "records that a packet arrived.", True)
    plain = unit("load", doc="Read the settings file.")
    assert query_of(plain) == ("Read the settings file.", False)
    assert strip_leading_name("load", plain) == ("load", False)  # nothing would be left


# -- selection and split ---------------------------------------------------------------


def test_selection_leaves_out_short_ambiguous_and_duplicate_units() -> None:
    units = [
        unit("a", "Parse the dock packet header."),
        unit("b", "Short doc."),
        unit("c", "Emit a log record.", body="return 1"),
        unit("d", "Emit a log record!", body="return 2"),  # the same doc, normalised
        unit("e", "Copy one thing here.", body="x = 1", path="p.py"),
        unit("e", "Copy another thing here.", body="x = 1", path="q.py"),  # the same body
        unit("f"),
    ]
    everything = select_cases(units, Split(holdout=1.0))
    assert [units[c.position].name for c in everything.held_out] == ["a"]
    assert (everything.short, everything.undocumented) == (1, 1)
    assert (everything.duplicate_docs, everything.duplicate_bodies) == (2, 2)
    training = select_cases(units, Split(holdout=1e-9))
    assert not training.held_out
    assert {(units[c.position].name, c.unique) for c in training.training} == {
        ("a", True), ("c", False), ("d", False), ("e", False)}


def test_split_is_deterministic_and_by_file_keeps_files_whole() -> None:
    units = [unit(f"f{i}", path=f"pkg/m{i % 97}.py") for i in range(3000)]
    by_unit = Split(0.2, seed=5)
    held = [by_unit.held_out(u) for u in units]
    assert held == [Split(0.2, seed=5).held_out(u) for u in units]
    assert 0.17 < sum(held) / len(held) < 0.23
    assert held != [Split(0.2, seed=6).held_out(u) for u in units]
    by_file = Split(0.2, seed=5, by_file=True)
    sides: dict[str, set[bool]] = {}
    for u in units:
        sides.setdefault(u.path, set()).add(by_file.held_out(u))
    assert all(len(side) == 1 for side in sides.values())
    assert {True, False} == set().union(*sides.values())


@pytest.mark.parametrize("share", [0.0, -0.1, 1.5])
def test_a_bad_share_is_a_clear_error(share: float) -> None:
    with pytest.raises(InvalidSplit, match=r"^--holdout must be a share above 0 and at most 1"):
        select_cases([unit("a", "Parse the dock packet.")], Split(holdout=share))


# -- documents, pools and the served ranking -------------------------------------------


def corpus(n: int = 60) -> list[CodeUnit]:
    words = ["parse", "packet", "charge", "card", "refund", "rider", "station", "battery",
             "route", "van", "fare", "peak", "ticket", "mechanic", "upload", "retry"]
    rng = np.random.default_rng(11)
    units = []
    for i in range(n):
        picked = rng.choice(words, 4, replace=False)
        doc = f"{picked[0]} the {picked[1]} for the {picked[2]} quickly"
        body = f"{picked[1]}_{picked[3]} = helper_{i}({picked[2]})"
        language = "python" if i % 3 else "go"
        units.append(unit(f"{picked[0]}_{picked[1]}_{i}", doc, body, f"src/m{i % 7}.py",
                          language))
    return units


def test_documents_carry_no_doc() -> None:
    units = [unit("alpha", "zebra giraffe pelican", body="return compute_total()")]
    python_doc = CodeUnit(path="m.py", language="python", kind="function", name="beta",
                          qualname="beta", signature="def beta():", doc="walrus narwhal",
                          start_line=1, end_line=3,
                          code='def beta():\n    """walrus narwhal"""\n    return 1\n',
                          doc_span=(16, 33))
    units.append(python_doc)
    documents = build_documents(units, FakeEmbedder())
    for original, bare in zip(units, documents.units, strict=True):
        assert bare.doc == "" and original.doc.split()[0] not in bare.embed_text()
    assert documents.lexical("zebra giraffe").size == 0  # words of the doc only
    assert documents.lexical("walrus").size == 0
    assert documents.lexical("compute total").tolist() == [0]


def test_pools_are_same_language_distinct_and_reproducible() -> None:
    units = corpus(90)
    documents = DocumentIndex(units, FakeEmbedder().encode([u.qualname for u in units]),
                              "fake")
    sampler = PoolSampler(documents, seed=0)
    assert sampler.fits(1, 60) and not sampler.fits(0, 31)
    pool = sampler.pool(1, 50)
    assert pool[0] == 1 and len(set(pool.tolist())) == 50
    assert {units[i].language for i in pool} == {"python"}
    assert sampler.pool(1, 50).tolist() == pool.tolist()
    assert PoolSampler(documents, seed=1).pool(1, 50).tolist() != pool.tolist()


def test_served_in_the_checks_is_what_a_searcher_returns() -> None:
    units = corpus()
    embedder = FakeEmbedder()
    documents = build_documents(units, embedder)
    searcher = Searcher(documents.store, documents.ann(), embedder, embedder.model_id)
    for query in ("charge the card", "retry the upload for the rider", "peak fare"):
        vector = embedder.encode([query])[0]
        served, _ = searcher.ranked(query, vector, CANDIDATES)
        dense = [(label, score) for label, score in documents.ann().search(vector, CANDIDATES)]
        order, scores = documents.lexical_scored(query)
        lexical = [(int(documents.row_ids[p]), float(s))
                   for p, s in zip(order, scores, strict=True)]
        assert fuse(dense, lexical[:CANDIDATES])[:CANDIDATES] == served
        assert served  # the query words occur in the corpus


# -- the whole check -------------------------------------------------------------------


def test_evaluate_units_reports_every_method() -> None:
    report = evaluate_units(corpus(), FakeEmbedder(), repository="toy", split=Split(0.5))
    assert report.holdout == len(select_cases(corpus(), Split(0.5)).held_out) > 0
    assert [(r.method, r.pool) for r in report.results] == [
        ("lexical", WHOLE), ("dense", WHOLE), ("dense-ann", WHOLE), ("served", WHOLE)]
    for result in report.results:
        assert result.n == report.holdout and result.pool_size == 60
        assert result.metrics["recall@1"] <= result.metrics["recall@5"] \
            <= result.metrics["recall@10"]
        low, high = result.ci95["mrr"]
        assert low <= result.mrr <= high
        assert sum(count for _, count in rank_histogram(result.ranks)) == result.n
    # on a corpus this small HNSW finds every unit, in the exact order but for how it
    # breaks ties (the exact rank counts a tie against the true unit)
    exact, ann = report.result("dense", WHOLE), report.result("dense-ann", WHOLE)
    assert exact is not None and ann is not None
    assert all(0 < a <= e for a, e in zip(ann.ranks, exact.ranks, strict=True))


def test_pools_appear_where_a_language_is_big_enough() -> None:
    from codeseek.evaluate import evaluate_prepared, prepare

    units = corpus(90)
    prepared = prepare(units, FakeEmbedder(), Split(0.5))
    import codeseek.evaluate as ev

    signals = ev.collect_signals(prepared.selection.held_out,
                                 ev.query_matrix(prepared, prepared.selection.held_out),
                                 prepared.documents, prepared.sampler, sizes=(50,))
    python_cases = {i for i, c in enumerate(prepared.selection.held_out)
                    if units[c.position].language == "python"}
    assert set(signals.lexical[50].cases.tolist()) == python_cases
    assert evaluate_prepared(prepared, repository="toy", model="fake", split=Split(0.5)).pools \
        == [WHOLE]


def test_pool_candidates_are_an_exact_search_of_the_pool() -> None:
    from codeseek.evaluate import dense_signals, protocols_for
    from codeseek.vectors import exact_search

    units = corpus(90)
    documents = build_documents(units, FakeEmbedder())
    sampler = PoolSampler(documents, seed=0)
    cases = select_cases(units, Split(0.5)).held_out
    queries = FakeEmbedder().encode([c.query for c in cases])
    signals = dense_signals(cases, queries, documents, sampler,
                            protocols_for(cases, sampler, (50,)))[50]
    for slot, index in enumerate(signals.cases):
        pool = sampler.pool(cases[index].position, 50)
        # reference: numpy brute-force search over the pool's vectors (vectors.exact_search)
        expected = exact_search(queries[index], pool, documents.vectors[pool], CANDIDATES)
        ids, scores = signals.tops[slot]
        assert scores.tolist() == pytest.approx([score for _, score in expected], abs=1e-6)
        assert sorted(ids.tolist()) == sorted(label for label, _ in expected)


def test_too_few_docs_is_a_clear_error() -> None:
    with pytest.raises(TooFewExamples, match="^no held-out docstrings to check"):
        evaluate_units([unit("a"), unit("b", "Two words.")], FakeEmbedder(), repository="r")


def test_index_evaluate_json_shape_and_cache(fake_index: Index) -> None:
    embedder = fake_index.embedder
    assert isinstance(embedder, FakeEmbedder)
    report = fake_index.evaluate()
    data = json.loads(json.dumps(report.to_json()))
    assert set(data) >= {"repository", "model", "holdout", "results"}
    assert data["holdout"] == report.holdout > 0
    for record in data["results"]:
        assert record["method"] in ("lexical", "dense", "dense-ann", "served")
        assert record["pool"] in (1000, 10000, "all")
        assert set(record) >= {"n", "recall@1", "recall@5", "recall@10", "mrr", "ci95"}
        assert set(record["ci95"]) == {"recall@1", "recall@5", "recall@10", "mrr"}
    encoded = embedder.texts_encoded
    again = fake_index.evaluate()
    assert embedder.texts_encoded == encoded  # every vector came from the cache
    assert again.to_json() == report.to_json()


def test_html_report_is_self_contained(fake_index: Index) -> None:
    page = render_html(fake_index.evaluate())
    assert page.startswith("<!doctype html>") and page.count("<svg") >= 5
    assert not re.search(r"""(src|href)\s*=\s*["']?https?:""", page)


# -- the command line ------------------------------------------------------------------


@pytest.fixture
def indexed(sample_copy: Path) -> Path:
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    return sample_copy


def test_cli_eval_table_json_and_html(indexed: Path, tmp_path: Path) -> None:
    code, out, err = run_cli("eval", str(indexed), "--backend", "fake")
    assert code == 0, err
    assert out.startswith("recall checks on ")
    assert re.search(r"^served +\d+ +\d+ ", out, flags=re.MULTILINE)
    assert re.search(r"^(best|no significant difference) on the whole index \(", out,
                     flags=re.MULTILINE)
    assert "training pairs" not in out  # no adapter: nothing was trained
    code, out, _ = run_cli("eval", str(indexed), "--backend", "fake", "--json", "--seed", "3",
                           "--holdout", "0.5", "--by-file")
    data = json.loads(out)
    assert data["split"] == {"holdout": 0.5, "seed": 3, "by_file": True}
    page = tmp_path / "report.html"
    code, _, _ = run_cli("eval", "--repo", str(indexed), "--backend", "fake", "--html",
                         str(page))
    assert code == 0 and "<svg" in page.read_text(encoding="utf-8")


def test_cli_eval_errors(indexed: Path, tmp_path: Path) -> None:
    code, _, err = run_cli("eval", str(indexed), "--backend", "fake", "--holdout", "0")
    assert (code, err) == (1, "error: --holdout must be a share above 0 and at most 1, not 0.0\n")
    empty = tmp_path / "empty"
    empty.mkdir()
    code, _, err = run_cli("eval", str(empty), "--backend", "fake")
    assert (code, err) == (1, f"error: no index at {empty / '.codeseek'}; "
                              "build one with `codeseek index`; for an index built "
                              "elsewhere, give --index-dir DIR or set CODESEEK_INDEX_DIR\n")
    target = tmp_path / "no" / "such" / "report.html"
    code, _, err = run_cli("eval", str(indexed), "--backend", "fake", "--html", str(target))
    assert (code, err) == (1, f"error: {target}: cannot write the report: the folder "
                              f"{target.parent} does not exist\n")


# -- the real model (marker: model) ----------------------------------------------------


@pytest.fixture(scope="module")
def real_index(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Index]:
    import shutil

    from codeseek import open_index

    repo = tmp_path_factory.mktemp("eval-model") / "repo"
    shutil.copytree(SAMPLE_REPO, repo)
    index = open_index(repo, create=True)
    index.update()
    yield index
    index.close()


@pytest.mark.model
def test_the_checks_do_not_let_the_doc_give_the_answer_away(real_index: Index) -> None:
    report = real_index.evaluate()
    checked = report.result("dense", WHOLE)
    assert checked is not None and checked.n == report.holdout > 20
    # the same held-out queries against the index's own vectors, which embed the docs
    stored = list(real_index.store.iter_units())
    cases = select_cases([s.unit for s in stored], Split()).held_out
    model = real_index.embedder
    labels, matrix = real_index.store.unit_vectors(model.model_id, model.dim)
    assert labels.tolist() == [s.id for s in stored]
    queries = model.encode([c.query for c in cases])
    leaked = mean_reciprocal_rank(np.array([
        rank_of_true(matrix @ query, case.position) for case, query in zip(cases, queries,
                                                                         strict=True)]))
    assert leaked > 0.8  # with its doc inside, a unit is nearly always found first
    assert checked.mrr < leaked - 0.2


# -- the served fusion -----------------------------------------------------------------


def test_fusion_rules_by_hand() -> None:
    from codeseek.search import Fusion

    dense = [(1, 0.9), (2, 0.8)]
    lexical = [(2, 10.0), (3, 5.0)]
    # rrf, k 5, dense weight 0.6: unit 1: 0.6/6; unit 2: 0.6/7 + 0.4/6; unit 3: 0.4/7
    rrf = fuse(dense, lexical, Fusion("rrf", 0.6, 5))
    assert [i for i, _ in rrf] == [2, 1, 3]
    assert [s for _, s in rrf] == pytest.approx([0.6 / 7 + 0.4 / 6, 0.6 / 6, 0.4 / 7])
    # scaled to [0, 1] per side: unit 1: 0.6 * 1; unit 2: 0.6 * 0 + 0.4 * 1; unit 3: 0
    linear = fuse(dense, lexical, Fusion("linear", 0.6))
    assert linear == [(1, pytest.approx(0.6)), (2, pytest.approx(0.4)), (3, 0.0)]
    # standardised per side (sd 0.05 and 2.5, both two apart from the worst): 1.2, 0.8, 0
    zscore = fuse(dense, lexical, Fusion("zscore", 0.6))
    assert zscore == [(1, pytest.approx(1.2)), (2, pytest.approx(0.8)), (3, 0.0)]


def test_fusion_ties_go_to_the_higher_cosine_then_the_lower_id() -> None:
    from codeseek.search import Fusion

    fused = fuse([(7, 0.5), (4, 0.5)], [(4, 1.0), (7, 1.0)], Fusion("linear", 0.5))
    assert [i for i, _ in fused] == [4, 7]
    fused = fuse([(9, 0.2)], [(3, 2.0)], Fusion("rrf", 0.5, 5))
    assert [i for i, _ in fused] == [9, 3]


# -- one served ranking ------------------------------------------------------------------


def big_corpus(n: int) -> list[CodeUnit]:
    """n units, every one mentioning rides (so a query's keyword matches outnumber the
    candidates search fetches), a third of them Go."""
    words = ["parse", "packet", "charge", "card", "refund", "rider", "station", "battery",
             "route", "van", "fare", "peak", "ticket", "mechanic", "upload", "retry",
             "dock", "zone", "pass", "meter", "brake", "tyre", "lock", "shift"]
    rng = np.random.default_rng(7)
    units = []
    for i in range(n):
        a, b, c, d = rng.choice(words, 4, replace=False)
        doc = f"{a} the {b} of a ride for the {c}" if i % 40 == 0 else ""
        units.append(unit(f"{a}_{b}_{i}", doc, f"ride_{d} = {b}_{c}({i})", f"src/m{i % 9}.py",
                          "go" if i % 3 == 0 else "python"))
    return units


def test_eval_served_rank_is_the_rank_search_serves_on_every_pool() -> None:
    from codeseek.evaluate import collect_signals, rank_in, served_ranks
    from codeseek.search import DEFAULT_FUSION

    units = big_corpus(4500)
    embedder = FakeEmbedder()
    documents = build_documents(units, embedder)
    sampler = PoolSampler(documents, seed=0)
    cases = select_cases(units, Split(0.5)).held_out
    queries = embedder.encode([c.query for c in cases])
    signals = collect_signals(cases, queries, documents, sampler, sizes=(50, 1000))
    assert set(signals.lexical) == {50, 1000, WHOLE}
    assert len(documents.lexical(cases[0].query)) > 20 * CANDIDATES  # more than search fetches
    # the served path itself: a Searcher over the same doc-less store and HNSW index
    searcher = Searcher(documents.store, documents.ann(), embedder, embedder.model_id)
    k = CANDIDATES // 3  # search fuses its best CANDIDATES of each side, as eval does
    compared = 0
    for pool, members in signals.lexical.items():
        ranks = served_ranks(cases, *signals.served_for(pool), DEFAULT_FUSION)
        for slot, index in enumerate(members.cases.tolist()):
            case = cases[index]
            allowed = (None if pool == WHOLE else
                       set(documents.row_ids[sampler.pool(case.position, int(pool))].tolist()))
            ranked, _ = searcher.ranked(case.query, queries[index], k, allowed)
            served = rank_in(documents.positions([row for row, _ in ranked]), case.position)
            assert served == (ranks[slot] if ranks[slot] <= k else 0), (pool, case.query)
            compared += 1
    assert compared == sum(len(m.cases) for m in signals.lexical.values()) > 100


def test_a_narrow_pool_keeps_its_keyword_matches_however_far_down_they_rank() -> None:
    units = big_corpus(4500)
    documents = build_documents(units, FakeEmbedder())
    query = "ride"
    order = documents.lexical(query)
    assert len(order) > 20 * CANDIDATES
    last = documents.row_ids[order[-4:]].tolist()  # the weakest matches of the whole index
    searcher = Searcher(documents.store, documents.ann(), FakeEmbedder(), "fake")
    hits = searcher.lexical(query, CANDIDATES, set(last))
    # reference: the store's own full BM25 order, narrowed to the pool by hand
    assert [row for row, _ in hits] == last
