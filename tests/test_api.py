"""The public API: one list of names in stage order (thinning/__init__.py), each documented."""

import importlib

import thinning


def test_every_public_name_resolves_to_its_stage_and_has_a_docstring():
    for name in thinning.__all__[1:]:
        value = getattr(thinning, name)
        assert value.__doc__ and value.__doc__.strip(), name
        module = thinning._PUBLIC[name]
        assert getattr(importlib.import_module(module), name) is value, name


def test_an_unknown_name_is_an_attribute_error():
    try:
        thinning.no_such_stage
    except AttributeError as exc:
        assert "no_such_stage" in str(exc)
    else:
        raise AssertionError("an unknown name resolved")


def test_the_module_docstring_lists_every_public_name():
    listed = thinning.__doc__
    missing = [name for name in thinning.__all__[1:] if f"`{name}`" not in listed]
    assert not missing
