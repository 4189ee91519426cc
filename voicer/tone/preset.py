"""Piano presets: a TOML file describing an instrument by a few anchor keys.

Layout::

    format = 1

    [instrument]
    name = "..."
    a4_hz = 440.0
    end_condition = "pinned"
    last_wound_key = 45          # keys up to here have wound strings

    [[anchor]]                   # any number; each gives any subset of the per-key fields
    key = 21
    speaking_length_m = 1.46
    ...

    [override.64]                # optional per-key values, applied after interpolation
    strike_ratio = 0.121

    [provenance]                 # optional: where a fitted preset came from, kept verbatim
    base = "kestrel-190"

    [measured.60]                # optional: partials of a recorded strike (voicer.tone.measured)
    ...
    [measured.60.fitted]         # the per-key values that strike corresponds to
    felt_force_1mm_n = 25.0

Each per-key field is interpolated over the anchors that give it: a monotone cubic
(PCHIP, no overshoot between anchors) on the value or its logarithm, held constant beyond
the outermost anchors; whole-number fields (the unison count) are held from the anchor at
or below the key. String geometry (length, wire, winding) is interpolated separately in
the wound and the plain section, because it jumps at the break.

Loading checks every field against :mod:`voicer.tone.params` and then the derived
physics (B, tension); the first problem raises one :class:`~voicer.errors.PresetError`
naming the file, key and field with the allowed range. Saving is atomic and keeps a
``.bak`` of the file it replaces.

The measured partials do not enter the physical model (nor its table cache key); the
additive model (:mod:`voicer.engine.additive`) replays them. Each key's ``fitted`` values
are validated as overrides of this preset (:attr:`Preset.fit_reference`).
"""

from __future__ import annotations

__all__ = ["FORMAT_VERSION", "Preset", "load_preset", "parse_preset", "save_preset", "preset_to_toml"]

import copy
import datetime
import tomllib
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import tomli_w
from numpy.typing import NDArray

from ..errors import ParameterError, PresetError
from ..io.atomic import atomic_write_bytes
from ..physics.body import BodyModel
from ..physics.scale import Scale
from ..physics.tuning import HIGHEST_KEY, KEYS, LOWEST_KEY
from .interp import pchip
from .measured import MeasuredKey, parse_measured_key
from .params import INSTRUMENT_PARAM_BY_NAME, INSTRUMENT_PARAMS, KEY_PARAM_BY_NAME, KEY_PARAMS, WINDING_FIELDS, Param

FORMAT_VERSION = 1
_TOP_LEVEL = ("format", "instrument", "anchor", "override", "measured", "provenance")


@dataclass(frozen=True)
class Preset:
    """A validated piano preset.

    Attributes
    ----------
    instrument : mapping
        Every ``[instrument]`` field, defaults filled in.
    anchors : tuple of mapping
        Anchor tables sorted by key; each has ``key`` and the fields it gives.
    overrides : mapping of int to mapping
        Per-key values applied after interpolation.
    measured : mapping of int to MeasuredKey
        Partials of recorded strikes, per key (``[measured.K]``; empty unless fitted).
    provenance : mapping
        The ``[provenance]`` table, kept verbatim (empty if absent).
    source : str or None
        File it was read from (not part of equality).
    """

    instrument: Mapping[str, Any]
    anchors: tuple[Mapping[str, Any], ...]
    overrides: Mapping[int, Mapping[str, Any]]
    measured: Mapping[int, MeasuredKey] = field(default_factory=dict)
    provenance: Mapping[str, Any] = field(default_factory=dict)
    source: str | None = field(default=None, compare=False)

    @cached_property
    def resolved(self) -> dict[str, NDArray[np.float64]]:
        """Every per-key field for keys 21..108 (NaN where a field does not apply)."""
        return _resolve(self)

    @cached_property
    def scale(self) -> Scale:
        """The instrument's scale; derived physics was checked when the preset was made."""
        try:
            return Scale.build(self.resolved, a4_hz=self.instrument["a4_hz"], end=self.instrument["end_condition"])
        except PresetError as exc:
            raise PresetError(exc.reason, file=self.source, key=exc.key, field=exc.field) from None

    @cached_property
    def fit_reference(self) -> "Preset":
        """This preset with each measured key's ``fitted`` values restored as overrides
        (without the measured and provenance sections): the instrument as the recorded
        strikes were fitted. The preset itself when nothing is measured.

        Overrides act on their own key only, so one preset holds every key's reference.
        """
        if not self.measured:
            return self
        data = self.to_dict()
        del data["measured"]
        data.pop("provenance", None)
        return _with_overrides(data, {k: m.fitted for k, m in self.measured.items()}, self.source)

    def with_key_values(self, key: int, values: Mapping[str, Any]) -> "Preset":
        """A copy with per-key overrides for one key, validated like the file (the measured
        and provenance sections are kept).

        Raises
        ------
        PresetError
            If a field is unknown or a value out of range (naming this preset's file).
        """
        return _with_overrides(self.to_dict(), {key: values}, self.source)

    def to_dict(self) -> dict[str, Any]:
        """Plain data as written to TOML."""
        out: dict[str, Any] = {"format": FORMAT_VERSION, "instrument": dict(self.instrument)}
        if self.provenance:
            out["provenance"] = copy.deepcopy(dict(self.provenance))
        out["anchor"] = [dict(a) for a in self.anchors]
        if self.overrides:
            out["override"] = {str(k): dict(v) for k, v in sorted(self.overrides.items())}
        if self.measured:
            out["measured"] = {str(k): m.to_dict() for k, m in sorted(self.measured.items())}
        return out


def _with_overrides(data: dict[str, Any], values: Mapping[int, Mapping[str, Any]], source: str | None) -> Preset:
    overrides = data.setdefault("override", {})
    for key, fields in values.items():
        overrides[str(key)] = {**overrides.get(str(key), {}), **fields}
    return parse_preset(data, source=source)


def _err(source: str | None, message: str, *, key: int | None = None, field_name: str | None = None) -> PresetError:
    return PresetError(message, file=source, key=key, field=field_name)


def _check_field(param: Param, value: Any, source: str | None, key: int | None) -> Any:
    try:
        return param.check(value)
    except ParameterError as exc:
        raise _err(source, f"{exc} ({param.help})", key=key, field_name=param.name) from None


def _check_table(table: Any, what: str, source: str | None, key: int | None) -> Mapping[str, Any]:
    if not isinstance(table, dict):
        raise _err(source, f"{what} must be a table, got {type(table).__name__}", key=key)
    return table


def _check_key_fields(table: Mapping[str, Any], source: str | None, key: int, where: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name, value in table.items():
        param = KEY_PARAM_BY_NAME.get(name)
        if param is None:
            raise _err(source, f"{where}unknown field; per-key fields are: {', '.join(KEY_PARAM_BY_NAME)}",
                       key=key, field_name=name)
        try:
            out[name] = _check_field(param, value, source, key)
        except PresetError as exc:
            raise _err(source, where + exc.reason, key=key, field_name=name) from None
    # Keep the table's field order so that a saved file reads like the parameter table.
    return {p.name: out[p.name] for p in KEY_PARAMS if p.name in out}


def _parse_key_number(raw: Any, source: str | None, what: str) -> int:
    if isinstance(raw, str):
        try:
            raw = int(raw)
        except ValueError:
            raise _err(source, f"{what} {raw!r} is not a MIDI key number") from None
    if isinstance(raw, bool) or not isinstance(raw, int):
        raise _err(source, f"{what} must be a whole MIDI key number, got {raw!r}")
    if not LOWEST_KEY <= raw <= HIGHEST_KEY:
        raise _err(source, f"{what} {raw} is outside the compass {LOWEST_KEY}..{HIGHEST_KEY}", key=raw)
    return raw


def parse_preset(data: Mapping[str, Any], *, source: str | None = None) -> Preset:
    """Validate TOML data as a preset.

    Parameters
    ----------
    data : mapping
        Parsed TOML.
    source : str, optional
        File name used in error messages.

    Raises
    ------
    PresetError
        For the first problem found.
    """
    for name in data:
        if name not in _TOP_LEVEL:
            raise _err(source, f"unknown table or value '{name}'; allowed: {', '.join(_TOP_LEVEL)}")
    fmt = data.get("format", FORMAT_VERSION)
    if fmt != FORMAT_VERSION or isinstance(fmt, bool):
        raise _err(source, f"format = {fmt!r} is not supported; this voicer reads format = {FORMAT_VERSION}",
                   field_name="format")

    inst_in = _check_table(data.get("instrument", {}), "[instrument]", source, None)
    instrument: dict[str, Any] = {}
    for name in inst_in:
        if name not in INSTRUMENT_PARAM_BY_NAME:
            raise _err(source, f"unknown [instrument] field; allowed: {', '.join(INSTRUMENT_PARAM_BY_NAME)}",
                       field_name=name)
    for param in INSTRUMENT_PARAMS:
        value = inst_in.get(param.name, param.default)
        instrument[param.name] = _check_field(param, value, source, None)

    raw_anchors = data.get("anchor", [])
    if not isinstance(raw_anchors, list) or not raw_anchors:
        raise _err(source, "at least one [[anchor]] table with a key and its fields is needed", field_name="anchor")
    anchors: dict[int, dict[str, Any]] = {}
    for raw in raw_anchors:
        table = dict(_check_table(raw, "[[anchor]]", source, None))
        if "key" not in table:
            raise _err(source, "every [[anchor]] needs 'key' (a MIDI number 21..108)", field_name="key")
        key = _parse_key_number(table.pop("key"), source, "anchor key")
        if key in anchors:
            raise _err(source, "two anchors have the same key; merge them", key=key, field_name="key")
        anchors[key] = {"key": key, **_check_key_fields(table, source, key)}

    raw_over = _check_table(data.get("override", {}), "[override]", source, None)
    overrides: dict[int, dict[str, Any]] = {}
    for raw_key, table in raw_over.items():
        key = _parse_key_number(raw_key, source, "override key")
        fields = _check_key_fields(_check_table(table, f"[override.{raw_key}]", source, key), source, key)
        if fields:
            overrides[key] = fields

    preset = Preset(
        instrument=instrument,
        anchors=tuple(anchors[k] for k in sorted(anchors)),
        overrides=dict(sorted(overrides.items())),
        measured=_parse_measured(data.get("measured", {}), source),
        provenance=_check_provenance(data.get("provenance", {}), source),
        source=source,
    )
    _check_winding(preset)
    _check_consistency(preset)
    preset.scale  # noqa: B018 - derive now so that bad physics is reported at load
    try:
        preset.fit_reference  # noqa: B018 - the fitted values must make a valid preset too
    except PresetError as exc:
        # A rule over several keys (one way of giving the winding) names no key: blame
        # the first measured key whose fitted values give that field.
        key = exc.key if exc.key is not None else next(
            (k for k, m in preset.measured.items() if exc.field in m.fitted), None)
        where = f"[measured.{key}.fitted]" if key is not None else "the [measured.K.fitted] values"
        raise PresetError(f"{where}: {exc.reason}", file=source, key=key, field=exc.field) from None
    return preset


def _parse_measured(raw: Any, source: str | None) -> dict[int, MeasuredKey]:
    tables = _check_table(raw, "[measured]", source, None)
    out: dict[int, MeasuredKey] = {}
    for raw_key, table in tables.items():
        key = _parse_key_number(raw_key, source, "measured key")
        table = dict(_check_table(table, f"[measured.{raw_key}]", source, key))
        if "fitted" not in table:
            raise _err(source, f"[measured.{key}] needs a [measured.{key}.fitted] table with the per-key values "
                       "the strike was fitted with (a voicing change is heard as the change from these)",
                       key=key, field_name="fitted")
        where = f"[measured.{key}.fitted] "
        fitted = _check_table(table.pop("fitted"), where.strip(), source, key)
        if not fitted:
            raise _err(source, f"{where}is empty; give at least the per-key values the fit found", key=key,
                       field_name="fitted")
        out[key] = parse_measured_key(key, table, _check_key_fields(fitted, source, key, where), source=source)
    return dict(sorted(out.items()))


_TOML_SCALARS = (str, bool, int, float, datetime.datetime, datetime.date, datetime.time)


def _check_provenance(raw: Any, source: str | None) -> dict[str, Any]:
    """The ``[provenance]`` table, checked to hold TOML values only (a deep copy)."""
    def walk(value: Any, path: str) -> Any:
        if isinstance(value, dict):
            for name in value:
                if not isinstance(name, str):
                    raise _err(source, f"[provenance] {path}: names must be text, got {name!r}", field_name=path)
            return {name: walk(v, f"{path}.{name}") for name, v in value.items()}
        if isinstance(value, (list, tuple)):
            return [walk(v, f"{path}[{i}]") for i, v in enumerate(value)]
        if isinstance(value, _TOML_SCALARS):
            return value
        raise _err(source, f"[provenance] {path} = {value!r} is not a TOML value (text, number, boolean, date, "
                   "array or table of these)", field_name=path)

    return walk(dict(_check_table(raw, "[provenance]", source, None)), "provenance")


def _check_winding(preset: Preset) -> None:
    source, last_wound = preset.source, preset.instrument["last_wound_key"]
    tables = [(a["key"], a) for a in preset.anchors] + list(preset.overrides.items())
    used = {name for _, t in tables for name in WINDING_FIELDS if name in t}
    if len(used) > 1:
        raise _err(source, "give the winding as winding_diameter_mm or as winding_mass_g_per_m, not both",
                   field_name=WINDING_FIELDS[1])
    for key, table in tables:
        for name in WINDING_FIELDS:
            if name in table and key > last_wound:
                raise _err(source, f"only wound keys ({LOWEST_KEY}..{last_wound}, set by [instrument] "
                           "last_wound_key) can have a winding", key=key, field_name=name)
    if last_wound >= LOWEST_KEY and not any(name in a for a in preset.anchors for name in WINDING_FIELDS):
        raise _err(source, f"keys {LOWEST_KEY}..{last_wound} are wound (last_wound_key) but no anchor gives "
                   "winding_diameter_mm or winding_mass_g_per_m", field_name=WINDING_FIELDS[0])


def _check_consistency(preset: Preset) -> None:
    """Rules that tie fields together."""
    source, inst = preset.source, preset.instrument
    if inst["speed_at_velocity_1_m_s"] >= inst["speed_at_velocity_127_m_s"]:
        raise _err(source, f"speed_at_velocity_1_m_s = {inst['speed_at_velocity_1_m_s']:g} must be below "
                   f"speed_at_velocity_127_m_s = {inst['speed_at_velocity_127_m_s']:g}",
                   field_name="speed_at_velocity_1_m_s")
    if inst["half_pedal_low_cc"] >= inst["half_pedal_high_cc"]:
        raise _err(source, f"half_pedal_low_cc = {inst['half_pedal_low_cc']} must be below half_pedal_high_cc = "
                   f"{inst['half_pedal_high_cc']}", field_name="half_pedal_low_cc")
    if inst["body"] == "modal":
        try:
            BodyModel.from_fields(inst)
        except ParameterError as exc:
            raise _err(source, str(exc), field_name="body") from None
    hysteresis = preset.resolved["felt_hysteresis"]
    if inst["felt_law"] != "stulov" and np.any(hysteresis > 0):
        key = int(KEYS[np.argmax(hysteresis > 0)])
        raise _err(source, f"felt_hysteresis needs [instrument] felt_law = \"stulov\" (it is {inst['felt_law']!r})",
                   key=key, field_name="felt_hysteresis")
    strings = preset.resolved["strings"]
    for key, fields in preset.overrides.items():
        for s in (2, 3):
            if f"mating_{s}_mm" in fields and strings[key - LOWEST_KEY] < s:
                raise _err(source, f"this key has {int(strings[key - LOWEST_KEY])} string(s); "
                           f"mating_{s}_mm does not apply", key=key, field_name=f"mating_{s}_mm")


def _interpolate(param: Param, xs: list[int], ys: list[float], keys: NDArray[np.int64]) -> NDArray[np.float64]:
    x, y = np.asarray(xs, dtype=float), np.asarray(ys, dtype=float)
    if param.interp == "step":
        idx = np.clip(np.searchsorted(x, keys, side="right") - 1, 0, len(x) - 1)
        return y[idx]
    if len(x) == 1:
        return np.full(len(keys), y[0])
    y_fit = np.log(y) if param.interp == "log" else y
    out = pchip(x, y_fit, np.clip(keys, x[0], x[-1]))
    if param.interp == "log":
        out = np.exp(out)
    out[np.isin(keys, x)] = y[np.isin(x, keys)]  # anchors exactly as written, not via exp(log())
    return out


def _resolve(preset: Preset) -> dict[str, NDArray[np.float64]]:
    source, last_wound = preset.source, preset.instrument["last_wound_key"]
    wound = KEYS <= last_wound
    sections = [(wound, f"wound section {LOWEST_KEY}..{last_wound}"),
                (~wound, f"plain section {last_wound + 1}..{HIGHEST_KEY}")]
    winding_used = {n for a in preset.anchors for n in WINDING_FIELDS if n in a}
    values: dict[str, NDArray[np.float64]] = {}
    for param in KEY_PARAMS:
        out = np.full(len(KEYS), np.nan)
        pieces = sections if param.sectioned else [(np.ones(len(KEYS), dtype=bool), "compass")]
        for mask, label in pieces:
            if not mask.any():
                continue
            if param.name in WINDING_FIELDS and (param.name not in winding_used or mask is not sections[0][0]):
                continue  # winding applies to wound keys only, given one way
            pts = [(a["key"], a[param.name]) for a in preset.anchors if param.name in a and mask[a["key"] - LOWEST_KEY]]
            if pts:
                out[mask] = _interpolate(param, [k for k, _ in pts], [v for _, v in pts], KEYS[mask])
            elif param.default is not None:
                out[mask] = param.default
            else:
                raise _err(source, f"no anchor in the {label} gives this required field "
                           f"({param.help}; allowed: {param.range_text()})", field_name=param.name)
        values[param.name] = out
    for key, fields in preset.overrides.items():
        for name, value in fields.items():
            values[name][key - LOWEST_KEY] = value
    return values


def load_preset(path: str | Path) -> Preset:
    """Read and validate a preset file.

    Raises
    ------
    PresetError
        If the file cannot be read, is not valid TOML, or fails validation.
    """
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise _err(str(p), f"cannot read the preset: {exc.strerror or exc}") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise _err(str(p), f"not a valid TOML file: {exc}") from None
    return parse_preset(data, source=str(p))


def preset_to_toml(preset: Preset) -> str:
    """The preset as TOML text."""
    return tomli_w.dumps(preset.to_dict())


def save_preset(preset: Preset, path: str | Path) -> Path:
    """Write a preset atomically; an existing file is kept as ``<name>.bak``."""
    return atomic_write_bytes(path, preset_to_toml(preset).encode("utf-8"))
