"""Partial series of one note (f0, B) against synthetic strings built here with plain numpy.

Ground truth is the issue's check: sums of exponentially decaying sinusoids at
``f_n = n f0 sqrt(1 + B n^2)`` (Fletcher 1964, JASA 36, 203-209) with random phases, amplitudes
smooth in n with a few weak partials (a strike point near 1/8.3 of the string), T60 from
~20 s at low n to under 1 s at high n, and white noise at 40 dB SNR re the signal's RMS over
its first second. The generator uses numpy only, nothing from voicer.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from voicer.analysis.partials import (
    SeriesFit,
    analysis_window_s,
    exclusion_tolerance_hz,
    find_series,
)
from voicer.errors import ParameterError, RecordingError

# B of a grand across the compass (from memory; physics.md "Typical B": least in the two
# octaves below middle C, >= 1e-2 in the top octave).
COMPASS_B = {21: 4e-4, 33: 1.5e-4, 45: 8e-5, 52: 1.2e-4, 60: 3.8e-4, 69: 6e-4, 81: 1.6e-3, 93: 5e-3, 105: 1.8e-2}
RATES = (44_100, 48_000, 96_000)
# Absolute accuracy of B reached where B < 2e-4 (the issue asks for 1 % only from 2e-4 up):
# measured errors are below 1e-8 on these notes (at most 7.8e-9); the check allows 5e-8.
B_ABS_TOL = 5e-8


def et_hz(key: int) -> float:
    # ISO 16: A4 = 440 Hz, twelve-tone equal temperament.
    return 440.0 * 2.0 ** ((key - 69) / 12.0)


def cents_between(f: float, ref: float) -> float:
    return 1200.0 * math.log2(f / ref)


def stiff_note(f1_hz: float, b: float, fs: int, *, duration_s: float = 1.1, seed: int = 0, snr_db: float = 40.0,
               partial_1_db: float | None = None, steady=None,
               detune_cents=None) -> tuple[np.ndarray, np.ndarray]:
    """A struck-string-like note; returns (samples, true frequencies of partials 1, 2, ...).

    ``partial_1_db`` sets partial 1 relative to partial 3; ``steady(t)`` adds a steady tone
    (hum) before the noise level is set; ``detune_cents(n)`` moves partial n off the
    formula by that many cents.
    """
    rng = np.random.default_rng(seed)
    f0 = f1_hz / math.sqrt(1.0 + b)
    n = np.arange(1, 121)
    fn = n * f0 * np.sqrt(1.0 + b * n * n)
    if detune_cents is not None:
        fn = fn * 2.0 ** (detune_cents(n) / 1200.0)
    n, fn = n[fn < 0.49 * fs], fn[fn < 0.49 * fs]
    n_roll = np.clip(12.0 * math.sqrt(110.0 / f1_hz), 1.5, 15.0)
    amp = (np.abs(np.sin(np.pi * n / 8.3)) + 0.02) / (1.0 + (n / n_roll) ** 2)
    if partial_1_db is not None:
        amp[0] = amp[2] * 10.0 ** (partial_1_db / 20.0)
    t60 = 1.0 / (1.0 / 20.0 + (fn / 4000.0) ** 2 + (n / 40.0) ** 2)
    s = (-math.log(1000.0) / t60 + 2j * np.pi * fn) / fs  # per-sample complex rate
    c = amp * np.exp(1j * rng.uniform(0.0, 2.0 * np.pi, n.size))
    # exp(s (i M + j)) = exp(s i M) exp(s j): one product instead of len x partials exps.
    m = 512
    total = int(duration_s * fs)
    rows = -(-total // m)
    x = ((np.exp(np.outer(np.arange(rows) * m, s)) * c) @ np.exp(np.outer(s, np.arange(m)))).imag.reshape(-1)[:total]
    if steady is not None:
        x = x + steady(np.arange(total) / fs)
    rms = math.sqrt(float(np.mean(x[:fs] ** 2)))
    return x + rng.normal(0.0, rms * 10.0 ** (-snr_db / 20.0), total), fn


def check_fit(fit: SeriesFit, f1_true: float, b_true: float, fs: float, max_partials: int = 60) -> None:
    # The targets: first partial within 0.1 cent, B within 1 % for B >= 2e-4.
    assert abs(cents_between(fit.first_partial_hz, f1_true)) < 0.1
    if b_true >= 2e-4:
        assert abs(fit.b / b_true - 1.0) < 0.01
    else:
        assert abs(fit.b - b_true) < B_ABS_TOL
    ns = [p.n for p in fit.peaks]
    assert ns == sorted(ns) and len(ns) >= 2 and ns[-1] <= max_partials
    assert not (set(ns) & set(fit.rejected)) and not (set(ns) & set(fit.unresolved))
    assert not (set(fit.rejected) & set(fit.unresolved))
    assert all(p.freq_hz < 0.45 * fs for p in fit.peaks)


@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("key", sorted(COMPASS_B))
def test_compass(key: int, fs: int) -> None:
    b = COMPASS_B[key]
    off = np.random.default_rng(key * fs).uniform(-30.0, 30.0)  # the piano is off ET by up to 30 cents
    f1 = et_hz(key) * 2.0 ** (off / 1200.0)
    x, _ = stiff_note(f1, b, fs, seed=key + fs)
    check_fit(find_series(x, fs, f0_guess_hz=et_hz(key)), f1, b, fs)


@pytest.mark.parametrize(("key", "b", "off_cents", "b_guess"), [
    (40, 1e-5, 12.0, None),  # the lowest B of the range
    (100, 1.2e-2, 30.0, None),  # a treble note 30 cents off its guess, B unknown
    (100, 1.2e-2, -30.0, 2.4e-2),  # ... with a guess of B twice too high
    (108, 3e-2, -30.0, None),  # C8: three partials below 0.45 fs at 44.1 kHz
    (24, 3e-4, 30.0, 1e-4),
])
def test_off_pitch_and_extreme_b(key: int, b: float, off_cents: float, b_guess: float | None) -> None:
    fs = 44_100
    f1 = et_hz(key) * 2.0 ** (off_cents / 1200.0)
    x, _ = stiff_note(f1, b, fs, seed=key)
    check_fit(find_series(x, fs, f0_guess_hz=et_hz(key), b_guess=b_guess), f1, b, fs)


def test_a_real_string_off_the_formula_keeps_its_strong_partials() -> None:
    """A real bass string's partials depart from Fletcher's formula by a cent or two
    (bridge coupling, unisons; measured on the fluid-soundfont-gm D1: -1.6 cents at n = 2,
    +1.9 at n = 4), far beyond what 40 dB SNR lets a strong partial's frequency be wrong
    by. Such a series, here with a fixed pseudo-random 1 cent rms detuning, keeps every
    partial: none is rejected (before the scatter term the strongest ones were), and the
    formula's first partial and B are found within 4 of their (scatter-aware) error bars."""
    fs, key, b = 44_100, 26, 6e-5
    detune = np.random.default_rng(3).normal(0.0, 1.0, 200)
    f1 = et_hz(key)
    x, fn = stiff_note(f1, b, fs, duration_s=3.0, seed=5, detune_cents=lambda n: detune[n - 1])
    fit = find_series(x, fs, f0_guess_hz=f1, max_partials=40)
    assert not fit.rejected, fit.rejected
    assert len(fit.peaks) >= 35
    # The series' first partial is the formula's (the detuned partial 1 is one point of 35).
    assert abs(cents_between(fit.first_partial_hz, f1)) < 4.0 * 1200.0 * math.log2(
        1.0 + fit.first_partial_uncertainty_hz / fit.first_partial_hz)
    assert abs(fit.b - b) < 4.0 * fit.b_uncertainty and fit.b_uncertainty < 0.05 * b


def test_peak_interpolation_bias_below_1e4_bin() -> None:
    # The module's claim: quadratic interpolation of ln|X|^2 under the truncated Gaussian
    # window is biased by < 1e-4 of a zero-padded bin (1/(4T)), decaying partials included
    # (exact for an untruncated Gaussian: J. O. Smith, Spectral Audio Signal Processing).
    fs = 48_000
    rng = np.random.default_rng(7)
    t = np.arange(int(0.6 * fs)) / fs
    worst = 0.0
    for t60 in (100.0, 2.0, 0.5):
        for _ in range(4):
            f1 = rng.uniform(400.0, 500.0)
            f0 = f1 / math.sqrt(1.001)
            fn = np.arange(1, 4) * f0 * np.sqrt(1.0 + 1e-3 * np.arange(1, 4) ** 2)
            x = sum(np.exp(-math.log(1000.0) / t60 * t) * np.cos(2 * np.pi * f * t + rng.uniform(0, 6.3)) / k
                    for k, f in enumerate(fn, 1))
            fit = find_series(x, fs, f0_guess_hz=f1 * 1.01)
            assert [p.n for p in fit.peaks] == [1, 2, 3]
            bin_hz = 1.0 / (4.0 * analysis_window_s(f1 * 1.01))
            worst = max(worst, max(abs(p.freq_hz - fn[p.n - 1]) / bin_hz for p in fit.peaks))
    assert worst < 1e-4


def test_levels_are_db_re_unit_sine() -> None:
    # Steady sines of amplitude 1 and 0.5: 0 dB and 20 log10(0.5) = -6.02 dB re a unit sine
    # (the definition of PartialPeak.level_db; the window gain is corrected).
    fs = 48_000
    t = np.arange(fs) / fs
    f0, b = 300.0, 4e-4
    f = [n * f0 * math.sqrt(1.0 + b * n * n) for n in (1, 2, 3)]
    x = np.sin(2 * np.pi * f[0] * t) + 0.5 * np.sin(2 * np.pi * f[1] * t + 1.0) + 0.25 * np.sin(2 * np.pi * f[2] * t)
    fit = find_series(x, fs, f0_guess_hz=f[0])
    np.testing.assert_allclose([p.level_db for p in fit.peaks], 20.0 * np.log10([1.0, 0.5, 0.25]), atol=0.01)


def test_uncertainty_is_honest_over_noise_seeds() -> None:
    # 40 noise (and phase) seeds of one cheap note: the error over the reported standard
    # deviation should spread like a unit normal; |error| < 3 sigma in >= 95 % of the seeds.
    fs, key, b = 44_100, 81, 1.6e-3
    f1 = et_hz(key) * 2.0 ** (7.0 / 1200.0)
    f0 = f1 / math.sqrt(1.0 + b)
    z, z_peaks = [], []
    for seed in range(40):
        x, fn = stiff_note(f1, b, fs, duration_s=0.4, seed=seed)
        fit = find_series(x, fs, f0_guess_hz=et_hz(key))
        z.append(((fit.f0_hz - f0) / fit.f0_uncertainty_hz, (fit.b - b) / fit.b_uncertainty,
                  (fit.first_partial_hz - f1) / fit.first_partial_uncertainty_hz))
        z_peaks += [(p.freq_hz - fn[p.n - 1]) / p.freq_uncertainty_hz for p in fit.peaks]
    z = np.array(z)
    assert np.all(np.sum(np.abs(z) < 3.0, axis=0) >= 38)
    assert np.all((np.std(z, axis=0) > 0.6) & (np.std(z, axis=0) < 1.5))
    # Each peak's own uncertainty, fast-decaying high partials at 10-30 dB SNR included
    # (measured spread 1.1; without the envelope-centroid term of the theory it is 1.5,
    # with only 93 % inside 3 sigma).
    z_peaks = np.array(z_peaks)
    assert z_peaks.size > 300 and np.mean(np.abs(z_peaks) < 3.0) >= 0.95 and 0.8 < np.std(z_peaks) < 1.3


# A G1 (49 Hz) near 50 Hz mains: hum lines 50 h Hz, h = 1..20, falling as 1/sqrt(h), the
# fundamental at the level of partial 1. Partials 1-4 lie within 4 Hz of a hum line.
G1 = 31
G1_B = 2e-4
HUM_HZ = 50.0 * np.arange(1, 21)


def g1_with_hum(seed: int) -> tuple[np.ndarray, np.ndarray]:
    n_roll = 15.0  # as in stiff_note for a 49 Hz note
    a1 = (abs(math.sin(math.pi / 8.3)) + 0.02) / (1.0 + (1.0 / n_roll) ** 2)

    def hum(t: np.ndarray) -> np.ndarray:
        return sum(a1 / math.sqrt(h) * np.sin(2 * np.pi * f * t + h) for h, f in enumerate(HUM_HZ, 1))

    return stiff_note(et_hz(G1), G1_B, 48_000, seed=seed, steady=hum)


@pytest.mark.parametrize("seed", [0, 1])
def test_excluded_hum_is_never_a_partial(seed: int) -> None:
    x, fn = g1_with_hum(seed)
    fit = find_series(x, 48_000, f0_guess_hz=et_hz(G1), exclude_hz=HUM_HZ)
    check_fit(fit, et_hz(G1), G1_B, 48_000)
    tol = exclusion_tolerance_hz(analysis_window_s(et_hz(G1)))
    assert all(np.min(np.abs(HUM_HZ - p.freq_hz)) > tol for p in fit.peaks)
    # Partials that fall within the tolerance of a hum line are flagged, not measured.
    merged = {n for n in range(1, 21) if np.min(np.abs(HUM_HZ - fn[n - 1])) < tol - 1.0}
    assert merged and merged <= set(fit.unresolved)


@pytest.mark.parametrize("seed", [0, 1])
def test_hum_not_excluded_is_rejected(seed: int) -> None:
    # The module's claim: where a hum line takes a partial's place it sits off the series
    # and is rejected; every partial used is the note's own (within 1 cent; the weakest
    # used peaks scatter by up to ~0.9 cent), and f1 and B meet the targets.
    x, fn = g1_with_hum(seed)
    fit = find_series(x, 48_000, f0_guess_hz=et_hz(G1))
    check_fit(fit, et_hz(G1), G1_B, 48_000)
    assert all(abs(cents_between(p.freq_hz, fn[p.n - 1])) < 1.0 for p in fit.peaks)
    assert {1, 2, 3, 4} <= set(fit.rejected)


def test_weak_bass_partial_1() -> None:
    fs, key, b = 48_000, 21, 4e-4
    # 40 dB below partial 3, partial 1 is still ~30 dB above the floor of a 1 s window
    # (the window gains 10 log10(N_eff / 4)): it is found and used.
    x, _ = stiff_note(et_hz(key), b, fs, seed=3, partial_1_db=-40.0)
    fit = find_series(x, fs, f0_guess_hz=et_hz(key))
    check_fit(fit, et_hz(key), b, fs)
    p1 = [p for p in fit.peaks if p.n == 1]
    assert p1 and p1[0].snr_db < 40.0  # so 40 dB weaker still is below the floor
    # 80 dB below partial 3: under the noise floor. It is flagged; the fit stands on the others.
    x, _ = stiff_note(et_hz(key), b, fs, seed=3, partial_1_db=-80.0)
    fit = find_series(x, fs, f0_guess_hz=et_hz(key))
    check_fit(fit, et_hz(key), b, fs)
    assert 1 in fit.unresolved and fit.peaks[0].n == 2


def test_exclusion_flags_the_partial_it_covers() -> None:
    fs, key = 48_000, 57
    b = 2e-4
    x, fn = stiff_note(et_hz(key), b, fs, seed=11)
    fit = find_series(x, fs, f0_guess_hz=et_hz(key), exclude_hz=[fn[4] + 0.5])
    check_fit(fit, et_hz(key), b, fs)
    assert 5 in fit.unresolved


def test_max_partials_and_end_of_note() -> None:
    fs, key, b = 48_000, 60, 3.8e-4
    x, _ = stiff_note(et_hz(key), b, fs, seed=4)
    fit = find_series(x, fs, f0_guess_hz=et_hz(key), max_partials=10)
    check_fit(fit, et_hz(key), b, fs, max_partials=10)
    # A louder next note (D4) from 0.3 s: with end_s there the window never reaches it.
    y, _ = stiff_note(et_hz(62), 4e-4, fs, seed=5)
    start = int(0.3 * fs)
    mixed = x.copy()
    mixed[start:] += 3.0 * y[: x.size - start]
    check_fit(find_series(mixed, fs, f0_guess_hz=et_hz(key), end_s=0.3), et_hz(key), b, fs)


def test_window_length_follows_f0() -> None:
    f = np.array([et_hz(k) for k in range(21, 109)])
    t = np.array([analysis_window_s(v) for v in f])
    assert t[0] == 1.0 and t[-1] == 0.25 and np.all(np.diff(t) <= 0)
    # Partial spacing (>= f0) spans at least 27 resolution cells 1/T everywhere.
    assert np.all(f * t >= 27.0)
    assert exclusion_tolerance_hz(1.0) == pytest.approx(16.0 / math.pi)


def test_recording_errors_name_the_time() -> None:
    fs = 48_000
    x, _ = stiff_note(et_hz(60), 3.8e-4, fs, seed=1)
    with pytest.raises(RecordingError, match=r"take\.wav at 0\.50 s: note too short .* need at least"):
        find_series(x[: int(0.52 * fs)], fs, f0_guess_hz=27.5, onset_s=0.5, file="take.wav")
    bad = x.copy()
    bad[12_000] = np.nan
    with pytest.raises(RecordingError, match=r"at 0\.25 s: non-finite sample"):
        find_series(bad, fs, f0_guess_hz=et_hz(60))
    with pytest.raises(RecordingError, match="silent"):
        find_series(np.zeros(fs), fs, f0_guess_hz=et_hz(60))
    with pytest.raises(RecordingError, match=r"onset 2\.0 s is outside the recording \(0 \.\. 1\.100 s\)"):
        find_series(x, fs, f0_guess_hz=et_hz(60), onset_s=2.0)
    with pytest.raises(RecordingError, match="sample rate 8000 Hz is too low"):
        find_series(x[::6], 8_000, f0_guess_hz=et_hz(99))
    noise = np.random.default_rng(0).normal(size=fs)
    with pytest.raises(RecordingError, match="found no series of at least 2 partials near 261.6 Hz"):
        find_series(noise, fs, f0_guess_hz=et_hz(60))


def test_parameter_errors() -> None:
    x = np.ones(1000)
    with pytest.raises(ParameterError, match=r"sample_rate=0 must be a finite number > 0"):
        find_series(x, 0, f0_guess_hz=100.0)
    with pytest.raises(ParameterError, match=r"f0_guess_hz=10.0 must be a frequency >= 20 Hz"):
        find_series(x, 48_000, f0_guess_hz=10.0)
    with pytest.raises(ParameterError, match=r"max_partials=1 must be an integer >= 2"):
        find_series(x, 48_000, f0_guess_hz=100.0, max_partials=1)
    with pytest.raises(ParameterError, match=r"b_guess=-0.001 must be a finite number > 0"):
        find_series(x, 48_000, f0_guess_hz=100.0, b_guess=-1e-3)
    with pytest.raises(ParameterError, match=r"must be one channel \(a 1-D array\), got shape \(2, 500\)"):
        find_series(x.reshape(2, 500), 48_000, f0_guess_hz=100.0)
