"""Per-partial envelopes and decays against synthetic notes with a known answer.

Ground truth is made here with plain numpy, independently of voicer's engine: sums of
exponentially damped sinusoids plus white Gaussian noise, as the issue asks ("plain numpy
sums of damped sinusoids with noise at 40 dB SNR"). An amplitude ``e^(-sigma t)`` falls
60 dB in ``T60 = ln(1000) / sigma`` (Chaigne & Askenfelt 1994, JASA 95, 1112; physics.md
section 4). Double decay is the sum of a prompt and an aftersound component at one
frequency, beats two components a few Hz apart with equal decay (Weinreich 1977, JASA 62,
1474-1484; physics.md section 5). The SNR is the rms of the note at its onset over the rms
of the noise, over the whole band.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from voicer.analysis.decay import (
    NOISE_MARGIN_DB,
    DecayFit,
    fit_decay,
    partial_envelopes,
)
from voicer.errors import ParameterError, RecordingError

LN1000 = math.log(1000.0)
ONSET_S = 0.1


def stretched(f0_hz: float, b: float, count: int) -> np.ndarray:
    """Pinned stiff-string partials f_n = n f0 sqrt(1 + B n^2) (Fletcher 1964, JASA 36, 203)."""
    n = np.arange(1, count + 1)
    return f0_hz * n * np.sqrt(1.0 + b * n**2)


def damped_sum(fs: float, dur_s: float, comps, *, rng, snr_db: float = 40.0) -> np.ndarray:
    """Sum of a e^(-ln(1000) (t - onset) / T60) sin(2 pi f (t - onset) + phase) from the onset
    on; comps is (freq_hz, amplitude, t60_s, phase); T60 = inf is a steady tone."""
    freq, amp, t60, phase = (np.asarray(c, dtype=float)[:, None] for c in zip(*comps))
    tau = np.arange(int(dur_s * fs))[None, :] / fs - ONSET_S
    on = tau >= 0
    rate = np.where(np.isfinite(t60), LN1000 / t60, 0.0)
    x = np.sum(np.where(on, amp * np.exp(-rate * np.maximum(tau, 0.0)) * np.sin(2 * np.pi * freq * tau + phase), 0.0),
               axis=0)
    rms_onset = math.sqrt(float(np.sum(amp**2)) / 2.0)
    return x + rng.normal(0.0, rms_onset * 10.0 ** (-snr_db / 20.0), x.shape)


def fits_of(x, fs, freqs) -> tuple[list[DecayFit], object]:
    env = partial_envelopes(x, fs, freqs, onset_s=ONSET_S)
    return [fit_decay(env.t_s, env.level_db[k], noise_db=env.noise_db[k]) for k in range(len(freqs))], env


def test_levels_are_re_a_unit_sine_and_the_floor_is_the_noise_power(rng) -> None:
    fs = 48_000.0
    t = np.arange(int(2 * fs)) / fs
    env = partial_envelopes(0.25 * np.sin(2 * np.pi * 1000.0 * t), fs, [1000.0, 2000.0], onset_s=0.0)
    # Definition: a sine of amplitude A reads 20 log10 A (0 dB for a unit sine).
    np.testing.assert_allclose(env.level_db[0], 20 * math.log10(0.25), atol=0.01)
    assert env.t_s[0] > 0 and np.allclose(np.diff(env.t_s), 0.005)
    # Noise alone: the floor is the mean power the envelope shows there (self-consistency
    # is what fit_decay relies on). Over 6 s at this bandwidth (~110 Hz) the two estimates
    # each scatter by ~0.17 dB (1 / sqrt(660 independent samples)): 1 dB is 4 sigma.
    noise = rng.normal(0.0, 0.01, int(6 * fs))
    env = partial_envelopes(noise, fs, [300.0, 700.0, 1500.0], onset_s=0.0)
    mean_power_db = 10 * np.log10(np.mean(10 ** (env.level_db / 10), axis=1))
    np.testing.assert_allclose(env.noise_db, mean_power_db, atol=1.0)


# Keys across the compass (ISO 16 / ET: A0 27.5 Hz, C4 261.63 Hz, C7 2093.0 Hz), sample
# rates of the issue, B in the usual range for the register (physics.md section 2, from
# memory), T60 spanning 0.3 to 30 s (physics.md section 4: 20-40 s low bass, < 1 s top).
COMPASS = [
    pytest.param(27.5, 2e-4, 44_100.0, np.geomspace(30.0, 1.0, 16), id="A0-44k1"),
    pytest.param(261.63, 4e-4, 48_000.0, np.geomspace(15.0, 1.0, 12), id="C4-48k"),
    pytest.param(2093.0, 5e-3, 96_000.0, np.geomspace(3.0, 0.3, 6), id="C7-96k"),
]


@pytest.mark.parametrize("f0, b, fs, t60", COMPASS)
def test_single_decays_within_five_percent(f0, b, fs, t60, rng) -> None:
    freqs = stretched(f0, b, len(t60))
    amps = 0.5 / np.arange(1, len(freqs) + 1)
    x = damped_sum(fs, 4.0 + ONSET_S, [(f, a, t, p) for f, a, t, p in
                                       zip(freqs, amps, t60, rng.uniform(0, 2 * np.pi, len(freqs)))], rng=rng)
    fits, env = fits_of(x, fs, freqs)
    long_enough = []
    for k, fit in enumerate(fits):
        err = fit.t60_s / t60[k] - 1.0
        assert fit.knee_s is None and fit.beat_hz is None, (k, fit)  # one component: no knee, no beat
        assert abs(fit.t60_s - t60[k]) < 4.0 * fit.t60_uncertainty_s, (k, fit)  # the error bar is honest
        # The rule for "good": at least 20 dB of decay seen above noise + margin and a
        # standard error within 1.5 %; whatever is called good is within the 5 %.
        # Where the truth shows 25 dB a fit is at least fair, and mostly good: short bass
        # decays seen through the narrow A0 filter have few independent samples (~10 in a
        # second), so their error bar (2-3 %, honest) keeps them fair.
        level0 = 20 * math.log10(amps[k]) - 60.0 * env.t_s[0] / t60[k]
        seen = min(60.0 * (env.t_s[-1] - env.t_s[0]) / t60[k], level0 - env.noise_db[k] - NOISE_MARGIN_DB)
        if seen >= 25.0:
            long_enough.append(fit.quality)
            assert fit.quality in ("good", "fair"), (k, seen, fit)
        if fit.quality == "good":
            assert abs(err) < 0.05, (k, fit)
            # The onset level is extrapolated back over the filter's settling (0.22 s at A0),
            # which carries the T60 error along: 1 dB (0.6 dB measured at T60 = 1.25 s).
            assert fit.level_db == pytest.approx(20 * math.log10(amps[k]), abs=1.0)
        if t60[k] >= 20.0:  # a 4 s note shows at most 8 dB of such a decay: flagged, yet still close
            assert fit.quality == "fair" and abs(err) < 0.05, (k, fit)
    assert long_enough.count("good") >= 0.5 * len(long_enough), long_enough


def test_level_error_bar_is_honest(rng) -> None:
    """The onset level's standard error (from the fit's covariance) covers its error over
    noise seeds and decays: each within 4 standard errors, their spread over the standard
    errors below 1.5 (never overconfident; at 40 dB SNR it is cautious, about 0.35 measured,
    as the weights' misfit floor of 0.3 dB takes over, see the T60 trend below), and it is
    a fraction of a dB on clear partials: a level is far better known than a T60."""
    fs, freqs = 48_000.0, stretched(261.63, 4e-4, 6)
    t60 = np.array([12.0, 8.0, 5.0, 3.0, 2.0, 1.2])
    amps = 0.3 / np.arange(1, 7)
    z = []
    for _ in range(6):
        x = damped_sum(fs, 3.0 + ONSET_S, [(f, a, t, p) for f, a, t, p in
                                           zip(freqs, amps, t60, rng.uniform(0, 2 * np.pi, 6))], rng=rng)
        for k, fit in enumerate(fits_of(x, fs, freqs)[0]):
            assert fit.level_uncertainty_db < 0.5, (k, fit)
            z.append((fit.level_db - 20 * math.log10(amps[k])) / fit.level_uncertainty_db)
    z = np.array(z)
    assert np.all(np.abs(z) < 4.0), z.round(2)
    assert float(np.std(z)) < 1.5, z.round(2)


def test_more_decay_seen_gives_better_quality(rng) -> None:
    """Trend: T60 = 20 s seen for 2, 4 and 12 s (3, 12 and 36 dB of decay)."""
    fs, freqs = 48_000.0, stretched(261.63, 4e-4, 3)
    fits = []
    for dur in (2.0, 4.0, 12.0):
        x = damped_sum(fs, dur + ONSET_S, [(f, 0.3, 20.0, 0.0) for f in freqs], rng=rng)
        fits.append(fits_of(x, fs, freqs)[0][0])
    assert [f.quality for f in fits] == ["poor", "fair", "good"]
    assert fits[2].t60_s == pytest.approx(20.0, rel=0.05)


def test_uncertainty_falls_as_the_noise_does(rng) -> None:
    """Trend: the same decay at 20, 30 and 40 dB SNR; the error bar shrinks (2.5-2.9 times
    from 20 to 40 dB, measured: less than the noise because the weights' misfit floor of
    0.3 dB takes over at high SNR), and stays honest."""
    fs, freqs = 48_000.0, stretched(261.63, 4e-4, 3)
    fits = []
    for snr in (20.0, 30.0, 40.0):
        x = damped_sum(fs, 4.0 + ONSET_S, [(f, 0.3, 5.0, 0.0) for f in freqs], rng=rng, snr_db=snr)
        fits.append(fits_of(x, fs, freqs)[0][0])
    errors = [f.t60_uncertainty_s for f in fits]
    assert errors[0] > errors[1] > errors[2] and errors[0] > 2.0 * errors[2]
    for f in fits:
        assert abs(f.t60_s - 5.0) < 4 * f.t60_uncertainty_s


@pytest.mark.parametrize("opposed", [0.0, 0.5, 1.0], ids=["in-phase", "quadrature", "opposed"])
def test_double_decay_prompt_and_aftersound(opposed, rng) -> None:
    # Prompt T60 3 s and aftersound 25 s, 20 dB down (the brief's example), their relative
    # phase 0 (the brief's model a1 e^(-s1 t) + a2 e^(-s2 t)), pi/2 or pi (a dip at the
    # knee). Tolerances: prompt 5 % (the target), aftersound 10 % (it shows only
    # ~12 dB of its decay in a 6 s note), knee 0.1 s (9 % of the analytic crossing, which
    # carries the errors of both rates and levels: 0.05 s measured at worst).
    fs, freqs = 48_000.0, stretched(261.63, 4e-4, 6)
    s1, s2 = LN1000 / 3.0, LN1000 / 25.0
    comps = []
    for n, f in enumerate(freqs, 1):
        phase = 0.7 * n
        comps += [(f, 0.3 / n, 3.0, phase), (f, 0.03 / n, 25.0, phase + np.pi * opposed)]
    fits, _ = fits_of(damped_sum(fs, 6.0 + ONSET_S, comps, rng=rng), fs, freqs)
    knee = math.log(10.0) / (s1 - s2)  # ln(a1 / a2) / (s1 - s2), a1 / a2 = 10
    for n, fit in enumerate(fits, 1):
        assert fit.knee_s is not None and fit.beat_hz is None, (n, fit)
        assert fit.t60_s == pytest.approx(3.0, rel=0.05)
        assert fit.after_t60_s == pytest.approx(25.0, rel=0.10)
        assert fit.knee_s == pytest.approx(knee, abs=0.1)
        assert fit.level_db == pytest.approx(20 * math.log10(0.3 / n), abs=0.3)
        assert fit.after_level_db == pytest.approx(20 * math.log10(0.03 / n), abs=1.0)
        # Held in or out of phase the prompt is known to ~1 %; a free phase costs precision.
        assert fit.quality == "good" if (n <= 3 and opposed != 0.5) else fit.quality in ("good", "fair"), fit


@pytest.mark.parametrize("beat_hz", [0.5, 1.5, 3.0])
@pytest.mark.parametrize("f0, b, fs", [(27.5, 2e-4, 44_100.0), (261.63, 4e-4, 48_000.0)], ids=["A0", "C4"])
def test_unison_beats(beat_hz, f0, b, fs, rng) -> None:
    # Two strings d apart beat at |d| (|e^(i 2 pi f t) + r e^(i 2 pi (f + d) t)| has period
    # 1/d); in Weinreich's regime beyond the coupling both decay at the same rate. The
    # measured partial frequency sits between the two. Tolerance 0.05 Hz (the brief).
    freqs = stretched(f0, b, 6)
    comps = []
    for n, f in enumerate(freqs, 1):
        comps += [(f, 0.3 / n, 8.0, 0.0), (f + beat_hz, 0.2 / n, 8.0, 1.0)]
    fits, _ = fits_of(damped_sum(fs, 4.0 + ONSET_S, comps, rng=rng), fs, freqs + 0.4 * beat_hz)
    for fit in fits:
        assert fit.beat_hz == pytest.approx(beat_hz, abs=0.05), fit
        assert fit.t60_s == pytest.approx(8.0, rel=0.05) and fit.knee_s is None
        # Level: the power sum of the pair, 10 log10(a1^2 + a2^2), averaged over the beats.
    assert fits[0].level_db == pytest.approx(10 * math.log10(0.3**2 + 0.2**2), abs=0.3)


def test_a_steady_tone_is_not_a_decay(rng) -> None:
    # Mains hum (50 Hz and harmonics) and a whine do not decay: the T60 must not read as one.
    fs = 48_000.0
    freqs = [50.0, 100.0, 150.0, 3150.0]
    x = damped_sum(fs, 4.0 + ONSET_S, [(f, 0.05, math.inf, 0.3) for f in freqs], rng=rng)
    for fit in fits_of(x, fs, freqs)[0]:
        assert fit.quality == "poor", fit
        assert math.isinf(fit.t60_s) or fit.t60_s > 100.0, fit


def test_bass_neighbours_do_not_leak(rng) -> None:
    # A0: partials 27.5 Hz apart, the sixth missing. Its track must stay below its equally
    # loud neighbours by the stop band of the envelope filter (60 dB; -63 dB measured).
    fs = 44_100.0
    freqs = stretched(27.5, 2e-4, 12)
    amps = np.ones(12)
    amps[5] = 0.0
    x = damped_sum(fs, 3.0 + ONSET_S, [(f, a, 10.0, p) for f, a, p in zip(freqs, amps, rng.uniform(0, 6, 12))],
                   rng=rng, snr_db=200.0)
    env = partial_envelopes(x, fs, freqs, onset_s=ONSET_S)
    leak = env.level_db[5] - np.maximum(env.level_db[4], env.level_db[6])
    assert leak.max() < -60.0
    fit = fit_decay(env.t_s, env.level_db[5], noise_db=env.noise_db[5])
    assert fit.quality == "poor"  # nothing there: flagged, not invented


def test_a_partial_under_the_noise_is_flagged_not_invented(rng) -> None:
    fs = 48_000.0
    x = damped_sum(fs, 3.0, [(440.0, 0.5, 5.0, 0.0)], rng=rng)
    env = partial_envelopes(x, fs, [440.0, 1000.0], onset_s=ONSET_S)
    fit = fit_decay(env.t_s, env.level_db[1], noise_db=env.noise_db[1])
    assert fit.quality == "poor" and math.isnan(fit.t60_s) and math.isnan(fit.level_db)


def test_a_short_decay_fits_quietly(rng) -> None:
    # Ten points above the noise (a fast treble partial in a noisy recording): a line, no
    # richer model, and no numerical warnings (the suite turns them into errors).
    t = np.arange(40) * 0.005
    level = -10.0 - 200.0 * t + rng.normal(0.0, 0.3, t.size)  # T60 = 0.3 s
    fit = fit_decay(t, np.maximum(level, -40.0 + rng.normal(0.0, 2.0, t.size)), noise_db=-40.0)
    assert fit.knee_s is None and fit.beat_hz is None
    assert fit.t60_s == pytest.approx(0.3, rel=0.1)


def test_bad_recordings_and_arguments(rng) -> None:
    fs = 48_000.0
    x = damped_sum(fs, 2.0, [(440.0, 0.5, 5.0, 0.0)], rng=rng)
    bad = x.copy()
    bad[48_000] = np.nan
    with pytest.raises(RecordingError, match=r"at 1\.00 s: .*not finite"):
        partial_envelopes(bad, fs, [440.0], onset_s=ONSET_S)
    with pytest.raises(RecordingError, match=r"onset lies outside the recording \(0 to 2\.000 s\)"):
        partial_envelopes(x, fs, [440.0], onset_s=2.5)
    with pytest.raises(RecordingError, match=r"too short .*separate partials 27\.5 Hz apart"):
        partial_envelopes(x, fs, [27.5, 55.0], onset_s=ONSET_S, end_s=ONSET_S + 0.3)
    with pytest.raises(RecordingError, match="must end after its onset"):
        partial_envelopes(x, fs, [440.0], onset_s=1.0, end_s=0.5)
    with pytest.raises(ParameterError, match=r"one channel.*shape \(2, 96000\)"):
        partial_envelopes(np.stack([x, x]), fs, [440.0], onset_s=ONSET_S)
    with pytest.raises(ParameterError, match="must lie in 0 < f < 24000 Hz"):
        partial_envelopes(x, fs, [440.0, 24_000.0], onset_s=ONSET_S)
    with pytest.raises(ParameterError, match=r"only 4\.000 Hz from another partial.*>= 10 Hz apart"):
        partial_envelopes(x, fs, [440.0, 444.0], onset_s=ONSET_S)
    with pytest.raises(ParameterError, match="hop_s=0.1 must lie in"):
        partial_envelopes(x, fs, [440.0], onset_s=ONSET_S, hop_s=0.1)
    with pytest.raises(ParameterError, match="same length"):
        fit_decay(np.arange(5.0), np.zeros(4))
    with pytest.raises(ParameterError, match="must increase"):
        fit_decay(np.zeros(5), np.zeros(5))
