"""Built-in model plugin: the physical model (contact simulation -> modal tables)."""

from __future__ import annotations

__all__ = ["PhysicalModel"]

from ..tone.preset import Preset
from ..tone.tables import ModalTables, TableSettings, build_tables
from ..tone.unison import couple_tables


class PhysicalModel:
    """``voicer.models`` entry ``physical``: hammer-felt contact on stiff modal strings,
    heard through the unison's coupling at the bridge."""

    name = "physical"

    def build(self, preset: Preset, *, settings: TableSettings, progress: bool = False) -> ModalTables:
        """Tables for every key (and of its una corda blow), from the cache where the
        inputs are unchanged."""
        return couple_tables(build_tables(preset, settings=settings, progress=progress),
                             build_tables(preset, settings=settings, progress=progress, una_corda=True))
