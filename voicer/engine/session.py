"""Loading the voicing states that a command plays or renders."""

from __future__ import annotations

__all__ = ["prepare_states", "table_settings"]

from pathlib import Path

from ..tone.preset import Preset
from ..tone.tables import TableSettings
from ..tone.voicing import apply_voicing, load_voicing
from .bank import DEFAULT_SPLIT
from .host import PluginInfo, load_plugin
from .instrument import Instrument


def table_settings(sample_rate: int) -> TableSettings:
    """The settings of the tables a command plays at ``sample_rate``."""
    return TableSettings(sample_rate_hz=float(sample_rate))


def prepare_states(preset: Preset, voicing: str | Path | None, *, sample_rate: int, block: int,
                   model: str = "physical", both: bool = True, progress: bool = False,
                   plugins: list[PluginInfo] | None = None) -> list[Instrument]:
    """State A (the preset) and, with a voicing plan, state B (the plan applied).

    With ``both=False`` and a plan, only the voiced state is returned (renders). The
    model plugin comes from ``plugins`` (default: discovered now).
    """
    builder = load_plugin("models", model, plugins)()
    settings = table_settings(sample_rate)
    presets: list[tuple[str, Preset]] = [("A", preset)]
    if voicing is not None:
        voiced = apply_voicing(preset, load_voicing(voicing))
        presets = [("A", preset), ("B", voiced)] if both else [("B", voiced)]
    return [Instrument(builder.build(p, settings=settings, progress=progress), sample_rate=sample_rate,
                       max_block=block, split=DEFAULT_SPLIT, name=name) for name, p in presets]
