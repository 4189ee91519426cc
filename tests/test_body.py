"""The modal body (soundboard and radiation) against textbook resonance, scipy and statistics."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.signal import freqs

from voicer.errors import ParameterError
from voicer.physics.body import (
    BODY_FIELDS,
    MAX_BODY_MODES,
    BodyModel,
    body_gain,
    body_modes,
    modal_sum,
)


def single_mode(freq_hz: float, **kw) -> BodyModel:
    return BodyModel(lowest_mode_hz=freq_hz, highest_mode_hz=freq_hz, **kw)


def level_db(f, model) -> np.ndarray:
    return 20.0 * np.log10(np.abs(body_gain(f, model)))


@pytest.mark.parametrize("loss_factor, exponent", [(0.02, 0.0), (0.003, 0.0), (0.05, 0.5), (0.01, -0.7)])
def test_single_mode_half_power_bandwidth_is_eta_f(loss_factor, exponent) -> None:
    # Textbook resonance (Cremer & Heckl, Structure-Borne Sound; any vibration text; from
    # memory): the velocity response of a viscously damped oscillator, i w / (w0^2 - w^2 +
    # i eta w0 w), is down 3 dB where |w0^2 - w^2| = eta w0 w, exactly eta w0 apart, and its
    # phase there is -/+ 45 degrees. The loss factor of the mode is eta (f / ref)^exponent.
    fk = 440.0
    model = single_mode(fk, loss_factor=loss_factor, loss_factor_exponent=exponent, reference_hz=300.0)
    eta = loss_factor * (fk / 300.0) ** exponent
    peak = abs(complex(body_gain(fk, model))) ** 2

    def excess(f: float) -> float:
        return abs(complex(body_gain(f, model))) ** 2 / peak - 0.5

    lo = brentq(excess, fk * (1.0 - 3.0 * eta), fk, xtol=1e-13, rtol=1e-15)
    hi = brentq(excess, fk, fk * (1.0 + 3.0 * eta), xtol=1e-13, rtol=1e-15)
    assert hi - lo == pytest.approx(eta * fk, rel=1e-9)
    sign = np.sign(body_modes(model).residue[0])
    np.testing.assert_allclose(np.angle(sign * body_gain([lo, hi], model), deg=True), [45.0, -45.0], atol=1e-6)


def test_single_mode_phase_through_resonance() -> None:
    # Textbook resonance (from memory): the mobility of a mode is in phase with the force at
    # resonance, stiffness-like (+90 degrees) well below it and mass-like (-90) well above.
    fk = 200.0
    model = single_mode(fk, loss_factor=0.01, seed=3)
    sign = np.sign(body_modes(model).residue[0])
    phase = np.angle(sign * body_gain([fk / 20.0, fk, fk * 20.0], model), deg=True)
    assert phase[1] == pytest.approx(0.0, abs=1e-9)
    np.testing.assert_allclose(phase[[0, 2]], [90.0, -90.0], atol=0.1)
    # and the magnitude peaks there (the velocity response's peak is exactly at w0)
    f = fk * np.linspace(0.98, 1.02, 4001)
    assert f[np.argmax(np.abs(body_gain(f, model)))] == pytest.approx(fk, abs=0.002)


def test_modal_sum_matches_scipy_rational_transfer() -> None:
    # scipy.signal.freqs evaluates the equivalent rational function: with s = i w each mode
    # is a_k s / (s^2 + eta_k w_k s + w_k^2); the sum over three modes as one fraction.
    model = BodyModel(lowest_mode_hz=100.0, mode_spacing_hz=37.0, highest_mode_hz=180.0, loss_factor=0.03,
                      loss_factor_exponent=0.3, frequency_jitter=0.4, seed=11)
    modes = body_modes(model)
    assert modes.freq_hz.size == 3
    scale = 2.0 * np.pi * 100.0  # s in units of scale keeps the polynomials well conditioned
    wk = 2.0 * np.pi * modes.freq_hz / scale
    dens = [np.array([1.0, eta * w, w * w]) for eta, w in zip(modes.loss_factor, wk)]
    den = np.polymul(np.polymul(dens[0], dens[1]), dens[2])
    num = np.zeros(6)
    for k in range(3):
        others = [dens[j] for j in range(3) if j != k]
        term = np.polymul(np.polymul([modes.residue[k] / scale, 0.0], others[0]), others[1])
        num[-term.size:] += term
    f = np.linspace(1.0, 400.0, 2000)
    _, expected = freqs(num, den, worN=2.0 * np.pi * f / scale)
    np.testing.assert_allclose(body_gain(f, model), expected, rtol=1e-9)
    np.testing.assert_allclose(modal_sum(f, modes), expected, rtol=1e-9)


def test_gain_keeps_the_shape_and_is_zero_at_dc() -> None:
    model = BodyModel(highest_mode_hz=2000.0)
    f = np.array([[0.0, 100.0, 250.0], [1000.0, 1500.0, 3000.0]])
    g = body_gain(f, model)
    assert g.shape == f.shape and g.dtype == np.complex128
    assert g[0, 0] == 0.0
    np.testing.assert_array_equal(body_gain(f.ravel(), model), g.ravel())


@pytest.mark.parametrize("trend", [-3.0, 2.0])
def test_octave_power_averages_follow_the_trend(trend) -> None:
    # The residues are scaled so that the expected power of the modal sum (random signs:
    # modes add in power) follows 10^(trend log2(f / ref) / 10), 0 dB at reference_hz.
    # A single board strays from it by about 1.3-1.5 dB rms per octave (measured over 120
    # seeds: the residues scatter and the response is a random process), so the check
    # averages 24 boards (seeds), which strays by about 0.28 dB; 1 dB is 3.5 of those.
    ref = 1000.0
    octaves = 500.0 * 2.0 ** np.arange(4)  # 500 Hz .. 8 kHz, inside the modes (50 Hz .. 10 kHz)
    power = np.zeros(octaves.size)
    expected = np.zeros(octaves.size)
    for seed in range(24):
        model = BodyModel(level_trend_db_per_octave=trend, reference_hz=ref, mode_spacing_hz=12.5,
                          highest_mode_hz=10000.0, seed=seed)
        for i, lo in enumerate(octaves):
            f = np.linspace(lo, 2.0 * lo, 1500)
            power[i] += np.mean(np.abs(body_gain(f, model)) ** 2) / 24.0
            expected[i] = np.mean(10.0 ** (trend * np.log2(f / ref) / 10.0))
    np.testing.assert_allclose(10.0 * np.log10(power), 10.0 * np.log10(expected), atol=1.0)


def test_overlapping_modes_give_schroeders_statistics() -> None:
    # Where modes overlap strongly (modal overlap eta f / spacing = 6 to 14 here), a transfer
    # function with Gaussian residues is a complex Gaussian process: |G|^2 is exponentially
    # distributed, so its normalised second moment is 2 and its level in dB has a standard
    # deviation of (10 / ln 10) pi / sqrt(6) = 5.57 dB whatever the damping (Schroeder 1954,
    # Acustica 4; Schroeder & Kuttruff 1962, JASA 34; for room responses; from memory).
    # One board's figures scatter by 0.32 dB and 0.21 (24 seeds measured); 4 boards are
    # averaged, so 0.5 dB and 0.3 are about three standard errors.
    spread, moment = [], []
    f = np.linspace(3000.0, 7000.0, 20000)  # 0.2 Hz steps, against half-power bands of 15-35 Hz
    for seed in range(4):
        g = body_gain(f, BodyModel(mode_spacing_hz=2.5, loss_factor=0.005, highest_mode_hz=9000.0, seed=seed))
        spread.append((20.0 * np.log10(np.abs(g))).std())
        p = np.abs(g) ** 2 / np.mean(np.abs(g) ** 2)
        moment.append(np.mean(p * p))
    assert np.mean(spread) == pytest.approx(10.0 / math.log(10.0) * math.pi / math.sqrt(6.0), abs=0.5)
    assert np.mean(moment) == pytest.approx(2.0, abs=0.3)


def test_loss_factor_smooths_separated_modes() -> None:
    # Below the overlap (200-800 Hz, 25 Hz spacing: overlap 0.02 to 1 here) a larger loss
    # factor fills the dips between resonances and lowers the peaks: the spread of the
    # level about its mean falls (Cremer & Heckl, modal overlap; from memory). Measured over
    # 40 seeds in groups of 4: 9.9-10.9, 8.1-9.1 and 5.6-7.5 dB.
    def spread(eta: float) -> float:
        return float(np.mean([level_db(np.linspace(200.0, 800.0, 6000),
                                       BodyModel(loss_factor=eta, highest_mode_hz=4000.0, seed=s)).std()
                              for s in range(4)]))

    s = [spread(eta) for eta in (0.003, 0.01, 0.03)]
    assert s[0] > s[1] + 1.0 > s[2] + 2.0


def test_scatter_peaks_and_dips_reproducible_by_seed() -> None:
    # A dense modal body: partials 20 Hz apart meet different modes, so their gains differ
    # by several dB (Conklin 1996 Part II, Suzuki 1986: resonance peaks of the board's
    # mobility; from memory); the same seed gives the same board, another seed another.
    f = np.arange(300.0, 1200.0, 20.0)
    model = BodyModel(seed=5)
    db = level_db(f, model)
    assert db.max() - db.min() > 15.0
    assert np.median(np.abs(np.diff(db))) > 2.0
    np.testing.assert_array_equal(body_gain(f, BodyModel(seed=5)), body_gain(f, model))
    other = level_db(f, BodyModel(seed=6))
    assert np.sqrt(np.mean((other - db) ** 2)) > 3.0


def test_modes_spread_evenly_and_extending_the_band_keeps_the_lower_ones() -> None:
    model = BodyModel(lowest_mode_hz=60.0, mode_spacing_hz=30.0, highest_mode_hz=3000.0, frequency_jitter=0.3)
    modes = body_modes(model)
    assert modes.freq_hz[0] == 60.0
    assert modes.freq_hz.size == model.mode_count == 99
    offset = (modes.freq_hz - 60.0) / 30.0 - np.arange(99)
    assert np.all(np.abs(offset) <= 0.3) and np.std(offset) > 0.1
    assert np.all(np.diff(modes.freq_hz) > 0.0)
    wider = body_modes(dataclasses.replace(model, highest_mode_hz=6000.0))
    for a, b in zip(modes, wider):
        np.testing.assert_array_equal(b[:99], a)


def test_residues_are_gaussian_about_the_trend() -> None:
    # The residues are the trend's scale times a standard normal draw (the random-wave
    # picture of a plate's mode shapes at a point; Weaver 1989, from memory): mean square 1,
    # kurtosis 3, as many signs of each kind. 3000 modes: sampling errors about 0.026, 0.09
    # and 0.01.
    model = BodyModel(mode_spacing_hz=5.0, highest_mode_hz=15000.0, level_trend_db_per_octave=-2.0, seed=2)
    modes = body_modes(model)
    trend = 10.0 ** (-2.0 * np.log2(modes.freq_hz / model.reference_hz) / 20.0)
    smooth = trend * np.sqrt(2.0 * modes.loss_factor * 2.0 * np.pi * modes.freq_hz * 2.0 * np.pi * 5.0 / np.pi)
    z = modes.residue / smooth
    assert np.mean(z**2) == pytest.approx(1.0, abs=0.08)
    assert np.mean(z**4) / np.mean(z**2) ** 2 == pytest.approx(3.0, abs=0.3)
    assert np.mean(z > 0) == pytest.approx(0.5, abs=0.04)


def test_fields_table_matches_the_dataclass() -> None:
    model = BodyModel()
    assert [f.name for f in dataclasses.fields(BodyModel)] == [f.name for f in BODY_FIELDS]
    for f in BODY_FIELDS:
        assert getattr(model, f.name) == f.default
        assert f.lo <= f.default <= f.hi


@pytest.mark.parametrize("field, value, match", [
    ("lowest_mode_hz", 5.0, r"'lowest_mode_hz': 5\.0 is outside the allowed range 10 <= x <= 1000 Hz"),
    ("loss_factor", 0.0, r"'loss_factor': 0\.0 is outside the allowed range 0 < x <= 0\.5"),
    ("loss_factor", float("nan"), r"'loss_factor': nan is not a finite number"),
    ("mode_spacing_hz", True, r"'mode_spacing_hz': expected a number, got bool"),
    ("reference_hz", "500", r"'reference_hz': expected a number, got str"),
    ("frequency_jitter", 0.7, r"'frequency_jitter': 0\.7 is outside the allowed range 0 <= x <= 0\.5"),
    ("seed", 1.5, r"'seed': expected a whole number, got 1\.5; allowed: 0\.\.999999"),
    ("seed", -1, r"'seed': -1 is outside the allowed range 0\.\.999999"),
    ("level_trend_db_per_octave", -20.0, r"'level_trend_db_per_octave': -20\.0 .* -12 <= x <= 12 dB/oct"),
])
def test_bad_fields_are_named_with_their_range(field, value, match) -> None:
    with pytest.raises(ParameterError, match=match):
        BodyModel(**{field: value})


def test_inconsistent_band_and_too_many_modes_are_refused() -> None:
    with pytest.raises(ParameterError, match=r"highest_mode_hz 40\.0 is below lowest_mode_hz 50\.0"):
        BodyModel(lowest_mode_hz=50.0, highest_mode_hz=40.0)
    with pytest.raises(ParameterError, match=rf"gives 9991 modes; allowed: at most {MAX_BODY_MODES}"):
        BodyModel(mode_spacing_hz=5.0, highest_mode_hz=50000.0)
    with pytest.raises(ParameterError, match=r"loss_factor 0\.1 with loss_factor_exponent 1 about reference_hz 500 "
                                             r"reaches a loss factor of 4\.4 .*; allowed: at most 1"):
        BodyModel(loss_factor=0.1, loss_factor_exponent=1.0)


@pytest.mark.parametrize("bad", [-1.0, float("nan"), float("inf")])
def test_bad_frequencies_are_refused(bad) -> None:
    with pytest.raises(ParameterError, match=r"frequency .* Hz is not allowed; allowed: finite and >= 0 Hz"):
        body_gain([100.0, bad], BodyModel())
