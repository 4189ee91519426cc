"""From fitted keys to a preset: measured values where measured, the base elsewhere.

A fitted field becomes anchors at the fitted keys; the base preset's anchors of that
field inside the span of the fitted keys (per string section, for fields that do not
cross the wound/plain break) give way to them, those outside stay. So the fitted keys
carry their measured values exactly and the keys between them follow the measured trend
(the preset's usual smooth interpolation), while beyond the measured span the base
instrument carries on. A fit of poor quality is not written into the scale (it is kept in
the provenance, so the technician can see it and record that note again).
"""

from __future__ import annotations

__all__ = ["KeyFit", "FITTED_FIELDS", "fitted_preset"]

from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from ..physics.scale import core_diameter_for_b
from ..physics.tuning import LOWEST_KEY
from ..tone.params import KEY_PARAM_BY_NAME
from ..tone.preset import Preset, parse_preset
from .felt_fit import FeltFit
from .losses import LossFit

#: Fields a fit can set, in the order they are derived.
FITTED_FIELDS = ("stretch_cents", "core_diameter_mm", "strike_ratio", "felt_force_1mm_n", "felt_exponent",
                 "loss_b1_per_s", "loss_b3_s")
#: Below this, a fitted b3 is written as this (the preset's b3 must be > 0: every real
#: string loses more at high frequency).
_MIN_B3_S = 1e-14


@dataclass(frozen=True)
class KeyFit:
    """Everything fitted for one key.

    Attributes
    ----------
    key : int
    sources : tuple of (file, onset_s)
        The strikes it came from.
    first_partial_hz, cents_from_et : float
        Pitch of the first partial, and its distance from equal temperament at the base
        preset's A4.
    b, b_uncertainty : float or None
        Inharmonicity.
    strike_ratio, strike_uncertainty : float or None
    felt : FeltFit or None
    losses : LossFit or None
    measured : mapping or None
        The key's ``[measured.K]`` table (partials as measured, levels in dB re 1 N),
        without its ``fitted`` part (added here).
    quality : str
        ``good`` | ``fair`` | ``poor``: the worst of the parts that are written.
    notes : tuple of str
    """

    key: int
    sources: tuple[tuple[str, float], ...]
    first_partial_hz: float
    cents_from_et: float
    b: float | None = None
    b_uncertainty: float | None = None
    strike_ratio: float | None = None
    strike_uncertainty: float | None = None
    strike_quality: str = "poor"
    felt: FeltFit | None = None
    losses: LossFit | None = None
    measured: Mapping[str, Any] | None = None
    quality: str = "fair"
    notes: tuple[str, ...] = field(default=())


def _field_values(base: Preset, fit: KeyFit, offset_cents: float) -> dict[str, float]:
    """The preset values a key's fit gives (only the parts good enough to write)."""
    i = fit.key - LOWEST_KEY
    r = base.resolved
    out: dict[str, float] = {"stretch_cents": float(fit.cents_from_et - offset_cents)}
    if fit.b is not None and np.isfinite(fit.b):
        wind_d, wind_m = r["winding_diameter_mm"][i], r["winding_mass_g_per_m"][i]
        out["core_diameter_mm"] = 1e3 * core_diameter_for_b(
            fit.b, fit.first_partial_hz, float(r["speaking_length_m"][i]),
            winding_diameter_m=float(wind_d) * 1e-3 if np.isfinite(wind_d) else None,
            added_mass_kg_per_m=float(wind_m) * 1e-3 if np.isfinite(wind_m) else 0.0,
            end=base.instrument["end_condition"])
    if fit.strike_ratio is not None and fit.strike_quality != "poor":
        out["strike_ratio"] = float(fit.strike_ratio)
    if fit.felt is not None and fit.felt.quality != "poor":
        out["felt_force_1mm_n"] = fit.felt.force_1mm_n
        if fit.felt.exponent_uncertainty is not None:
            out["felt_exponent"] = fit.felt.exponent
    if fit.losses is not None and fit.losses.quality != "poor":
        out["loss_b1_per_s"] = fit.losses.b1_per_s
        out["loss_b3_s"] = max(fit.losses.b3_s, _MIN_B3_S)
    return out


def fitted_preset(base: Preset, fits: Sequence[KeyFit], *, provenance: Mapping[str, Any],
                  source: str | None = None) -> Preset:
    """The base preset with the fitted keys written in.

    Parameters
    ----------
    base : Preset
        The instrument the fit started from (lengths, windings, hammers not measured).
    fits : sequence of KeyFit
        One per key (keys unique).
    provenance : mapping
        Written as the preset's ``[provenance]`` (what was fitted from what, and when);
        a ``note`` list per key is added here.
    source : str, optional
        File name for error messages (the output path).

    Raises
    ------
    PresetError
        If the fitted values make no valid preset (named by key and field).
    """
    keys = [f.key for f in fits]
    if len(set(keys)) != len(keys):
        raise ValueError(f"one fit per key expected, got keys {sorted(keys)}")
    usable = [f for f in fits if f.quality != "poor"]
    # The instrument's pitch as a whole goes to A4; the keys keep their stretch around it.
    # The whole is measured against the base's own stretch: a few bass notes of a piano
    # stretched like the base are not a flat piano (nor a few treble notes a sharp one).
    stretch = base.resolved["stretch_cents"]
    offset = float(np.median([f.cents_from_et - stretch[f.key - LOWEST_KEY] for f in usable])) if usable else 0.0
    data = base.to_dict()
    a4 = base.instrument["a4_hz"] * 2.0 ** (offset / 1200.0)
    data["instrument"]["a4_hz"] = round(a4, 2)
    offset = 1200.0 * np.log2(data["instrument"]["a4_hz"] / base.instrument["a4_hz"])
    values = {f.key: _field_values(base, f, offset) for f in usable}
    anchors = {a["key"]: dict(a) for a in data["anchor"]}
    overrides = {int(k): dict(v) for k, v in data.get("override", {}).items()}
    last_wound = base.instrument["last_wound_key"]
    for name in FITTED_FIELDS:
        fitted = {k: v[name] for k, v in values.items() if name in v}
        if not fitted:
            continue
        sections = [(lambda k: k <= last_wound), (lambda k: k > last_wound)] if KEY_PARAM_BY_NAME[name].sectioned \
            else [lambda k: True]
        for inside in sections:
            mine = [k for k in fitted if inside(k)]
            if not mine:
                continue
            lo, hi = min(mine), max(mine)
            for table in (anchors, overrides):
                for k, t in table.items():
                    if lo <= k <= hi and inside(k):
                        t.pop(name, None)
        for k, v in fitted.items():
            anchors.setdefault(k, {"key": k})[name] = v
    data["anchor"] = [anchors[k] for k in sorted(anchors) if len(anchors[k]) > 1]
    data["override"] = {str(k): v for k, v in sorted(overrides.items()) if v}
    if not data["override"]:
        del data["override"]
    data["provenance"] = {**dict(provenance), "pitch_offset_cents": round(float(offset), 2),
                          "note": [_note_record(f) for f in fits]}
    preset = parse_preset(data, source=source)
    measured = {str(f.key): {**dict(f.measured), "fitted": _key_values(preset, f.key)}
                for f in fits if f.measured is not None and f.key in values}
    if not measured:
        return preset
    data["measured"] = measured
    return parse_preset(data, source=source)


def _key_values(preset: Preset, key: int) -> dict[str, Any]:
    """Every per-key value of ``key`` as the preset resolves it: the state the measured
    partials were recorded in, so that any later voicing change is heard against it."""
    i = key - LOWEST_KEY
    out: dict[str, Any] = {}
    strings = int(preset.resolved["strings"][i])
    for name, param in KEY_PARAM_BY_NAME.items():
        value = float(preset.resolved[name][i])
        if name.startswith("mating_") and int(name.split("_")[1]) > strings:
            continue  # no such string on this key
        if np.isfinite(value):
            out[name] = int(value) if param.kind == "int" else value
    return out


def _note_record(fit: KeyFit) -> dict[str, Any]:
    """One key's line in the provenance: where it came from, what was fitted, how well."""
    rec: dict[str, Any] = {"key": fit.key, "files": [s for s, _ in fit.sources],
                           "onsets_s": [round(t, 3) for _, t in fit.sources], "quality": fit.quality,
                           "first_partial_hz": round(fit.first_partial_hz, 4),
                           "cents_from_et": round(fit.cents_from_et, 2)}
    if fit.b is not None:
        rec["b"], rec["b_uncertainty"] = float(fit.b), float(fit.b_uncertainty or 0.0)
    if fit.strike_ratio is not None:
        rec["strike_ratio"] = round(float(fit.strike_ratio), 4)
        rec["strike_ratio_uncertainty"] = round(float(fit.strike_uncertainty or 0.0), 4)
        rec["strike_quality"] = fit.strike_quality
    if fit.felt is not None:
        rec["felt_force_1mm_n"] = round(fit.felt.force_1mm_n, 3)
        rec["felt_force_factor"] = round(fit.felt.force_factor, 3)
        rec["felt_exponent"] = round(fit.felt.exponent, 3)
        if fit.felt.exponent_uncertainty is not None:
            rec["felt_exponent_uncertainty"] = round(fit.felt.exponent_uncertainty, 3)
        rec["hammer_speeds_m_s"] = [round(v, 3) for v in fit.felt.speeds_m_s]
        rec["felt_quality"] = fit.felt.quality
        rec["level_misfit_db"] = round(fit.felt.residual_db, 2)
    if fit.losses is not None:
        rec["loss_b1_per_s"], rec["loss_b3_s"] = fit.losses.b1_per_s, fit.losses.b3_s
        rec["loss_quality"] = fit.losses.quality
    if fit.notes:
        rec["notes"] = list(fit.notes)
    return rec
