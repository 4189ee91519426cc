"""Benchmark: analysis and fit of recordings (targets, one core: one 4 s note analysed in
under 0.5 s; a fitted preset from a 60-note take in under 60 s).

Prints, measured in this run:
* one 4 s note at 48 kHz (key 60): load, segmentation, steady tones, partial series,
  envelopes and decays, strike ratio, and the total against the note's length (ratio);
* a 60-note take across the compass (2.5 s a note, 48 kHz, one file): analysis, the fit
  of every key and writing the preset, with the share spent in the contact simulation
  of the felt fit (ratio).

The notes are synthetic (plain numpy sums of decaying stiff-string partials with noise),
as in tests/test_analysis_truth.py: timing does not depend on where a recording came from.

Usage: python scripts/bench_fit.py
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core, as the target says

import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import soundfile as sf  # noqa: E402

import voicer.tone.tables as tables_module  # noqa: E402
from voicer.analysis.audio import load_recording  # noqa: E402
from voicer.analysis.fit import fit_recordings  # noqa: E402
from voicer.analysis.note import analyze_note, analyze_recording  # noqa: E402
from voicer.analysis.onsets import segment  # noqa: E402
from voicer.analysis.steady import find_steady_tones  # noqa: E402
from voicer.physics.tuning import equal_tempered_hz  # noqa: E402
from voicer.resources import find_preset  # noqa: E402
from voicer.tone.preset import load_preset, save_preset  # noqa: E402

FS = 48_000


def note(key: int, seconds: float, rng: np.random.Generator) -> np.ndarray:
    """A struck note: decaying partials f_n = n f0 sqrt(1 + B n^2) (Fletcher 1964)."""
    b = 1.5e-4 * 2 ** ((key - 40) / 12) if key > 40 else 1.5e-4 * 2 ** ((40 - key) / 24)
    f1 = equal_tempered_hz(key)
    n = np.arange(1, 61)
    f = n * f1 / np.sqrt(1 + b) * np.sqrt(1 + b * n**2)
    n, f = n[f < 0.45 * FS], f[f < 0.45 * FS]
    sigma = 0.5 + 2.5e-10 * (2 * np.pi * f) ** 2
    amp = 0.2 * np.abs(np.sin(n * np.pi * 0.12)) / (1 + (n / 6.0) ** 2) + 1e-4
    t = np.arange(int(seconds * FS)) / FS
    x = np.zeros_like(t)
    for a, fr, s, ph in zip(amp, f, sigma, rng.uniform(0, 2 * np.pi, len(n))):
        x += a * np.exp(-s * t) * np.sin(2 * np.pi * fr * t + ph)
    return x + 1e-4 * rng.standard_normal(len(t))


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def bench_note(folder: Path, rng: np.random.Generator) -> None:
    path = folder / "c4.wav"
    sf.write(path, np.concatenate([np.zeros(FS // 4), note(60, 4.0, rng)]).astype(np.float32), FS, subtype="FLOAT")
    analyze_recording(path)  # warm-up (imports, FFT plans)
    best = {}
    for _ in range(3):
        rec, t_load = timed(lambda: load_recording(path))
        take, t_seg = timed(lambda: segment(rec))
        steady, t_steady = timed(lambda: find_steady_tones(rec.samples, FS, [s.onset_s for s in take.strikes]))
        _, t_note = timed(lambda: analyze_note(rec, take.strikes[0], exclude_hz=tuple(t.freq_hz for t in steady)))
        total = t_load + t_seg + t_steady + t_note
        if total < best.get("total", np.inf):
            best = {"load": t_load, "segment": t_seg, "steady tones": t_steady, "series, decays, strike": t_note,
                    "total": total}
    print("one 4 s note at 48 kHz (key 60), best of 3:")
    for name, value in best.items():
        print(f"  {name:24s} {value * 1e3:7.1f} ms")
    print(f"  analysis / note length    {best['total'] / 4.0:.3f} (target: total < 500 ms)")


def bench_take(folder: Path, rng: np.random.Generator) -> None:
    keys = np.unique(np.round(np.linspace(21, 108, 60)).astype(int))
    take = np.concatenate([note(int(k), 2.5, rng) for k in keys])
    path = folder / "take.wav"
    sf.write(path, np.concatenate([np.zeros(FS // 2), take]).astype(np.float32), FS, subtype="FLOAT")
    base = load_preset(find_preset("demo"))
    kernel = 0.0
    original = tables_module.simulate_contacts

    def counting(*args, **kwargs):
        nonlocal kernel
        out, dt = timed(lambda: original(*args, **kwargs))
        kernel += dt
        return out

    tables_module.simulate_contacts = counting
    analysis, t_analysis = timed(lambda: analyze_recording(path))
    result, t_fit = timed(lambda: fit_recordings([analysis], base, source=str(folder / "client.toml")))
    _, t_save = timed(lambda: save_preset(result.preset, folder / "client.toml"))
    tables_module.simulate_contacts = original
    total = t_analysis + t_fit + t_save
    print(f"a {len(keys)}-note take ({len(take) / FS:.0f} s at 48 kHz, one file):")
    print(f"  analysis                 {t_analysis:7.2f} s ({len(analysis.notes)} notes found)")
    print(f"  fit of {len(result.fits)} keys            {t_fit:7.2f} s, of which contact simulation {kernel:.2f} s "
          f"(ratio {kernel / t_fit:.2f})")
    print(f"  preset written           {t_save * 1e3:7.1f} ms")
    print(f"  total                    {total:7.2f} s (target < 60 s)")


def main() -> None:
    rng = np.random.default_rng(1)
    with tempfile.TemporaryDirectory() as tmp:
        os.environ["VOICER_CACHE_DIR"] = str(Path(tmp) / "cache")
        bench_note(Path(tmp), rng)
        bench_take(Path(tmp), rng)


if __name__ == "__main__":
    main()
