"""Plots for people (matplotlib, the ``plots`` extra, imported only when a plot is asked for)."""

from __future__ import annotations

__all__ = ["plot_inspect"]

from pathlib import Path
from typing import Any

import numpy as np

from ..errors import VoicerError
from .inspect import bridge_force


def _pyplot() -> Any:
    try:
        import matplotlib
    except ImportError:
        raise VoicerError("plots need matplotlib: pip install 'voicer[plots]'") from None
    matplotlib.use("Agg")  # files only; no screen needed
    import matplotlib.pyplot as plt

    return plt


def plot_inspect(report: dict[str, Any], path: str | Path) -> Path:
    """Contact force pulse, bridge force over the first 50 ms, and the partial spectrum."""
    plt = _pyplot()
    pulse = report["_pulse"]
    fig, axes = plt.subplots(3, 1, figsize=(8.0, 9.0))
    title = f"key {report['key']} ({report['name']}), velocity {report['velocity']}, " \
            f"{report['hammer_speed_m_s']:.2f} m/s"
    fig.suptitle(title)

    force = pulse["force_n"]
    t_ms = pulse["dt_s"] * np.arange(1, len(force) + 1) * 1e3
    ax = axes[0]
    ax.plot(t_ms, force, color="tab:red")
    ax.set(xlabel="time (ms)", ylabel="felt force (N)",
           title=f"contact {report['contact_ms']:.2f} ms, peak {report['peak_force_n']:.1f} N")

    t = np.arange(0, 0.05, 1 / 48_000.0)
    ax = axes[1]
    ax.plot(t * 1e3, bridge_force(pulse["freq_hz"], pulse["sigma_per_s"], pulse["amplitude_n"], t), lw=0.6)
    ax.set(xlabel="time (ms)", ylabel="bridge force (N)", title="bridge force, first 50 ms")

    ax = axes[2]
    freq = pulse["freq_hz"]
    level = 20 * np.log10(np.maximum(np.abs(pulse["amplitude_n"]), 1e-15))
    floor = level.max() - 100
    ax.vlines(freq, floor, np.maximum(level, floor), color="tab:blue", lw=1.2, label="predicted partials")
    harmonics = freq[0] * np.arange(1, len(freq) + 1)
    for h in harmonics[harmonics < freq[-1] * 1.05]:
        ax.axvline(h, color="0.6", lw=0.5, ls=":")
    ax.plot([], [], color="0.6", lw=0.5, ls=":", label="harmonic positions n f1")
    ax.set(xlabel="frequency (Hz)", ylabel="level (dB re 1 N)", ylim=(floor, level.max() + 5),
           title="partial spectrum")
    ax.legend(loc="upper right", fontsize="small")
    fig.tight_layout()
    out = Path(path)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out
