"""The public API: every name in voicer.__all__ resolves, the further ones lazily, to the
object of the module that defines it."""

from __future__ import annotations

import importlib
import subprocess
import sys

import voicer


def test_every_public_name_resolves_to_its_module_object() -> None:
    for name in voicer.__all__:
        value = getattr(voicer, name)
        module = voicer._LAZY.get(name)
        if module is not None:
            assert value is getattr(importlib.import_module(module), name), name


def test_import_voicer_stays_light() -> None:
    # The lazy names are not imported with the package (a fresh interpreter).
    code = "import sys, voicer; print('voicer.engine.renderer' in sys.modules, 'voicer.report.compare' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert out == ["False", "False"]


def test_unknown_names_are_attribute_errors() -> None:
    try:
        voicer.no_such_thing  # noqa: B018
    except AttributeError as exc:
        assert "no_such_thing" in str(exc)
    else:
        raise AssertionError("voicer.no_such_thing did not raise")
