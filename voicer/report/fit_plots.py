"""Plot of one analysed note (``voicer analyze --plot``): the measured spectrum with the
fitted stretched series and the model's partial levels over it, and the decays of the
first partials with their fitted stages."""

from __future__ import annotations

__all__ = ["plot_note"]

from pathlib import Path

import numpy as np

from ..analysis.audio import load_recording
from ..analysis.decay import partial_envelopes
from ..analysis.note import NoteAnalysis
from ..analysis.preset_out import KeyFit
from ..physics.tuning import key_name
from ..tone.preset import Preset
from ..tone.tables import simulate_blows
from .plots import _pyplot

DECAYS_SHOWN = 6


def _model_levels(fit: KeyFit, base: Preset) -> tuple[np.ndarray, np.ndarray] | None:
    """Partial levels the fitted felt predicts at the fitted speed, on the recording's scale."""
    if fit.felt is None:
        return None
    values = {"felt_force_1mm_n": fit.felt.force_1mm_n, "felt_exponent": fit.felt.exponent}
    if fit.strike_ratio is not None:
        values["strike_ratio"] = fit.strike_ratio
    preset = base.with_key_values(fit.key, values)
    table = simulate_blows(preset, [fit.key], [fit.felt.speeds_m_s[0]]).tables[fit.key]
    amp = np.abs(table.amplitude_n.sum(axis=1))[0]
    gain = next(iter(fit.felt.gain_db.values()))
    return table.freq_hz, 20 * np.log10(np.maximum(amp, 1e-15)) + gain


def plot_note(note: NoteAnalysis, fit: KeyFit | None, base: Preset, path: str | Path) -> Path:
    """Draw the note's spectrum and decays to ``path`` (PNG)."""
    plt = _pyplot()
    rec = load_recording(note.path)
    fs = rec.sample_rate
    i0, i1 = int(note.onset_s * fs), int(min(note.end_s, note.onset_s + 2.0) * fs)
    seg = rec.samples[i0:i1]
    win = np.hanning(len(seg))
    spec = np.fft.rfft(seg * win, 4 * len(seg))
    freq = np.fft.rfftfreq(4 * len(seg), 1 / fs)
    # dB re a unit sine: a sine of amplitude A peaks at A * sum(win) / 2.
    level = 20 * np.log10(np.maximum(np.abs(spec) * 2 / win.sum(), 1e-12))

    fig, axes = plt.subplots(2, 1, figsize=(9.0, 8.0))
    fig.suptitle(f"{Path(note.path).name}: {key_name(note.key)} (key {note.key}) at {note.onset_s:.2f} s, "
                 f"B {note.b:.3g}, {note.cents_from_et:+.1f} cents from ET")
    ax = axes[0]
    top = max(p.freq_hz for p in note.partials) * 1.1 if note.partials else fs / 2
    keep = freq <= top
    ax.plot(freq[keep], level[keep], color="0.55", lw=0.6, label="recording (first 2 s)")
    f0 = note.first_partial_hz / np.sqrt(1 + note.b)
    n = np.arange(1, int(top / note.first_partial_hz) + 2)
    series = n * f0 * np.sqrt(1 + note.b * n**2)
    for f in series[series <= top]:
        ax.axvline(f, color="tab:green", lw=0.5, ls=":")
    ax.plot([], [], color="tab:green", lw=0.5, ls=":", label="fitted series n f0 sqrt(1 + B n^2)")
    ax.plot([p.freq_hz for p in note.partials], [p.level_db for p in note.partials], "o", ms=4, color="tab:blue",
            label="measured partials (at the onset)")
    model = _model_levels(fit, base) if fit is not None else None
    if model is not None:
        mf, ml = model
        sel = mf <= top
        ax.plot(mf[sel], ml[sel], "x", ms=6, color="tab:red", label="model (fitted felt and speed)")
    floor = max(level[keep].max() - 90, level[keep].min())
    ax.set(xlabel="frequency (Hz)", ylabel="level (dB re full scale)", ylim=(floor, level[keep].max() + 10),
           title="spectrum")
    ax.legend(loc="upper right", fontsize="small")

    ax = axes[1]
    shown = note.partials[:DECAYS_SHOWN]
    if shown:
        env = partial_envelopes(rec.samples, fs, [p.freq_hz for p in shown], onset_s=note.onset_s, end_s=note.end_s)
        for j, p in enumerate(shown):
            line, = ax.plot(env.t_s, env.level_db[j], lw=0.8, label=f"n = {p.n}")
            t = env.t_s
            prompt = p.level_db - 60.0 * t / p.t60_s
            fitted = prompt
            if p.after_level_db is not None and p.after_t60_s is not None:
                after = p.after_level_db - 60.0 * t / p.after_t60_s
                fitted = 20 * np.log10(10 ** (prompt / 20) + 10 ** (after / 20))  # a_p e^-s_p t + a_a e^-s_a t
            ax.plot(t, fitted, ls="--", lw=0.8, color=line.get_color())
    ax.set(xlabel="time after the onset (s)", ylabel="level (dB re full scale)",
           title="decays of the first partials (dashed: fitted stages)")
    ax.legend(loc="upper right", fontsize="small", ncol=2)
    fig.tight_layout()
    out = Path(path)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out
