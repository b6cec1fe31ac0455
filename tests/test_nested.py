"""The nested-helper rules of the served ranking (``Fusion.nested``, codeseek/fusion.py).

Where nesting is found: ``enclosing_map`` over units and ``Store.enclosing`` over an
index, both checked against Python's own ``ast`` on standard-library modules (the
reference: a ``def`` whose nearest enclosing ``def``/``class`` scope is a ``def``, named
as PEP 3155's ``__qualname__`` names it, without ``<locals>``). What the rules do: on a
repository of our own invention, searched with the fake embedder.
"""

from __future__ import annotations

import ast
import json
import sysconfig
from dataclasses import replace
from pathlib import Path

import pytest

from codeseek import FakeEmbedder, open_index
from codeseek.fusion import DEFAULT_FUSION, NESTED_RULE, Fusion, enclosing_map, fuse
from codeseek.languages import spec_for_path
from codeseek.multi import Basis, Sides, pooled_ranking
from codeseek.parse import parse_source

STDLIB = Path(sysconfig.get_paths()["stdlib"])
# standard-library modules with functions defined in functions and in methods, some
# under if/try, and redefinitions (checked to hold some by the test itself)
MODULES = ("functools.py", "contextlib.py", "argparse.py", "typing.py", "dataclasses.py",
           "inspect.py", "asyncio/tasks.py", "tarfile.py", "doctest.py", "unittest/mock.py")

ENCLOSING_FIRST = replace(DEFAULT_FUSION, nested="enclosing-first")


def _ast_nesting(source: str) -> dict[tuple[str, int], tuple[str, int]]:
    """(qualname, def line) of every def nested in a def -> its enclosing def's, as the
    ast scopes say (reference: Python's ``ast``)."""
    found: dict[tuple[str, int], tuple[str, int]] = {}

    def walk(node: ast.AST, prefix: str, scope: ast.AST | None, scope_name: str) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.FunctionDef | ast.AsyncFunctionDef | ast.ClassDef):
                name = f"{prefix}{child.name}"
                if isinstance(scope, ast.FunctionDef | ast.AsyncFunctionDef) and not \
                        isinstance(child, ast.ClassDef):
                    found[(name, child.lineno)] = (scope_name, scope.lineno)
                walk(child, name + ".", child, name)
            else:
                walk(child, prefix, scope, scope_name)

    walk(ast.parse(source), "", None, "")
    return found


@pytest.mark.parametrize("module", MODULES)
def test_nesting_matches_python_ast(module: str) -> None:
    source = (STDLIB / module).read_bytes()
    spec = spec_for_path(module)
    assert spec is not None
    units = parse_source(module, source, spec).units
    nesting = enclosing_map(enumerate(units))
    ours = {(units[i].qualname, units[i].start_line): (units[p].qualname, units[p].start_line)
            for i, p in nesting.items()}
    expected = _ast_nesting(source.decode("utf-8"))
    assert expected, f"{module} has no nested function to check"
    assert ours == expected


def test_store_finds_the_same_nesting_as_the_units(tmp_path: Path) -> None:
    repo = tmp_path / "repo"
    repo.mkdir()
    for module in MODULES[:4]:
        (repo / module).write_bytes((STDLIB / module).read_bytes())
    with open_index(repo, create=True, embedder=FakeEmbedder()) as index:
        index.update()
        stored = list(index.store.iter_units())
        expected = enclosing_map((s.id, s.unit) for s in stored)
        assert expected
        assert index.store.enclosing([s.id for s in stored]) == expected
        # asked for some units only: exactly those of them that are nested helpers
        some = [s.id for s in stored][::3]
        assert index.store.enclosing(some) == {i: p for i, p in expected.items() if i in some}


# -- what the rules do --------------------------------------------------------------

DEPOT = '''\
def restock_kiosk(kiosk, crates):
    """Fill a kiosk again from the crates that came in this morning."""
    def refill_shelf(shelf, crate):
        # refill the shelf with snacks: refill shelf snacks refill shelf snacks
        shelf.snacks.extend(crate.snacks)
        return shelf

    for shelf, crate in zip(kiosk.shelves, crates):
        refill_shelf(shelf, crate)
    return kiosk


def count_snacks(shelf):
    """How many snacks sit on one shelf (refill when few)."""
    return len(shelf.snacks)


class Kiosk:
    def refill(self, shelf):
        """Refill one shelf of this kiosk with snacks."""
        return shelf


def shelf_label(shelf):
    """The printed label of a shelf: its snacks by name."""
    return ", ".join(s.name for s in shelf.snacks)
'''
QUERY = "refill the shelf with snacks"


def _depot(tmp_path: Path) -> Path:
    repo = tmp_path / "depot"
    repo.mkdir()
    (repo / "restock.py").write_text(DEPOT, encoding="utf-8")
    return repo


def _ranking(repo: Path, fusion: Fusion) -> list[tuple[str, float]]:
    with open_index(repo, create=True, embedder=FakeEmbedder()) as index:
        index.update()
        searcher = index.searcher()
        searcher.fusion = fusion
        return [(hit.qualname, hit.score) for hit in searcher.search(QUERY, k=10)]


def test_enclosing_function_outranks_its_nested_helper(tmp_path: Path) -> None:
    repo = _depot(tmp_path)
    plain = [name for name, _ in _ranking(repo, replace(DEFAULT_FUSION, nested="none"))]
    # without the rule the helper comes first: what the rule is for
    assert plain.index("restock_kiosk.refill_shelf") < plain.index("restock_kiosk")
    ranked = _ranking(repo, ENCLOSING_FIRST)
    names = [name for name, _ in ranked]
    helper = names.index("restock_kiosk.refill_shelf")
    assert names[helper - 1] == "restock_kiosk"  # just above its helper
    # every other unit keeps its order, and the scores still fall down the list
    others = [n for n in plain if n != "restock_kiosk"]
    assert [n for n in names if n != "restock_kiosk"] == others
    scores = [score for _, score in ranked]
    assert scores == sorted(scores, reverse=True)


@pytest.mark.parametrize("rule,amount", [("scaled", 0.5), ("lowered", 100.0)])
def test_penalty_rules_lower_only_nested_helpers(tmp_path: Path, rule: str,
                                                 amount: float) -> None:
    repo = _depot(tmp_path)
    plain = [name for name, _ in _ranking(repo, replace(DEFAULT_FUSION, nested="none"))]
    names = [name for name, _ in _ranking(repo, replace(DEFAULT_FUSION, nested=rule,
                                                          nested_amount=amount))]
    helper = "restock_kiosk.refill_shelf"
    assert [n for n in names if n != helper] == [n for n in plain if n != helper]
    assert names.index(helper) > plain.index(helper)


def test_served_rule_lowers_a_helper_by_its_amount_only(tmp_path: Path) -> None:
    plain = dict(_ranking(_depot(tmp_path), replace(DEFAULT_FUSION, nested="none")))
    (tmp_path / "again").mkdir()
    served = dict(_ranking(_depot(tmp_path / "again"), DEFAULT_FUSION))
    assert DEFAULT_FUSION.nested == NESTED_RULE != "none"
    helper = "restock_kiosk.refill_shelf"
    assert served.pop(helper) == pytest.approx(plain.pop(helper) - DEFAULT_FUSION.nested_amount)
    assert served == plain


def test_fuse_leaves_units_without_nesting_alone() -> None:
    dense = [(1, 0.9), (2, 0.8), (3, 0.7), (4, 0.6)]
    lexical = [(3, 12.0), (1, 9.0), (4, 1.0)]
    plain = fuse(dense, lexical, replace(DEFAULT_FUSION, nested="none"))
    for rule in ("enclosing-first", "scaled", "lowered"):
        fusion = replace(DEFAULT_FUSION, nested=rule, nested_amount=0.5)
        assert fuse(dense, lexical, fusion, {}) == plain
        assert fuse(dense, lexical, fusion, {9: 8}) == plain  # helpers not among them
    # a chain: 3 in 2 in 1, with 3 best: 2 and 1 come just above it, in nesting order
    chain = fuse([(3, 0.9), (2, 0.5), (1, 0.4), (4, 0.8)], [], ENCLOSING_FIRST, {3: 2, 2: 1})
    assert [item for item, _ in chain] == [1, 2, 3, 4]


def test_fusion_written_before_the_rule_still_loads() -> None:
    # a fusion and a merge basis as codeseek wrote them before Fusion.nested existed
    old = {"kind": "zscore", "dense_weight": 0.7, "rrf_k": 5}
    fusion = Fusion.from_json(json.loads(json.dumps(old)))
    assert (fusion.kind, fusion.dense_weight, fusion.rrf_k) == ("zscore", 0.7, 5.0)
    assert fusion.nested == NESTED_RULE
    assert Fusion.from_json(fusion.to_json()) == fusion
    basis = Basis.from_json({"model_id": "m", "fusion": old, "stats": [], "off_topic": []})
    assert Fusion.from_json(basis.fusion) == fusion
    sides = Sides.from_json({"dense": [[1, 0.5]], "lexical": [], "cosines": []})
    assert sides.enclosing == {}
    assert pooled_ranking([sides], 1, basis.fusion)[0][1].unit_id == 1
    with pytest.raises(ValueError, match="nested-helper rule"):
        Fusion.from_json({**old, "nested": "sideways"})


def test_adapter_saved_before_the_rule_still_loads(tmp_path: Path) -> None:
    import numpy as np

    from codeseek.adapter import QueryAdapter, load_adapter, save_adapter

    repo = _depot(tmp_path)
    with open_index(repo, create=True, embedder=FakeEmbedder()) as index:
        index.update()
        searcher = index.searcher()
        header = {"fusion": {"kind": "zscore", "dense_weight": 0.8, "rrf_k": 5}}
        adapter = QueryAdapter(np.eye(searcher.vectors.dim, dtype=np.float32),
                               searcher.model_id, header)
        save_adapter(index.settings.index_dir, adapter)
        assert load_adapter(index.settings.index_dir, searcher.model_id) is not None
        reloaded = index.searcher()
        assert reloaded.fusion == replace(DEFAULT_FUSION, dense_weight=0.8)
        assert reloaded.search(QUERY, k=3)


def test_sides_carry_nesting_through_json(tmp_path: Path) -> None:
    repo = _depot(tmp_path)
    with open_index(repo, create=True, embedder=FakeEmbedder()) as index:
        index.update()
        searcher = index.searcher()
        stats = [searcher.corpus_stats(QUERY)]
        sides = searcher.sides([QUERY], 10, None, stats)[0]
        assert len(sides.enclosing) == 1
        assert Sides.from_json(json.loads(json.dumps(sides.to_json()))) == sides
        # one index merged alone ranks as its own search does, under the rule
        searcher.fusion = ENCLOSING_FIRST
        own = [unit for unit, _ in searcher.ranked(QUERY, searcher.query_vectors([QUERY])[0],
                                                   10)[0]]
        merged = [pick.unit_id for _, pick in
                  pooled_ranking([sides], 10, ENCLOSING_FIRST.to_json())]
        assert merged == own

