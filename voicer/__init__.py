"""voicer: hear a piano voicing job before doing it.

Public API. The physics lives in :mod:`voicer.physics`, presets in :mod:`voicer.tone`.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import ParameterError, PresetError, VoicerError
from .physics.scale import Scale
from .physics.strings import (
    StringModes,
    clamped_ratios,
    loss_rates,
    mode_shapes,
    partial_ratios,
    pinned_ratios,
    string_modes,
    strike_weights,
    t60_s,
)
from .physics.tuning import A4_HZ, HIGHEST_KEY, KEYS, LOWEST_KEY, equal_tempered_hz, key_name, tuned_hz
from .resources import DEMO_PIANO, bundled_pianos, find_preset
from .tone.params import INSTRUMENT_PARAMS, KEY_PARAMS, Param
from .tone.preset import Preset, load_preset, parse_preset, save_preset
from .tone.voicing import (
    OPERATIONS,
    Change,
    Operation,
    VoicedPreset,
    VoicingPlan,
    apply_voicing,
    compose,
    load_voicing,
    parse_voicing,
    reverse_plan,
)

#: Further public names, imported when first used (PEP 562), so that ``import voicer``
#: stays light: name -> module.
_LAZY: dict[str, str] = {
    "TableSettings": "voicer.tone.tables",
    "ModalTables": "voicer.tone.tables",
    "build_tables": "voicer.tone.tables",
    "couple_tables": "voicer.tone.unison",
    "Evenness": "voicer.report.evenness",
    "measure": "voicer.report.evenness",
    "Comparison": "voicer.report.compare",
    "compare": "voicer.report.compare",
    "comparison_json": "voicer.report.compare",
    "write_report": "voicer.report.compare",
    "Suggestion": "voicer.report.suggest",
    "suggest": "voicer.report.suggest",
    "write_plan": "voicer.report.suggest",
    "partials_loudness_phon": "voicer.report.loudness",
    "BodyModel": "voicer.physics.body",
    "body_gain": "voicer.physics.body",
    "PhysicalModel": "voicer.engine.models",
    "AdditiveModel": "voicer.engine.additive",
    "Instrument": "voicer.engine.instrument",
    "Renderer": "voicer.engine.renderer",
    "RoomEffect": "voicer.engine.room",
}


def __getattr__(name: str) -> object:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'voicer' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


__all__ = [
    "__version__",
    "VoicerError",
    "ParameterError",
    "PresetError",
    "Scale",
    "StringModes",
    "clamped_ratios",
    "loss_rates",
    "mode_shapes",
    "partial_ratios",
    "pinned_ratios",
    "string_modes",
    "strike_weights",
    "t60_s",
    "A4_HZ",
    "LOWEST_KEY",
    "HIGHEST_KEY",
    "KEYS",
    "equal_tempered_hz",
    "tuned_hz",
    "key_name",
    "DEMO_PIANO",
    "bundled_pianos",
    "find_preset",
    "Param",
    "KEY_PARAMS",
    "INSTRUMENT_PARAMS",
    "Preset",
    "load_preset",
    "parse_preset",
    "save_preset",
    "OPERATIONS",
    "Change",
    "Operation",
    "VoicedPreset",
    "VoicingPlan",
    "apply_voicing",
    "compose",
    "load_voicing",
    "parse_voicing",
    "reverse_plan",
    *_LAZY,
]
