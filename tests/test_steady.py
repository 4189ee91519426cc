"""Steady tones that are not the piano (voicer.analysis.steady).

Ground truth made here with plain numpy: notes are sums of decaying stretched partials
f_n = n f0 sqrt(1 + B n^2) (Fletcher 1964, JASA 36, 203), with noise at 40 dB SNR; mains is
50 or 60 Hz and its harmonics (common practice); the slowest piano
partials have T60 of 20-40 s (physics.md section 4, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest

from voicer.analysis.steady import MAX_FALL_DB_PER_S, SteadyTone, find_steady_tones
from voicer.errors import ParameterError

FREQ_TOL_HZ = 0.05  # "a fraction of a Hz": the windows resolve 0.5 Hz, peaks interpolate far finer
LEVEL_TOL_DB = 0.5  # Hann + parabolic interpolation on a twice zero-padded spectrum: ~0.1 dB
SNR_DB = 40.0  # the synthetic ground truth
DAMPER_S = 0.05  # a damped note dies with this time constant after the next onset
B = 2e-4


def note(f0: float, length: int, sr: float, rng: np.random.Generator, *, t60_1_s: float = 12.0,
         partials: int = 12, slow_t60_s: float | None = None) -> np.ndarray:
    """One struck note: stretched partials with amplitudes ~1/n and T60 falling with n."""
    t = (np.arange(length) / sr).astype(np.float32)  # float32: twice as fast, ample for 40 dB SNR
    n = np.arange(1, partials + 1)
    f = n * f0 * np.sqrt(1 + B * n**2)
    n, f = n[f < 0.45 * sr], f[f < 0.45 * sr]
    t60 = t60_1_s / (1 + 0.05 * n**2)
    if slow_t60_s is not None:
        t60[0] = slow_t60_s  # a slow bass fundamental
    amp = 0.2 / n * (np.abs(np.sin(n * np.pi / 8)) + 0.05)
    phase = rng.uniform(0, 2 * np.pi, len(n))
    decay = np.exp((-np.log(1000.0) / t60[:, None]).astype(np.float32) * t)
    waves = decay * np.sin((2 * np.pi * f[:, None]).astype(np.float32) * t + phase[:, None].astype(np.float32))
    return (amp.astype(np.float32) @ waves).astype(float)


def make_take(f0s, sr: float, rng: np.random.Generator, *, lead_s: float = 1.0, note_s: float = 2.5,
              tones=(), slow_t60_s: float | None = None) -> tuple[np.ndarray, list[float]]:
    """Notes struck every note_s after a lead-in, each damped at the next onset; noise at
    40 dB below the notes' rms; steady tones (freq_hz, level dBFS of a sine) throughout."""
    total = int(round((lead_s + note_s * len(f0s)) * sr))
    x = np.zeros(total)
    onsets = []
    for i, f0 in enumerate(f0s):
        start = int(round((lead_s + i * note_s) * sr))
        onsets.append(start / sr)
        last = i == len(f0s) - 1
        length = total - start if last else min(total - start, int((note_s + 10 * DAMPER_S) * sr))
        s = note(f0, length, sr, rng, slow_t60_s=slow_t60_s)
        if not last:
            t = np.arange(length) / sr
            s *= np.where(t > note_s, np.exp(-(t - note_s) / DAMPER_S), 1.0)
        x[start:start + length] += s
    rms = np.sqrt(np.mean(x[int(lead_s * sr):] ** 2))
    x += rng.normal(0, rms * 10 ** (-SNR_DB / 20), total)
    t = np.arange(total) / sr
    for freq, level in tones:
        x += 10 ** (level / 20) * np.sin(2 * np.pi * freq * t + rng.uniform(0, 2 * np.pi))
    return x, onsets


def assert_tones(found: tuple[SteadyTone, ...], expected: list[tuple[float, float, bool]]) -> None:
    """Exactly the expected tones (freq, level, mains): nothing else, so no piano partial."""
    assert [round(t.freq_hz) for t in found] == [round(f) for f, _, _ in expected], found
    for tone, (freq, level, mains) in zip(found, expected):
        assert abs(tone.freq_hz - freq) <= FREQ_TOL_HZ, tone
        assert abs(tone.level_db - level) <= LEVEL_TOL_DB, tone
        assert tone.mains is mains, tone


NOTES = (65.41, 130.81, 196.0, 261.63)  # C2, C3, G3, C4 (ET, A4 = 440 Hz)


@pytest.mark.parametrize("sr", [32_000, 48_000])
def test_50_hz_hum_and_harmonics(sr: int) -> None:
    rng = np.random.default_rng(1)
    hum = [(50.0, -50.0), (100.0, -50.0), (150.0, -50.0), (250.0, -50.0)]
    x, onsets = make_take(NOTES, sr, rng, tones=hum)
    assert_tones(find_steady_tones(x, sr, onsets), [(f, lv, True) for f, lv in hum])


def test_60_hz_hum() -> None:
    rng = np.random.default_rng(2)
    x, onsets = make_take(NOTES, 32_000, rng, tones=[(60.0, -50.0), (180.0, -55.0)])
    assert_tones(find_steady_tones(x, 32_000, onsets), [(60.0, -50.0, True), (180.0, -55.0, True)])


def test_whine_of_the_recording_chain() -> None:
    # 15.7 kHz (a line-scan whine) is the 314th harmonic of 50 Hz: a whine, not mains.
    rng = np.random.default_rng(3)
    x, onsets = make_take(NOTES, 44_100, rng, tones=[(15_700.0, -50.0)])
    assert_tones(find_steady_tones(x, 44_100, onsets), [(15_700.0, -50.0, False)])


def test_clean_take_has_none() -> None:
    rng = np.random.default_rng(4)
    x, onsets = make_take(NOTES, 32_000, rng)
    assert find_steady_tones(x, 32_000, onsets) == ()


def test_partial_two_hz_from_the_hum() -> None:
    # G1's partial 2 at 98.0 Hz beside the 100 Hz hum: the hum is found, the partial is not.
    rng = np.random.default_rng(5)
    f0 = 49.0 / np.sqrt(1 + 4 * B)  # partial 2 = 2 f0 sqrt(1 + 4B) = 98.0 Hz
    x, onsets = make_take((f0, 130.81, 261.63), 32_000, rng, tones=[(50.0, -50.0), (100.0, -50.0)])
    assert_tones(find_steady_tones(x, 32_000, onsets), [(50.0, -50.0, True), (100.0, -50.0, True)])


def test_repeated_bass_key_with_a_slow_partial() -> None:
    # E1 struck three times: its partials sit at the same frequency in every segment, and the
    # fundamental decays slowly (T60 = 30 s, 2 dB/s): still the piano, not a steady tone.
    rng = np.random.default_rng(6)
    x, onsets = make_take((41.2, 41.2, 41.2), 32_000, rng, slow_t60_s=30.0, tones=[(150.0, -55.0)])
    assert_tones(find_steady_tones(x, 32_000, onsets), [(150.0, -55.0, True)])


@pytest.mark.parametrize("lead_s", [0.5, 0.0])
def test_single_note_with_hum(lead_s: float) -> None:
    # One note (A1, fundamental T60 = 30 s), with and without a lead-in: only the hum.
    rng = np.random.default_rng(7)
    x, onsets = make_take((55.0,), 32_000, rng, lead_s=lead_s, note_s=4.0, slow_t60_s=30.0,
                          tones=[(50.0, -50.0), (100.0, -50.0)])
    assert onsets[0] == lead_s
    assert_tones(find_steady_tones(x, 32_000, onsets), [(50.0, -50.0, True), (100.0, -50.0, True)])


@pytest.mark.parametrize("fall_db_per_s, steady", [
    (0.0, True),
    (0.2, True),   # T60 = 300 s: below MAX_FALL_DB_PER_S, counts as steady
    (1.5, False),  # T60 = 40 s, the slowest piano partials (physics.md section 4)
    (3.0, False),  # T60 = 20 s
])
def test_fall_rate_threshold(fall_db_per_s: float, steady: bool) -> None:
    # A single note with no lead-in leaves only the decay test: the documented threshold.
    assert MAX_FALL_DB_PER_S == 0.5
    sr, rng = 32_000, np.random.default_rng(8)
    x, onsets = make_take((261.63,), sr, rng, lead_s=0.0, note_s=4.0)
    t = np.arange(len(x)) / sr
    x += 10 ** (-40 / 20) * 10 ** (-fall_db_per_s * t / 20) * np.sin(2 * np.pi * 1234.5 * t)
    found = [t.freq_hz for t in find_steady_tones(x, sr, onsets)]
    assert any(abs(f - 1234.5) <= FREQ_TOL_HZ for f in found) is steady


def test_mains_flag() -> None:
    # Harmonics of 50 Hz up to the 40th are mains (350 Hz: the 7th); 3000 Hz (the 60th) is
    # not, nor 440 Hz (its nearest, the 9th, would need a 48.9 Hz grid).
    sr, rng = 16_000, np.random.default_rng(9)
    t = np.arange(4 * sr) / sr
    x = rng.normal(0, 1e-4, len(t))
    for freq in (350.0, 440.0, 3000.0):
        x += 1e-3 * np.sin(2 * np.pi * freq * t)
    found = find_steady_tones(x, sr, [1.0, 2.5])
    assert [(round(f.freq_hz), f.mains) for f in found] == [(350, True), (440, False), (3000, False)]


@pytest.mark.parametrize("samples, sr, onsets, match", [
    (np.zeros(0), 32_000, [0.0], "non-empty 1-D array"),
    (np.zeros((2, 100)), 32_000, [0.0], r"non-empty 1-D array \(mono; got shape \(2, 100\)\)"),
    (np.r_[np.zeros(32_000), np.nan, np.zeros(10)], 32_000, [0.0], r"first non-finite sample at 1.000 s"),
    (np.zeros(32_000), 0.0, [0.0], "sample_rate=0.0 must be > 0"),
    (np.zeros(32_000), 32_000, [], "at least one onset"),
    (np.zeros(32_000), 32_000, [0.5, 0.2], r"increasing and within 0 <= t < 1.000 s"),
    (np.zeros(32_000), 32_000, [1.5], r"increasing and within 0 <= t < 1.000 s"),
])
def test_bad_input(samples, sr, onsets, match: str) -> None:
    with pytest.raises(ParameterError, match=match):
        find_steady_tones(samples, sr, onsets)


def test_bad_snr() -> None:
    with pytest.raises(ParameterError, match="min_snr_db=0 must be > 0"):
        find_steady_tones(np.zeros(32_000), 32_000, [0.0], min_snr_db=0)


def test_notes_too_short_give_none() -> None:
    # Segments shorter than two windows of 0.25 s cannot show a decay: nothing is claimed.
    x = np.random.default_rng(10).normal(0, 1e-3, 16_000) + 1e-2 * np.sin(2 * np.pi * 50 * np.arange(16_000) / 32_000)
    assert find_steady_tones(x, 32_000, [0.1, 0.3]) == ()
