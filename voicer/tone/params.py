"""The one table of preset fields: name, unit, allowed range, default and interpolation.

Validation, the command-line help and the README's field list are all read from here,
so a field is declared once. Per-key fields appear in anchors and overrides; instrument
fields in the ``[instrument]`` table.
"""

from __future__ import annotations

__all__ = [
    "Param",
    "KEY_PARAMS",
    "INSTRUMENT_PARAMS",
    "KEY_PARAM_BY_NAME",
    "INSTRUMENT_PARAM_BY_NAME",
    "WINDING_FIELDS",
    "ENGINE_ONLY_FIELDS",
    "fields_markdown",
]

import math
from dataclasses import dataclass
from typing import Any, Literal

from ..errors import ParameterError
from ..physics.body import BODY_FIELDS
from ..physics.felt import FELT_LAWS
from ..physics.strings import END_CONDITIONS
from ..physics.tuning import HIGHEST_KEY, LOWEST_KEY

Interp = Literal["log", "linear", "step"]


@dataclass(frozen=True)
class Param:
    """One preset field.

    Attributes
    ----------
    name : str
        Field name as written in the TOML file (unit in the name).
    kind : {'float', 'int', 'str'}
        Value type. A float field also accepts a TOML integer; booleans are never numbers.
    unit : str
        Unit for display ('' when dimensionless).
    lo, hi : float or None
        Allowed range; ``None`` leaves that side open-ended.
    lo_open, hi_open : bool
        Whether the bound itself is excluded.
    default : object or None
        Value used when no anchor gives the field; ``None`` makes it required.
    interp : {'log', 'linear', 'step'}
        How anchor values are carried across the keys between them: monotone cubic on
        the value or its logarithm, or held from the anchor below (integers).
    sectioned : bool
        Interpolated separately in the wound and the plain section of the scale, since
        string geometry jumps at the break between them.
    choices : tuple of str
        Allowed values of a string field with a fixed set (empty: free text).
    help : str
        One line for people.
    """

    name: str
    kind: Literal["float", "int", "str"]
    unit: str
    help: str
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    hi_open: bool = False
    default: Any = None
    interp: Interp = "linear"
    sectioned: bool = False
    choices: tuple[str, ...] = ()

    def range_text(self) -> str:
        """The allowed values in words, e.g. ``'0 < x < 0.5'`` or ``'1..3'``."""
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        if self.kind == "str":
            return "text"
        if self.kind == "int" and self.lo is not None and self.hi is not None:
            return f"{self.lo:g}..{self.hi:g}"
        parts = []
        if self.lo is not None:
            parts.append(f"{self.lo:g} {'<' if self.lo_open else '<='} ")
        parts.append("x")
        if self.hi is not None:
            parts.append(f" {'<' if self.hi_open else '<='} {self.hi:g}")
        unit = f" {self.unit}" if self.unit else ""
        return "".join(parts) + unit

    def check(self, value: Any) -> Any:
        """Return ``value`` converted to the field's type, or raise ParameterError.

        The message echoes the value and states the allowed range; the caller adds the
        file, key and field name.
        """
        if self.kind == "str":
            if not isinstance(value, str):
                allowed = f"; allowed: {self.range_text()}" if self.choices else ""
                raise ParameterError(f"expected text, got {type(value).__name__} {value!r}{allowed}")
            if self.choices and value not in self.choices:
                raise ParameterError(f"{value!r} is not allowed; allowed: {self.range_text()}")
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ParameterError(f"expected a number ({self.kind}), got {type(value).__name__} {value!r}; "
                                 f"allowed: {self.range_text()}")
        if self.kind == "int" and not isinstance(value, int):
            raise ParameterError(f"expected a whole number, got {value!r}; allowed: {self.range_text()}")
        if self.kind == "float":
            value = float(value)
            if not math.isfinite(value):
                raise ParameterError(f"{value!r} is not a finite number; allowed: {self.range_text()}")
        too_low = self.lo is not None and (value <= self.lo if self.lo_open else value < self.lo)
        too_high = self.hi is not None and (value >= self.hi if self.hi_open else value > self.hi)
        if too_low or too_high:
            raise ParameterError(f"{value!r} is outside the allowed range {self.range_text()}")
        return value


#: Per-key fields: given at anchors (interpolated across the compass) or per-key overrides.
KEY_PARAMS: tuple[Param, ...] = (
    Param("speaking_length_m", "float", "m", "vibrating length between the front termination and the bridge pin",
          lo=0.02, hi=3.0, interp="log", sectioned=True),
    Param("core_diameter_mm", "float", "mm", "steel wire diameter (the core of a wound string)",
          lo=0.3, hi=2.5, interp="log", sectioned=True),
    Param("winding_diameter_mm", "float", "mm",
          "outer diameter of a close-wound single copper layer (wound section only)",
          lo=0.3, hi=12.0, interp="log", sectioned=True),
    Param("winding_mass_g_per_m", "float", "g/m",
          "mass per length added by the winding, instead of winding_diameter_mm (wound section only)",
          lo=0.0, hi=800.0, lo_open=True, interp="log", sectioned=True),
    Param("strings", "int", "", "unison count: strings struck by one hammer", lo=1, hi=3, interp="step"),
    Param("strike_ratio", "float", "", "strike point as a fraction of the speaking length from the front end",
          lo=0.0, hi=0.5, lo_open=True, hi_open=True),
    Param("stretch_cents", "float", "cents", "tuning of the first partial relative to equal temperament",
          lo=-100.0, hi=100.0, default=0.0),
    Param("hammer_mass_g", "float", "g", "effective mass of the hammer head at the strike",
          lo=0.5, hi=30.0, interp="log"),
    Param("hammer_width_mm", "float", "mm", "width of the felt contact along the string",
          lo=0.5, hi=50.0, interp="log"),
    Param("felt_force_1mm_n", "float", "N",
          "felt stiffness, as the force at 1 mm compression (F = F1 (c / 1 mm)^p)",
          lo=0.0, hi=1.0e5, lo_open=True, interp="log"),
    Param("felt_exponent", "float", "", "power-law exponent p of the felt (Hall; Boutillon 1988)",
          lo=1.0, hi=6.0),
    Param("felt_hysteresis", "float", "", "Stulov's hereditary amplitude eps (felt_law = 'stulov'; 0 = elastic)",
          lo=0.0, hi=1.0, hi_open=True, default=0.0),
    Param("felt_relaxation_us", "float", "us", "Stulov's relaxation time tau0 of the felt",
          lo=0.0, hi=1.0e5, lo_open=True, default=100.0, interp="log"),
    Param("mating_1_mm", "float", "mm",
          "how much nearer the hammer string 1 (bass side) of the unison sits: meets it earlier and harder",
          lo=-2.0, hi=2.0, default=0.0),
    Param("mating_2_mm", "float", "mm", "the same for string 2", lo=-2.0, hi=2.0, default=0.0),
    Param("mating_3_mm", "float", "mm", "the same for string 3 (treble side)", lo=-2.0, hi=2.0, default=0.0),
    Param("una_corda_felt_factor", "float", "",
          "stiffness of the felt the shifted hammer strikes with under the una corda, as a factor (the less "
          "compacted felt beside the string grooves)", lo=0.2, hi=1.0, default=0.8),
    Param("mistune_1_cents", "float", "cents", "string 1's tuning against the key's pitch (all its partials)",
          lo=-50.0, hi=50.0, default=0.0),
    Param("mistune_2_cents", "float", "cents", "the same for string 2", lo=-50.0, hi=50.0, default=0.0),
    Param("mistune_3_cents", "float", "cents", "the same for string 3", lo=-50.0, hi=50.0, default=0.0),
    Param("bridge_loss_fraction", "float", "",
          "part of a single string's decay rate that goes into the bridge and couples the unison's strings "
          "(Weinreich 1977; 0: uncoupled)", lo=0.0, hi=1.0, hi_open=True, default=0.0),
    Param("bridge_reactance_ratio", "float", "", "reactive over resistive part of the bridge's coupling",
          lo=-10.0, hi=10.0, default=0.0),
    Param("polarization_split_cents", "float", "cents",
          "tuning of the strings' horizontal motion against their vertical ([instrument] polarizations = 2)",
          lo=-20.0, hi=20.0, default=0.0),
    Param("horizontal_coupling", "float", "", "the bridge's coupling of the horizontal motion, as a fraction of "
          "the vertical's", lo=0.0, hi=1.0, default=0.1),
    Param("polarization_coupling", "float", "", "the bridge's coupling between vertical and horizontal motion, "
          "as a fraction of the vertical's (its square at most horizontal_coupling)", lo=0.0, hi=1.0, default=0.1),
    Param("damper_rate_per_s", "float", "1/s", "decay rate a damper adds to every partial of the key",
          lo=0.0, hi=500.0, default=20.0),
    Param("loss_b1_per_s", "float", "1/s", "frequency-independent decay rate b1 (sigma = b1 + b3 omega^2)",
          lo=0.0, hi=100.0),
    Param("loss_b3_s", "float", "s", "decay-rate coefficient b3 of omega^2 (Chaigne & Askenfelt 1994)",
          lo=0.0, hi=1.0e-6, lo_open=True, interp="log"),
)

#: Fields the engine reads but the modal tables do not depend on (left out of their cache key).
ENGINE_ONLY_FIELDS = frozenset({"damper_rate_per_s", "una_corda_felt_factor", "mistune_1_cents", "mistune_2_cents",
                                "mistune_3_cents", "bridge_loss_fraction", "bridge_reactance_ratio", "polarization_split_cents",
                                "horizontal_coupling", "polarization_coupling"})

#: The two ways of giving a string's winding; at most one per preset.
WINDING_FIELDS = ("winding_diameter_mm", "winding_mass_g_per_m")

#: Fields of the ``[instrument]`` table.
INSTRUMENT_PARAMS: tuple[Param, ...] = (
    Param("name", "str", "", "name of the instrument", default=""),
    Param("maker", "str", "", "maker and model", default=""),
    Param("description", "str", "", "free text: where it stands, its state", default=""),
    Param("a4_hz", "float", "Hz", "reference pitch of A4 (ISO 16: 440 Hz)", lo=380.0, hi=480.0, default=440.0),
    Param("end_condition", "str", "", "how the string ends are modelled", default="pinned", choices=END_CONDITIONS),
    Param("felt_law", "str", "", "hammer felt force law: power (Hall; Boutillon) or stulov (Stulov 1995)",
          default="power", choices=FELT_LAWS),
    Param("speed_at_velocity_1_m_s", "float", "m/s", "hammer speed for MIDI velocity 1",
          lo=0.05, hi=10.0, default=0.5),
    Param("speed_at_velocity_127_m_s", "float", "m/s", "hammer speed for MIDI velocity 127 "
          "(Russell & Rossing 1998: about 1-6 m/s over the dynamic range)", lo=0.1, hi=15.0, default=6.0),
    Param("velocity_curve", "float", "",
          "shape of the velocity map: log(speed) is linear in ((velocity - 1) / 126)^curve",
          lo=0.2, hi=5.0, default=1.0),
    Param("last_damped_key", "int", "", "highest key with a damper (the keys above ring until they die away)",
          lo=LOWEST_KEY - 1, hi=HIGHEST_KEY, default=88),
    Param("half_pedal_low_cc", "int", "", "sustain pedal (CC 64) value where the dampers start to lift",
          lo=0, hi=126, default=30),
    Param("half_pedal_high_cc", "int", "", "sustain pedal value from which the dampers are clear of the strings",
          lo=1, hi=127, default=90),
    Param("una_corda_missed_strings", "int", "",
          "strings of each unison the hammer misses with the una corda pedal down (string 1, the bass side, "
          "first; a key keeps one)", lo=0, hi=2, default=1),
    Param("una_corda_level_db", "float", "dB", "level change of a una corda blow on a key played from a "
          "recording (the model's keys strike fewer strings instead)", lo=-24.0, hi=0.0, default=-4.0),
    Param("una_corda_tilt_db_per_octave", "float", "dB/octave",
          "spectral tilt of a una corda blow on a key played from a recording (negative: darker), per octave "
          "above f1", lo=-12.0, hi=3.0, default=-1.5),
    Param("polarizations", "int", "", "string motions modelled at the bridge: 1 (vertical) or 2 (and horizontal)",
          lo=1, hi=2, default=1),
    Param("sympathetic_coupling", "float", "",
          "part of a unison's bridge coupling that reaches the strings of other keys: with the dampers lifted "
          "they answer the partials near their own (0: off)", lo=0.0, hi=1.0, default=0.0),
    Param("sympathetic_floor_db", "float", "dB",
          "weakest answer of a string to a partial that is kept, against the partial", lo=-100.0, hi=-20.0,
          default=-50.0),
    Param("sympathetic_max_entries", "int", "", "answering string modes kept per key (the strongest)",
          lo=0, hi=1024, default=96),
    Param("body", "str", "", "soundboard response applied to the partials: none, or modal (the body_ fields)",
          default="none", choices=("none", "modal")),
    *(Param(f"body_{f.name}", f.kind, f.unit, f.help, lo=f.lo, hi=f.hi, lo_open=f.lo_open, hi_open=f.hi_open,
            default=f.default) for f in BODY_FIELDS),
    Param("last_wound_key", "int", "", f"highest key with wound strings ({LOWEST_KEY - 1} = none)",
          lo=LOWEST_KEY - 1, hi=HIGHEST_KEY, default=LOWEST_KEY - 1),
)

KEY_PARAM_BY_NAME = {p.name: p for p in KEY_PARAMS}
INSTRUMENT_PARAM_BY_NAME = {p.name: p for p in INSTRUMENT_PARAMS}


def fields_markdown() -> str:
    """The field tables of the README (kept in sync by a test)."""
    lines = []
    for title, params in (("`[instrument]`", INSTRUMENT_PARAMS), ("per key (`[[anchor]]`, `[override.KEY]`)", KEY_PARAMS)):
        lines += [f"Fields {title}:", "", "| field | unit | allowed | default | meaning |", "|---|---|---|---|---|"]
        for p in params:
            if p.name in WINDING_FIELDS:
                default = "wound keys: one of the two"
            elif p.default is None:
                default = "required"
            else:
                default = f"`{p.default!r}`".replace("'", '"')
            lines.append(f"| `{p.name}` | {p.unit or '-'} | {p.range_text()} | {default} | {p.help} |")
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"
