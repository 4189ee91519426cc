"""Strike ratio from the pattern of weak partials (voicer.analysis.strike).

References: partial n of a string struck at beta is excited as sin(n pi beta) (physics.md
section 6; Fletcher & Rossing, The Physics of Musical Instruments, ch. 12); stretched
partials f_n = n f0 sqrt(1 + B n^2) (Fletcher 1964, JASA 36, 203); the spectrum of a
half-sine force pulse in closed form (checked here against scipy.integrate.quad). The
issue's target for the strike ratio is 0.005.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from voicer.analysis.strike import MIN_PARTIALS, _reaction_db, fit_strike_ratio
from voicer.errors import ParameterError
from voicer.report.spectrum import levels_db
from voicer.resources import find_preset
from voicer.tone.preset import load_preset
from voicer.tone.tables import simulate_blows

TARGET = 0.005  # the issue: strike ratio within 0.005
BETAS = (1 / 7, 0.12, 1 / 9, 0.1, 0.085, 0.0625)
F0_HZ, B = 261.63, 4e-4  # a C4-like string (physics.md section 3: C&A's C4 has B = 3.8e-4)


def half_sine_spectrum(f_hz: np.ndarray, duration_s: float) -> np.ndarray:
    """|integral_0^T sin(pi t / T) exp(-2 pi i f t) dt| = 2 pi T |cos(w T / 2)| / |pi^2 - (w T)^2|, w = 2 pi f.

    Direct integration (the half-sine pulse of any table of Fourier transforms; from memory),
    checked against scipy.integrate.quad in test_half_sine_closed_form.
    """
    wt = 2 * np.pi * f_hz * duration_s
    return 2 * np.pi * duration_s * np.abs(np.cos(wt / 2)) / np.abs(np.pi**2 - wt**2)


def envelope_db(shape: str, n: np.ndarray) -> np.ndarray:
    """Smooth envelopes of a few shapes, in dB."""
    f = n * F0_HZ * np.sqrt(1 + B * n**2)
    if shape == "plateau":  # flat, then -6 dB/octave above partial 6
        return -10 * np.log10(1 + (n / 6.0) ** 2)
    if shape == "half-sine":
        # The pulse spectrum's first zero (f = 1.5 / T) lies 1.3 times above the top partial:
        # a felt pulse is smoother than a half sine and its spectrum has no such zeros.
        duration = 1.5 / (1.3 * f.max())
        return 20 * np.log10(half_sine_spectrum(f, duration)) - 20 * np.log10(n)  # displacement: / omega
    if shape == "bump":  # rises to partial 4, then -6 dB/octave
        return 20 * np.log10(n / (1 + (n / 4.0) ** 2))
    raise AssertionError(shape)


def measured_pattern(beta: float, shape: str, count: int, rng: np.random.Generator,
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Levels of partials 1..count as an analysis would report them: 1-2 dB rms noise, the
    partials more than 50 dB below the strongest unresolved, and one in ten lost at random."""
    n = np.arange(1, count + 1)
    with np.errstate(divide="ignore"):
        level = envelope_db(shape, n) + 20 * np.log10(np.abs(np.sin(n * np.pi * beta)))
    level = level + rng.normal(0.0, rng.uniform(1.0, 2.0), count)
    keep = (level > level.max() - 50.0) & (rng.random(count) > 0.1)
    return n[keep], level[keep]


def test_half_sine_closed_form() -> None:
    # Reference: scipy.integrate.quad of the defining integral.
    duration = 2e-3
    for f in (0.0, 180.0, 750.0, 1234.5, 3000.0):
        re = quad(lambda t: np.sin(np.pi * t / duration) * np.cos(2 * np.pi * f * t), 0, duration)[0]
        im = quad(lambda t: np.sin(np.pi * t / duration) * np.sin(2 * np.pi * f * t), 0, duration)[0]
        assert half_sine_spectrum(np.array(f), duration) == pytest.approx(np.hypot(re, im), rel=1e-9, abs=1e-15)


def test_reaction_factor_is_the_linear_hammer_far_above_its_resonance() -> None:
    # The linear hammer (mass M on a felt spring K, Hall 1986) against a string whose
    # impedance at the strike point is Z0 (1 - i cot theta) (a fixed-end segment of length
    # beta L beside a long one): F = M v0 / (1 - w^2 M / K + i w M / Z), evaluated with
    # complex numpy. Far above the felt resonance, F (w^2 / K v0) tends to
    # -1 / (1 + (a / n) sin(theta) exp(-i theta)), a = K / (w1 Z0), which the fit uses.
    m, k, z0, w1, beta = 8e-3, 2e5, 2.2, 2 * np.pi * 262, 0.12
    n = np.arange(400, 1200, dtype=float)  # w^2 M / K > 1.7e4: the dropped 1 moves it < 0.01 dB
    w, theta = n * w1, n * np.pi * beta
    z = z0 * (1 - 1j / np.tan(theta))
    force = m / (1 - w**2 * m / k + 1j * w * m / z)  # v0 = 1
    exact_db = 20 * np.log10(np.abs(force * w**2 / k))
    np.testing.assert_allclose(exact_db, -_reaction_db(n, theta, np.array(k / (w1 * z0))), atol=0.01)


@pytest.fixture(scope="module")
def synthetic_fits() -> list[tuple[float, object]]:
    """One fit per (beta, envelope shape, partial count), each with its own noise."""
    rng = np.random.default_rng(5)
    fits = []
    for beta in BETAS:
        for shape in ("plateau", "half-sine", "bump"):
            for count in (24, 36):
                n, level = measured_pattern(beta, shape, count, rng)
                fits.append((beta, fit_strike_ratio(n, level)))
    return fits


def test_synthetic_patterns_recover_the_ratio(synthetic_fits) -> None:
    # Every fit not flagged poor meets the 0.005, and the method delivers: at least
    # nine in ten of these patterns (a notch inside the measured partials) are not poor.
    misses = [(beta, fit) for beta, fit in synthetic_fits
              if fit.quality != "poor" and abs(fit.ratio - beta) > TARGET]
    assert not misses
    usable = sum(fit.quality != "poor" for _, fit in synthetic_fits)
    assert usable >= 0.9 * len(synthetic_fits)


def test_synthetic_uncertainty_is_honest(synthetic_fits) -> None:
    # Coverage: a one-sd uncertainty should hold the error within 2 sd about 95 % of the
    # time (normal errors); at least 85 % here, and the uncertainty must not be vastly too
    # large either (the median error is at least a tenth of its sd).
    errors = np.array([abs(fit.ratio - beta) for beta, fit in synthetic_fits])
    sds = np.array([fit.uncertainty for _, fit in synthetic_fits])
    assert np.mean(errors <= 2 * sds) >= 0.85
    assert np.median(errors / sds) >= 0.1


@pytest.mark.parametrize("beta", [1 / 7, 0.12, 0.1, 0.085, 0.0625])
def test_six_partials_without_a_notch_are_poor(beta: float) -> None:
    # First notch at 1 / beta >= 7: partials 1-6 show no notch, so no ratio can be read.
    rng = np.random.default_rng(int(beta * 1e4))
    n = np.arange(1, 7)
    for shape in ("plateau", "half-sine", "bump"):
        level = envelope_db(shape, n) + 20 * np.log10(np.abs(np.sin(n * np.pi * beta))) + rng.normal(0, 1.5, 6)
        assert fit_strike_ratio(n, level).quality == "poor"


def test_known_hammer_width() -> None:
    # A wide hammer (w = 0.06 L) multiplies partial n by sinc(n w / 2L) (physics.md section 6).
    rng = np.random.default_rng(11)
    beta, width = 0.12, 0.06
    n = np.arange(1, 31)
    level = (envelope_db("plateau", n) + 20 * np.log10(np.abs(np.sin(n * np.pi * beta) * np.sinc(n * width / 2)))
             + rng.normal(0, 1.0, len(n)))
    keep = level > level.max() - 50
    fit = fit_strike_ratio(n[keep], level[keep], width_ratio=width)
    assert fit.quality != "poor"
    assert abs(fit.ratio - beta) <= TARGET


# --- through voicer's own contact model ------------------------------------------------

ROUND_TRIP_RANGE_DB = 70.0  # partials within 70 dB of the strongest are measured: a 4 s note
# at 40 dB broadband SNR, analysed in 1 s windows, has ~80 dB per partial (common practice).
ROUND_TRIP_RATIOS = (1 / 9, 1 / 8, 1 / 7)  # the usual range (physics.md section 6)


def round_trip(keys: tuple[int, ...], ratio: float) -> dict[int, object]:
    """Fit the levels of voicer's simulated blows (mf, 2 m/s) with each key's ratio set."""
    preset = load_preset(find_preset("demo"))
    for key in keys:
        preset = preset.with_key_values(key, {"strike_ratio": ratio})
    blows = simulate_blows(preset, keys, [2.0])
    fits = {}
    for key in keys:
        level = levels_db(blows.tables[key].amplitude_n[0].sum(axis=0))[:40]  # all strings of the unison
        n = np.arange(1, len(level) + 1)
        keep = level > level.max() - ROUND_TRIP_RANGE_DB  # exact nulls (-300 dB) are unresolved
        fits[key] = fit_strike_ratio(n[keep], level[keep])
    return fits


@pytest.mark.parametrize("ratio", ROUND_TRIP_RATIOS)
def test_round_trip_bass_and_middle(ratio: float) -> None:
    # C2 (36) and C4 (60): the real hammer envelope, with the string's reaction on the felt.
    fits = round_trip((36, 60), ratio)
    for key, fit in fits.items():
        assert fit.quality != "poor", key
        assert abs(fit.ratio - ratio) <= TARGET, key


@pytest.mark.parametrize("ratio", ROUND_TRIP_RATIOS)
def test_round_trip_treble_is_right_or_says_poor(ratio: float) -> None:
    # C5 (72): the force pulse falls by 20-30 dB across the first notch, more than the
    # linear reaction describes, so the ratio is often not recovered; it must then say so.
    fit = round_trip((72,), ratio)[72]
    assert fit.quality == "poor" or abs(fit.ratio - ratio) <= TARGET


# --- bad input --------------------------------------------------------------------------

def test_too_few_partials() -> None:
    with pytest.raises(ParameterError, match=f"5 partial\\(s\\) given; a strike ratio needs at least {MIN_PARTIALS}"):
        fit_strike_ratio([1, 2, 3, 4, 5], [0, -1, -2, -3, -4])


@pytest.mark.parametrize("n, level, match", [
    ([1, 2, 2, 4, 5, 6], [0.0] * 6, "distinct and >= 1"),
    ([0, 1, 2, 3, 4, 5], [0.0] * 6, "distinct and >= 1"),
    ([1, 2, 3.5, 4, 5, 6], [0.0] * 6, "whole numbers"),
    ([1, 2, 3, 4, 5, 6], [0.0, 1.0, np.nan, 0.0, 0.0, 0.0], "level_db must be finite"),
    ([1, 2, 3, 4, 5, 6], [0.0] * 5, "same length"),
])
def test_bad_partials(n, level, match: str) -> None:
    with pytest.raises(ParameterError, match=match):
        fit_strike_ratio(n, level)


def test_bad_options() -> None:
    n, level = np.arange(1, 13), np.zeros(12)
    with pytest.raises(ParameterError, match="lo=0.3, hi=0.2 must satisfy 0 < lo < hi < 0.5"):
        fit_strike_ratio(n, level, lo=0.3, hi=0.2)
    with pytest.raises(ParameterError, match="width_ratio=0.2 must lie in 0 <= width_ratio < 2 lo"):
        fit_strike_ratio(n, level, width_ratio=0.2)
    with pytest.raises(ParameterError, match="weights must be finite, > 0"):
        fit_strike_ratio(n, level, weights=np.r_[np.ones(11), 0.0])
