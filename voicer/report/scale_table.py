"""What the model believes about each key, as rows for people and for programs."""

from __future__ import annotations

__all__ = ["JSON_PARTIALS", "scale_report", "format_scale_table"]

from typing import Any

import numpy as np

from ..physics.tuning import cents, key_name
from ..tone.preset import Preset

#: Number of partial frequencies listed per key in the JSON report.
JSON_PARTIALS = 16


def scale_report(preset: Preset, *, partials: int = JSON_PARTIALS) -> dict[str, Any]:
    """Per-key table of the preset's scale, as plain data (the ``voicer scale --json`` schema).

    Parameters
    ----------
    preset : Preset
        The instrument.
    partials : int >= 1
        How many partial frequencies to list per key.
    """
    scale = preset.scale
    v = scale.values
    keys = []
    for i, key in enumerate(scale.keys):
        key = int(key)
        freqs = scale.partials_hz(key, partials)
        wound = bool(scale.wound[i])
        keys.append({
            "key": key,
            "name": key_name(key),
            "f0_hz": float(freqs[0]),
            "flexible_f0_hz": float(scale.f0_hz[i]),
            "stretch_cents": float(v["stretch_cents"][i]),
            "length_m": float(v["speaking_length_m"][i]),
            "core_diameter_mm": float(v["core_diameter_mm"][i]),
            "wound": wound,
            "winding_mass_g_per_m": float(scale.winding_mass_kg_per_m[i] * 1e3),
            "linear_mass_g_per_m": float(scale.linear_mass_kg_per_m[i] * 1e3),
            "tension_n": float(scale.tension_n[i]),
            "b": float(scale.b[i]),
            "wave_speed_m_s": float(scale.wave_speed_m_s[i]),
            "strings": int(v["strings"][i]),
            "strike_ratio": float(v["strike_ratio"][i]),
            "hammer_mass_g": float(v["hammer_mass_g"][i]),
            "hammer_width_mm": float(v["hammer_width_mm"][i]),
            "partials_hz": [float(f) for f in freqs],
        })
    return {
        "preset": preset.source,
        "name": preset.instrument["name"],
        "maker": preset.instrument["maker"],
        "a4_hz": preset.instrument["a4_hz"],
        "end_condition": preset.instrument["end_condition"],
        "keys": keys,
    }


def format_scale_table(report: dict[str, Any]) -> str:
    """Fixed-width text table of a :func:`scale_report` (one line per key)."""
    head = (f"{report['name'] or '(unnamed)'}  {report['maker']}\n"
            f"A4 = {report['a4_hz']:g} Hz, {report['end_condition']} string ends\n\n"
            " key note    f1 Hz  str  length m  wire mm      mu g/m  tension N         B  strike"
            "  partials 2-4 Hz           p8 cents")
    lines = [head]
    for row in report["keys"]:
        p = row["partials_hz"]
        wire = f"{row['core_diameter_mm']:.3f}" + (" wound" if row["wound"] else "      ")
        p8 = f"{float(cents(p[7], 8 * p[0])):+7.1f}" if len(p) >= 8 else "      -"
        extra = "".join(f" {f:8.1f}" for f in p[1:4])
        lines.append(
            f" {row['key']:3d} {row['name']:<4} {row['f0_hz']:9.2f}  {row['strings']:3d}  "
            f"{row['length_m']:8.3f}  {wire}  {row['linear_mass_g_per_m']:7.1f}  {row['tension_n']:9.0f}  "
            f"{row['b']:8.2e}  {row['strike_ratio']:6.3f} {extra:<27} {p8}")
    b = np.array([r["b"] for r in report["keys"]])
    lines.append(f"\n{len(report['keys'])} keys; B from {b.min():.2e} (key {report['keys'][int(b.argmin())]['key']}) "
                 f"to {b.max():.2e}; p8 cents = partial 8 against 8 x f1.")
    return "\n".join(lines)
