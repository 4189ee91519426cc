"""The live knobs' mapping: which MIDI controller turns which voicing amount.

A mapping is a small TOML file (the bundled default is ``presets/knobs.toml``)::

    format = 1
    save_cc = 82        # a press writes the amounts as a voicing plan
    target_cc = 81      # a press switches between the keys last played and a range

    [felt]              # factor on felt_force_1mm_n
    cc = 16
    min = 0.5           # at controller value 0
    max = 2.0           # at 127; 64 is always "no change"

Each knob is one entry of :data:`KNOB_SPECS` (one table: the preset field it changes,
how, the unit, and the limits a mapping file may set), so validation, the status line
and the saved plan all read the same facts. A knob or button left out of the file is
not mapped. Errors name the file, the field (``felt.cc``) and the allowed range.

Controller values are absolute: value 64 is the neutral amount exactly (factor 1, add 0),
0 is ``min`` and 127 ``max``; in between the felt factor runs on a log scale (64 steps
down, 63 up, so that both ends are reached), the added amounts linearly.
"""

from __future__ import annotations

__all__ = ["KnobSpec", "KNOB_SPECS", "KNOB_SPEC_BY_NAME", "Knob", "KnobMap", "RESERVED_CCS", "NEUTRAL_CC",
           "default_knobs_path", "parse_knobs", "load_knobs"]

import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, Mapping

from ..errors import PresetError
from ..resources import presets_dir

#: Controller value of the neutral amount (the centre detent of most knobs).
NEUTRAL_CC = 64

#: Controllers the engine already uses (MIDI 1.0 control change table): 64 sustain, 66
#: sostenuto, 67 soft pedal (una corda); 120-127 are channel mode messages, not controllers.
RESERVED_CCS: Mapping[int, str] = {64: "the sustain pedal", 66: "the sostenuto pedal", 67: "the una corda pedal",
                                   **{cc: "a channel mode message" for cc in range(120, 128)}}


@dataclass(frozen=True)
class KnobSpec:
    """One kind of knob.

    Attributes
    ----------
    name : str
        Table name in the mapping file.
    field : str
        The per-key preset field it changes.
    op : {'factor', 'add'}
        How the amount acts on the field (as in a voicing plan's ``[[change]]``).
    unit : str
        Unit of an added amount ('' for a factor or a ratio).
    limit : (float, float)
        Smallest ``min`` and largest ``max`` a mapping file may give.
    default : (float, float)
        ``min`` and ``max`` when the file gives none.
    help : str
        What the amount means, for people (the saved plan's header).
    """

    name: str
    field: str
    op: Literal["factor", "add"]
    unit: str
    limit: tuple[float, float]
    default: tuple[float, float]
    help: str

    @property
    def neutral(self) -> float:
        """The amount that changes nothing."""
        return 1.0 if self.op == "factor" else 0.0

    def format(self, amount: float) -> str:
        """The amount in a few characters: ``x1.12``, ``+0.0040``, ``-0.30 g``."""
        if self.op == "factor":
            return f"x{amount:.3f}"
        digits = 4 if self.field == "strike_ratio" else 2
        return f"{amount:+.{digits}f}" + (f" {self.unit}" if self.unit else "")


#: Every knob voicer has. The limits keep a knob within what a voicing job does to a
#: hammer (common practice: felt hardness within a factor of a few, a strike point moved
#: by a few percent of the speaking length, a hammer lightened or weighted by grams).
KNOB_SPECS: tuple[KnobSpec, ...] = (
    KnobSpec("felt", "felt_force_1mm_n", "factor", "", (0.1, 10.0), (0.5, 2.0),
             "factor on the felt stiffness felt_force_1mm_n: below 1 softer felt (as after needling), "
             "above 1 harder (as after hardener)"),
    KnobSpec("strike", "strike_ratio", "add", "", (-0.05, 0.05), (-0.02, 0.02),
             "added to strike_ratio, the strike point as a fraction of the speaking length from the front "
             "termination (+0.01 on a 0.64 m string is 6.4 mm further in)"),
    KnobSpec("mass", "hammer_mass_g", "add", "g", (-5.0, 5.0), (-1.0, 1.0),
             "grams added to hammer_mass_g, the hammer's effective mass at the strike"),
)
KNOB_SPEC_BY_NAME: Mapping[str, KnobSpec] = {s.name: s for s in KNOB_SPECS}

_BUTTONS = ("save_cc", "target_cc")
_TOP = ("format", *_BUTTONS, *KNOB_SPEC_BY_NAME)
_KNOB_FIELDS = ("cc", "min", "max")


@dataclass(frozen=True)
class Knob:
    """A mapped knob: its kind, controller and range."""

    spec: KnobSpec
    cc: int
    lo: float
    hi: float

    @property
    def name(self) -> str:
        return self.spec.name

    def amount(self, value: int) -> float:
        """The amount at controller value 0..127 (64: neutral exactly, 0: ``lo``, 127: ``hi``)."""
        t = (value - NEUTRAL_CC) / (NEUTRAL_CC if value < NEUTRAL_CC else 127 - NEUTRAL_CC)
        end = self.lo if t < 0 else self.hi
        if self.spec.op == "factor":
            return float(end ** abs(t))  # log scale: equal steps are equal ratios
        return float(abs(t) * end)


@dataclass(frozen=True)
class KnobMap:
    """A validated mapping: the knobs, and the controllers of the two buttons (None: unmapped)."""

    knobs: tuple[Knob, ...]
    save_cc: int | None = None
    target_cc: int | None = None
    source: str | None = None

    def knob_for(self, cc: int) -> Knob | None:
        """The knob on controller ``cc``, if any."""
        for knob in self.knobs:
            if knob.cc == cc:
                return knob
        return None

    def controllers(self) -> dict[int, str]:
        """Every mapped controller and what it does (``felt.cc``, ``save_cc``...)."""
        out = {k.cc: f"{k.name}.cc" for k in self.knobs}
        for name in _BUTTONS:
            cc = getattr(self, name)
            if cc is not None:
                out[cc] = name
        return out


def default_knobs_path() -> Path:
    """The bundled mapping (``presets/knobs.toml``)."""
    return presets_dir() / "knobs.toml"


def _cc(value: Any, source: str | None, field: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= 127:
        raise PresetError(f"{value!r} is not a MIDI controller number; allowed: 0..127", file=source, field=field)
    if value in RESERVED_CCS:
        raise PresetError(f"controller {value} is {RESERVED_CCS[value]} (the engine's); choose another in 0..127 "
                          f"except {', '.join(map(str, (64, 66, 67)))} and 120..127", file=source, field=field)
    return value


def _amount(spec: KnobSpec, table: Mapping[str, Any], end: str, source: str | None) -> float:
    field = f"{spec.name}.{end}"
    value = table.get(end, spec.default[0 if end == "min" else 1])
    lo, hi = spec.limit
    side = (lo, spec.neutral) if end == "min" else (spec.neutral, hi)
    allowed = (f"{side[0]:g} <= {end} < {side[1]:g}" if end == "min" else f"{side[0]:g} < {end} <= {side[1]:g}")
    allowed += f" {spec.unit}" if spec.unit else ""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise PresetError(f"{value!r} is not a finite number; allowed: {allowed}", file=source, field=field)
    inside = side[0] <= value < side[1] if end == "min" else side[0] < value <= side[1]
    if not inside:
        raise PresetError(f"{value!r} is outside the allowed range {allowed} ({'factor on' if spec.op == 'factor' else 'added to'} "
                          f"{spec.field}; {spec.neutral:g} is no change)", file=source, field=field)
    return float(value)


def parse_knobs(data: Mapping[str, Any], *, source: str | None = None) -> KnobMap:
    """Validate TOML data as a knob mapping (one clear error for the first problem)."""
    for name in data:
        if name not in _TOP:
            raise PresetError(f"unknown table or value '{name}'; allowed: {', '.join(_TOP)}", file=source)
    fmt = data.get("format", 1)
    if isinstance(fmt, bool) or fmt != 1:
        raise PresetError(f"format = {fmt!r} is not supported; this voicer reads format = 1", file=source)
    used: dict[int, str] = {}

    def claim(cc: int, field: str) -> None:
        if cc in used:
            raise PresetError(f"controller {cc} is already {used[cc]}; each controller does one thing",
                              file=source, field=field)
        used[cc] = field

    knobs = []
    for spec in KNOB_SPECS:
        if spec.name not in data:
            continue
        table = data[spec.name]
        if not isinstance(table, dict):
            raise PresetError(f"[{spec.name}] must be a table with cc, min and max", file=source, field=spec.name)
        for name in table:
            if name not in _KNOB_FIELDS:
                raise PresetError(f"unknown entry '{name}'; allowed: {', '.join(_KNOB_FIELDS)}", file=source,
                                  field=f"{spec.name}.{name}")
        if "cc" not in table:
            raise PresetError("'cc' is missing (the controller number, 0..127)", file=source, field=f"{spec.name}.cc")
        cc = _cc(table["cc"], source, f"{spec.name}.cc")
        claim(cc, f"{spec.name}.cc")
        knobs.append(Knob(spec, cc, _amount(spec, table, "min", source), _amount(spec, table, "max", source)))
    buttons: dict[str, int | None] = {}
    for name in _BUTTONS:
        buttons[name] = None
        if name in data:
            buttons[name] = _cc(data[name], source, name)
            claim(buttons[name], name)
    return KnobMap(knobs=tuple(knobs), source=source, **buttons)


def load_knobs(path: str | Path | None = None) -> KnobMap:
    """Read and validate a mapping file (default: the bundled one)."""
    p = Path(path) if path is not None else default_knobs_path()
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except OSError as exc:
        raise PresetError(f"cannot read the knob mapping: {exc.strerror or exc}", file=str(p)) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise PresetError(f"not a valid TOML file: {exc}", file=str(p)) from None
    return parse_knobs(data, source=str(p))
