"""Plugin host: discovery of the built-ins, broken plugins reported by name, load_plugin, `voicer plugins`.

References: the entry-point registrations in pyproject.toml (read here with tomllib, so the
expectation comes from the packaging metadata, not from the host); importlib.metadata's
EntryPoint as the real discovery object.
"""

from __future__ import annotations

import importlib
import re
import sys
import textwrap
import tomllib
from importlib.metadata import EntryPoint
from pathlib import Path
from typing import Iterator

import pytest

from voicer.cli import main
from voicer.engine.host import GROUPS, PluginInfo, Sink, discover, format_plugins, load_plugin
from voicer.errors import VoicerError

PYPROJECT = Path(__file__).resolve().parent.parent / "pyproject.toml"
# The built-ins the package promises (the brief and pyproject.toml agree; checked below).
BUILTINS = {
    "models": {"physical", "additive"},
    "effects": {"room"},
    "sinks": {"null", "file", "portaudio"},
    "sources": {"midi-file", "midi-port"},
}
SINKS = GROUPS["sinks"][0]

GOOD_MODULE = '''
class GoodSink:
    """Follows the Sink protocol: every member present."""
    name = "good"
    realtime = False
    def open(self, *, sample_rate, channels, block, callback=None): ...
    def write(self, block): ...
    def close(self): ...

class HalfSink:
    """Lacks realtime and write."""
    name = "half"
    def open(self, *, sample_rate, channels, block, callback=None): ...
    def close(self): ...

NOT_A_CLASS = 42
'''
BROKEN_MODULE = 'raise RuntimeError("needs the vendor library libfoo")\n'


@pytest.fixture
def plugin_modules(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[tuple[str, str]]:
    """Two importable modules in tmp_path: one with test classes, one that raises on import."""
    good, broken = "voicer_test_plugins_good", "voicer_test_plugins_broken"
    (tmp_path / f"{good}.py").write_text(textwrap.dedent(GOOD_MODULE), encoding="utf-8")
    (tmp_path / f"{broken}.py").write_text(BROKEN_MODULE, encoding="utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))
    yield good, broken
    for name in (good, broken):
        sys.modules.pop(name, None)


def fake_entry_points(eps: list[EntryPoint]):
    """Stands in for importlib.metadata.entry_points(group=...)."""
    def entry_points(*, group: str) -> list[EntryPoint]:
        return [ep for ep in eps if ep.group == group]
    return entry_points


@pytest.fixture
def mixed(plugin_modules: tuple[str, str]) -> list[PluginInfo]:
    good, broken = plugin_modules
    eps = [
        EntryPoint(name="explodes", value=f"{broken}:Anything", group=SINKS),
        EntryPoint(name="half", value=f"{good}:HalfSink", group=SINKS),
        EntryPoint(name="number", value=f"{good}:NOT_A_CLASS", group=SINKS),
        EntryPoint(name="good", value=f"{good}:GoodSink", group=SINKS),
        EntryPoint(name="gone", value="voicer_test_no_such_module:X", group=SINKS),
        EntryPoint(name="typo", value=f"{good}:GoodSinc", group=SINKS),
        # Same good class registered in the wrong group: it is not a Source.
        EntryPoint(name="misfiled", value=f"{good}:GoodSink", group=GROUPS["sources"][0]),
    ]
    return discover(entry_points=fake_entry_points(eps))


def by_name(plugins: list[PluginInfo]) -> dict[tuple[str, str], PluginInfo]:
    return {(p.kind, p.name): p for p in plugins}


# --- the built-ins ---------------------------------------------------------------------

def test_pyproject_registers_the_builtins() -> None:
    eps = tomllib.loads(PYPROJECT.read_text(encoding="utf-8"))["project"]["entry-points"]
    registered = {kind: set(eps.get(group, {})) for kind, (group, _) in GROUPS.items()}
    assert registered == BUILTINS


def test_discover_finds_the_builtins_usable() -> None:
    plugins = discover()
    found = {kind: {p.name for p in plugins if p.kind == kind} for kind in GROUPS}
    for kind, names in BUILTINS.items():
        assert names <= found[kind], kind
    for p in plugins:
        if p.kind in BUILTINS and p.name in BUILTINS[p.kind]:
            assert p.cls is not None and p.error is None, (p.name, p.error)
            # The class is the one the target names, imported here without the host.
            module, _, attr = p.target.partition(":")
            assert p.cls is getattr(importlib.import_module(module), attr)


def test_builtin_targets_match_pyproject() -> None:
    eps = tomllib.loads(PYPROJECT.read_text(encoding="utf-8"))["project"]["entry-points"]
    found = by_name(discover())
    for kind, (group, _) in GROUPS.items():
        for name, target in eps.get(group, {}).items():
            assert found[(kind, name)].target == target


# --- broken plugins: named, with the reason, the others still load -------------------

def test_import_failure_is_reported_with_its_reason(mixed: list[PluginInfo]) -> None:
    p = by_name(mixed)[("sinks", "explodes")]
    assert p.cls is None
    assert p.error == "cannot be loaded: RuntimeError: needs the vendor library libfoo"


def test_missing_module_and_missing_attribute_are_reported(mixed: list[PluginInfo]) -> None:
    plugins = by_name(mixed)
    assert plugins[("sinks", "gone")].cls is None
    assert re.match(r"cannot be loaded: ModuleNotFoundError: .*voicer_test_no_such_module",
                    plugins[("sinks", "gone")].error)
    assert plugins[("sinks", "typo")].cls is None
    assert re.match(r"cannot be loaded: AttributeError: .*GoodSinc", plugins[("sinks", "typo")].error)


def test_class_missing_protocol_members(mixed: list[PluginInfo]) -> None:
    p = by_name(mixed)[("sinks", "half")]
    assert p.cls is None
    assert p.error == "does not follow the Sink protocol: missing realtime, write"


def test_non_class_is_rejected(mixed: list[PluginInfo]) -> None:
    p = by_name(mixed)[("sinks", "number")]
    assert p.cls is None and "Sink protocol" in p.error and "not a class" in p.error


def test_good_plugin_loads_beside_broken_ones(mixed: list[PluginInfo], plugin_modules: tuple[str, str]) -> None:
    p = by_name(mixed)[("sinks", "good")]
    assert p.error is None and p.cls is sys.modules[plugin_modules[0]].GoodSink
    assert isinstance(p.cls(), Sink)
    # Every entry point is reported once, in name order within a group.
    sinks = [q.name for q in mixed if q.kind == "sinks"]
    assert sinks == sorted(["explodes", "half", "number", "good", "gone", "typo"])


def test_protocol_is_checked_per_group(mixed: list[PluginInfo]) -> None:
    p = by_name(mixed)[("sources", "misfiled")]
    assert p.cls is None and p.error == "does not follow the Source protocol: missing events"


# --- load_plugin ---------------------------------------------------------------------------

def test_load_plugin_returns_the_class(mixed: list[PluginInfo], plugin_modules: tuple[str, str]) -> None:
    assert load_plugin("sinks", "good", mixed) is sys.modules[plugin_modules[0]].GoodSink


def test_load_builtin_plugin() -> None:
    from voicer.io.sinks import NullSink  # the registered target of "null" (pyproject.toml)

    assert load_plugin("sinks", "null") is NullSink


def test_load_broken_plugin_names_it_and_the_reason(mixed: list[PluginInfo], plugin_modules: tuple[str, str]) -> None:
    broken = plugin_modules[1]
    with pytest.raises(VoicerError, match=rf"^sinks plugin 'explodes' \({broken}:Anything\) cannot be loaded: "
                                          r"RuntimeError: needs the vendor library libfoo$"):
        load_plugin("sinks", "explodes", mixed)
    with pytest.raises(VoicerError, match=r"^sinks plugin 'half' \(\S+:HalfSink\) does not follow the Sink protocol: "
                                          r"missing realtime, write$"):
        load_plugin("sinks", "half", mixed)


def test_load_missing_plugin_lists_the_usable_ones(mixed: list[PluginInfo]) -> None:
    with pytest.raises(VoicerError, match=r"^no sinks plugin named 'jack' \(available: good\)$"):
        load_plugin("sinks", "jack", mixed)
    with pytest.raises(VoicerError, match=r"^no effects plugin named 'reverb' \(available: none\)$"):
        load_plugin("effects", "reverb", mixed)


def test_load_missing_builtin_kind_lists_builtins() -> None:
    with pytest.raises(VoicerError, match=r"^no sinks plugin named 'jack' \(available: file, null, portaudio\)$"):
        load_plugin("sinks", "jack")


def test_load_unknown_kind() -> None:
    with pytest.raises(VoicerError, match=r"^unknown plugin kind 'sink'; kinds: models, effects, sinks, sources$"):
        load_plugin("sink", "null", [])


# --- listing ------------------------------------------------------------------------------

def test_format_plugins_shows_broken_with_reason(mixed: list[PluginInfo]) -> None:
    text = format_plugins(mixed)
    lines = text.splitlines()
    assert "models (voicer.models):" in lines and "effects (voicer.effects):" in lines
    assert lines[lines.index("models (voicer.models):") + 1] == "  (none)"
    explodes = next(line for line in lines if line.split()[:1] == ["explodes"])
    assert "BROKEN: cannot be loaded: RuntimeError: needs the vendor library libfoo" in explodes
    good = next(line for line in lines if line.split()[:1] == ["good"])
    assert good.rstrip().endswith(" ok") and "BROKEN" not in good


def test_plugins_command_lists_builtins(capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["plugins"])
    out, err = capsys.readouterr()
    assert code == 0 and err == ""
    rows = {line.split()[0]: line for line in out.splitlines() if line.startswith("  ") and line.split()[0] != "(none)"}
    for names in BUILTINS.values():
        for name in names:
            assert name in rows and rows[name].rstrip().endswith(" ok"), rows.get(name)
    assert "BROKEN" not in out
    for kind, (group, _) in GROUPS.items():
        assert f"{kind} ({group}):" in out
