"""The public surface stays small and honest."""

from __future__ import annotations

import codeseek


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
