"""The public surface stays small and honest."""

from __future__ import annotations

import json

import pytest
from hypothesis import given
from hypothesis import strategies as st

import codeseek
from codeseek.query import Filters, Query


def test_all_names_exist_and_nothing_else_is_public() -> None:
    for name in codeseek.__all__:
        assert getattr(codeseek, name) is not None
    public = {n for n in dir(codeseek) if not n.startswith("_")}
    # submodules imported by the lazy loader may appear; everything else must be in __all__
    import types

    extra = {n for n in public if not isinstance(getattr(codeseek, n), types.ModuleType)}
    assert extra <= set(codeseek.__all__) | {"annotations", "importlib", "TYPE_CHECKING", "Any"}


def test_unknown_attribute_is_an_attribute_error() -> None:
    try:
        codeseek.no_such_thing  # type: ignore[attr-defined]  # noqa: B018
    except AttributeError as exc:
        assert "no_such_thing" in str(exc)
    else:
        raise AssertionError("expected AttributeError")


def test_error_family() -> None:
    from codeseek import errors

    for name in dir(errors):
        value = getattr(errors, name)
        if isinstance(value, type) and issubclass(value, Exception) and value.__module__ == \
                errors.__name__:
            assert issubclass(value, errors.CodeseekError)
            assert name in (errors.__doc__ or ""), f"{name} is missing from the error tree"


def test_the_seam_is_exported() -> None:
    from codeseek.service import SearchService, connect

    assert {"connect", "Query", "SearchService", "Filters"} <= set(codeseek.__all__)
    assert (codeseek.connect, codeseek.Query, codeseek.SearchService) == \
        (connect, Query, SearchService)


# -- the query value and its JSON (the daemon's wire format) --------------------------------

texts = st.text(st.characters(exclude_categories=()), max_size=20)  # lone surrogates too
filters = st.builds(Filters, languages=st.lists(texts, max_size=3).map(tuple),
                    paths=st.lists(texts, max_size=3).map(tuple),
                    kinds=st.lists(texts, max_size=3).map(tuple),
                    since=st.one_of(st.none(), st.floats(allow_nan=False, allow_infinity=False)))
queries = st.one_of(
    st.builds(Query, text=texts, k=st.integers(-(2**63), 2**63 - 1), filters=filters),
    st.builds(Query, unit_id=st.integers(-(2**63), 2**63 - 1), k=st.integers(0, 10**6),
              filters=filters))


@given(query=queries)
def test_a_query_comes_back_whole_from_its_json(query: Query) -> None:
    # through the standard library's JSON text and back, as the daemon reads it
    assert Query.from_json(json.loads(json.dumps(query.to_json()))) == query


def test_a_query_reads_missing_fields_as_their_defaults() -> None:
    assert Query.from_json({"text": "refund"}) == Query(text="refund", k=10, filters=Filters())
    assert Query.from_json({"unit_id": 7, "filters": {"since": 5}}) == \
        Query(unit_id=7, filters=Filters(since=5.0))


@pytest.mark.parametrize("record, words", [
    ([], "a query must be an object"),
    ({}, "a query holds 'text' or 'unit_id', one of them"),
    ({"text": "x", "unit_id": 1}, "a query holds 'text' or 'unit_id', one of them"),
    ({"text": 3}, "'text' must be a string"),
    ({"unit_id": True}, "'unit_id' must be a whole number"),
    ({"text": "x", "k": 2.5}, "'k' must be a whole number"),
    ({"text": "x", "colour": "teal"}, "unknown query field 'colour'"),
    ({"text": "x", "filters": []}, "'filters' must be an object"),
    ({"text": "x", "filters": {"kinds": "class"}}, "'kinds' must be a list of strings"),
    ({"text": "x", "filters": {"since": "3d"}},
     "'since' must be a time in seconds since 1970, or null"),
    ({"text": "x", "filters": {"since": float("inf")}},
     "'since' must be a time in seconds since 1970, or null"),
])
def test_a_malformed_query_names_the_field(record: object, words: str) -> None:
    with pytest.raises(ValueError) as caught:
        Query.from_json(record)
    assert str(caught.value) == words
