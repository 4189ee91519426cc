"""Synthetic piano notes made independently of voicer's engine (plain numpy), for tests.

A note is a sum of exponentially decaying sinusoids at the stiff-string partials
f_n = n f0 sqrt(1 + B n^2) (Fletcher 1964, JASA 36, 203), amplitudes following
sin(n pi beta) for a strike at beta (the mode shape at the strike point) times a smooth
roll-off, decay rates sigma_n = b1 + b3 omega_n^2 (Chaigne & Askenfelt 1994), white noise.
"""

from __future__ import annotations

import numpy as np

from voicer.physics.tuning import equal_tempered_hz

ONSET_S, LENGTH_S = 0.3, 4.0
CENTS_OFF = 3.0  # every note a little sharp of ET


def synth_note(key, b, beta, fs, rng, *, snr_db=40.0, hum_dbfs=None, hum_hz=50.0):
    """The note and its truth: (signal, f1, partial table). With ``hum_dbfs``, steady mains
    hum at ``hum_hz`` and its first 10 harmonics (each 3 dB below the one before) over the
    whole file, the lead-in included."""
    f1 = equal_tempered_hz(key) * 2 ** (CENTS_OFF / 1200)
    f0 = f1 / np.sqrt(1 + b)
    n = np.arange(1, 61)
    f = n * f0 * np.sqrt(1 + b * n**2)
    n, f = n[f < 0.45 * fs], f[f < 0.45 * fs]
    sigma = 0.6 + 2.5e-10 * (2 * np.pi * f) ** 2 * (1 + key / 60)
    amp = 0.3 * np.abs(np.sin(n * np.pi * beta)) / (1 + (n / 6.0) ** 2) + 1e-4
    t = np.arange(int((ONSET_S + LENGTH_S) * fs)) / fs
    tt = np.clip(t - ONSET_S, 0, None)
    on = t >= ONSET_S
    phase = rng.uniform(0, 2 * np.pi, len(n))
    x = np.zeros_like(t)
    for a, fr, s, ph in zip(amp, f, sigma, phase):
        x += on * a * np.exp(-s * tt) * np.sin(2 * np.pi * fr * tt + ph)
    first = (t >= ONSET_S) & (t < ONSET_S + 1.0)
    noise = np.sqrt(np.mean(x[first] ** 2)) * 10 ** (-snr_db / 20)
    x += noise * rng.standard_normal(len(t))
    if hum_dbfs is not None:
        for h in range(1, 11):
            x += 10 ** ((hum_dbfs - 3 * (h - 1)) / 20) * np.sin(2 * np.pi * h * hum_hz * t + rng.uniform(0, 2 * np.pi))
    return x, f1, {"n": n, "freq_hz": f, "t60_s": np.log(1000) / sigma, "amp": amp}


