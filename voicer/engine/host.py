"""Plugin host: the four protocols and their discovery through entry points.

A plugin is a class registered under one of the entry-point groups below; voicer's own
built-ins are registered the same way in ``pyproject.toml``. Discovery imports each entry
point, checks the class against its protocol and reports a broken plugin by name with
the reason, without stopping the others.

Conventions shared by every protocol: audio blocks are float32 arrays of shape
``(channels, frames)``; MIDI is ``mido.Message``; times are seconds.
"""

from __future__ import annotations

__all__ = [
    "GROUPS",
    "BlockCallback",
    "Model",
    "Effect",
    "Sink",
    "Source",
    "PluginInfo",
    "discover",
    "load_plugin",
    "format_plugins",
]

import importlib.metadata
import inspect
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Iterator, Protocol, runtime_checkable

import numpy as np
from numpy.typing import NDArray

from ..errors import VoicerError

if TYPE_CHECKING:  # pragma: no cover
    import mido

    from ..tone.preset import Preset
    from ..tone.tables import ModalTables, TableSettings

#: Fills a float32 block of shape (channels, frames) in place; must not raise or allocate.
BlockCallback = Callable[[NDArray[np.float32]], None]


@runtime_checkable
class Model(Protocol):
    """``voicer.models``: turns a preset (voicing applied) into modal tables."""

    name: str

    def build(self, preset: "Preset", *, settings: "TableSettings", progress: bool = False) -> "ModalTables":
        """Tables for every key of the preset."""
        ...


@runtime_checkable
class Effect(Protocol):
    """``voicer.effects``: a block processor (``prepare`` once, then ``process`` per block)."""

    name: str
    latency_frames: int

    def prepare(self, sample_rate: float, max_block: int, channels: int) -> None:
        """Allocate everything ``process`` will need; called off the audio thread."""
        ...

    def process(self, block: NDArray[np.float32]) -> None:
        """Process ``block`` (channels, frames) in place; real-time safe."""
        ...

    def reset(self) -> None:
        """Forget all state (tails, delay lines)."""
        ...


@runtime_checkable
class Sink(Protocol):
    """``voicer.sinks``: where audio goes.

    A real-time sink (``realtime = True``) pulls blocks by calling ``callback`` from its
    own thread; any other sink takes blocks through ``write``.
    """

    name: str
    realtime: bool

    def open(self, *, sample_rate: int, channels: int, block: int, callback: BlockCallback | None = None) -> None:
        """Start (real-time: start calling ``callback``)."""
        ...

    def write(self, block: NDArray[np.float32]) -> None:
        """Take one block (non-real-time sinks)."""
        ...

    def close(self) -> None:
        """Stop and release the device or file; safe to call twice."""
        ...


@runtime_checkable
class Source(Protocol):
    """``voicer.sources``: where MIDI comes from.

    A real-time source (``realtime = True``) delivers messages to ``on_message`` from its
    own thread once opened; any other source yields all its events with their times.
    """

    name: str
    realtime: bool

    def open(self, on_message: Callable[["mido.Message"], None]) -> None:
        """Start delivering messages (real-time sources)."""
        ...

    def events(self) -> Iterator[tuple[float, "mido.Message"]]:
        """``(time_s, message)`` in time order (file sources)."""
        ...

    def close(self) -> None:
        """Stop and release the port or file; safe to call twice."""
        ...


#: Entry-point group of each kind of plugin, and the protocol its classes must follow.
GROUPS: dict[str, tuple[str, type]] = {
    "models": ("voicer.models", Model),
    "effects": ("voicer.effects", Effect),
    "sinks": ("voicer.sinks", Sink),
    "sources": ("voicer.sources", Source),
}


@dataclass(frozen=True)
class PluginInfo:
    """One discovered plugin: usable (``cls``) or broken (``error``)."""

    kind: str
    name: str
    target: str
    cls: type | None
    error: str | None


def _missing_members(cls: type, protocol: type) -> list[str]:
    wanted = {m for m in vars(protocol) if not m.startswith("_")} | set(inspect.get_annotations(protocol))
    return [m for m in sorted(wanted) if not hasattr(cls, m)]


def discover(entry_points: Callable[..., Any] = importlib.metadata.entry_points) -> list[PluginInfo]:
    """Every plugin registered under voicer's groups, broken ones with their reason.

    Parameters
    ----------
    entry_points : callable
        ``importlib.metadata.entry_points`` (replaceable in tests).
    """
    found: list[PluginInfo] = []
    for kind, (group, protocol) in GROUPS.items():
        for ep in sorted(entry_points(group=group), key=lambda e: e.name):
            try:
                cls = ep.load()
            except (Exception, SystemExit) as exc:  # any import-time failure of a third-party plugin
                found.append(PluginInfo(kind, ep.name, ep.value, None, f"cannot be loaded: {type(exc).__name__}: {exc}"))
                continue
            missing = _missing_members(cls, protocol) if isinstance(cls, type) else ["(not a class)"]
            if missing:
                found.append(PluginInfo(kind, ep.name, ep.value, None,
                                        f"does not follow the {protocol.__name__} protocol: missing {', '.join(missing)}"))
            else:
                found.append(PluginInfo(kind, ep.name, ep.value, cls, None))
    return found


def load_plugin(kind: str, name: str, plugins: list[PluginInfo] | None = None) -> type:
    """The class of a usable plugin.

    Raises
    ------
    VoicerError
        If the kind is unknown, the plugin is missing (listing the available ones) or
        broken (with its reason).
    """
    if kind not in GROUPS:
        raise VoicerError(f"unknown plugin kind {kind!r}; kinds: {', '.join(GROUPS)}")
    plugins = discover() if plugins is None else plugins
    same_kind = [p for p in plugins if p.kind == kind]
    for p in same_kind:
        if p.name == name:
            if p.cls is None:
                raise VoicerError(f"{kind} plugin {name!r} ({p.target}) {p.error}")
            return p.cls
    usable = ", ".join(p.name for p in same_kind if p.cls is not None) or "none"
    raise VoicerError(f"no {kind} plugin named {name!r} (available: {usable})")


def format_plugins(plugins: list[PluginInfo]) -> str:
    """Text of ``voicer plugins``."""
    lines = []
    for kind, (group, _) in GROUPS.items():
        lines.append(f"{kind} ({group}):")
        mine = [p for p in plugins if p.kind == kind]
        if not mine:
            lines.append("  (none)")
        for p in mine:
            state = "ok" if p.cls is not None else f"BROKEN: {p.error}"
            lines.append(f"  {p.name:<12} {p.target:<40} {state}")
    return "\n".join(lines)
