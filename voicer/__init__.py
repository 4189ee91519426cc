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
]
