"""`voicer inspect`: the predicted blow of one key at one velocity, for people and programs."""

from __future__ import annotations

__all__ = ["DEFAULT_PARTIALS", "inspect_key", "format_inspect", "bridge_force"]

from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..physics.strings import t60_s
from ..physics.tuning import cents, key_name
from ..tone.preset import Preset
from ..tone.tables import TableSettings, simulate_blows
from ..tone.velocity import hammer_speed
from .spectrum import levels_db

#: Partials listed by default.
DEFAULT_PARTIALS = 24


def bridge_force(freq_hz: NDArray[np.float64], sigma_per_s: NDArray[np.float64], amplitude_n: NDArray[np.complex128],
                 t_s: NDArray[np.float64]) -> NDArray[np.float64]:
    """``Re sum A exp((-sigma + i 2 pi f) t)``: the bridge force of the free vibration."""
    lam = -sigma_per_s + 2j * np.pi * freq_hz
    return np.real(np.exp(np.outer(t_s, lam)) @ amplitude_n)


def inspect_key(preset: Preset, key: int, velocity: int, *, partials: int = DEFAULT_PARTIALS,
                settings: TableSettings = TableSettings()) -> dict[str, Any]:
    """Simulate one blow at the exact hammer speed of a MIDI velocity and summarise it.

    Returns a dict with the JSON fields of ``voicer inspect --json`` (see the README) and,
    under ``"_pulse"``, the force pulse and the partial arrays for plotting.
    """
    speed = float(hammer_speed(velocity, preset.instrument))
    blows = simulate_blows(preset, [key], [speed], settings=settings, record=True)
    table = blows.tables[key]
    amp = table.amplitude_n[0].sum(axis=0)
    level = levels_db(amp)
    f1 = float(table.freq_hz[0])
    n = np.arange(1, len(table.freq_hz) + 1)
    dev = cents(table.freq_hz, n * f1)
    t60 = t60_s(table.sigma_per_s)
    shown = min(partials, len(n))
    return {
        "key": key,
        "name": key_name(key),
        "velocity": velocity,
        "hammer_speed_m_s": speed,
        "strings": int(table.amplitude_n.shape[1]),
        "contact_ms": float(table.contact_s[0] * 1e3),
        "contacts": int(table.contacts[0]),
        "peak_force_n": float(table.peak_force_n[0]),
        "rebound_m_s": float(table.rebound_m_s[0]),
        "partials": [
            {"n": int(n[i]), "freq_hz": float(table.freq_hz[i]), "level_db": float(level[i]),
             "cents": float(dev[i]), "t60_s": float(t60[i])}
            for i in range(shown)
        ],
        "_pulse": {"force_n": blows.force_n[key][0] if blows.force_n else np.zeros(0),
                   "dt_s": float(blows.dt_s[key][0]), "freq_hz": table.freq_hz,
                   "sigma_per_s": table.sigma_per_s, "amplitude_n": amp},
    }


def format_inspect(report: dict[str, Any]) -> str:
    """Text of ``voicer inspect``."""
    head = (f"key {report['key']} ({report['name']}), velocity {report['velocity']}: "
            f"hammer at {report['hammer_speed_m_s']:.2f} m/s on {report['strings']} string(s)\n"
            f"contact {report['contact_ms']:.2f} ms"
            + (f" ({report['contacts']} contacts)" if report["contacts"] > 1 else "")
            + f", peak force {report['peak_force_n']:.1f} N, rebound {report['rebound_m_s']:.2f} m/s\n\n"
            "   n    freq Hz   level dB   rel dB   cents    T60 s")
    top = max(p["level_db"] for p in report["partials"])
    lines = [head]
    for p in report["partials"]:
        lines.append(f" {p['n']:3d} {p['freq_hz']:10.2f} {p['level_db']:9.1f} {p['level_db'] - top:8.1f} "
                     f"{p['cents']:+7.1f} {p['t60_s']:8.2f}")
    lines.append("\nlevel: bridge force in dB re 1 N; cents: partial n against n x the first partial.")
    return "\n".join(lines)
