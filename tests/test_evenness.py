"""Evenness metrics: LOWESS against numpy, and the demo's metrics, trends and flags against
the physics of the blow (the loudness standard itself: test_loudness.py)."""

from __future__ import annotations

import numpy as np
import pytest

from voicer.tone.velocity import DYNAMIC_VELOCITY
from voicer.errors import ParameterError
from voicer.report.evenness import (
    DYNAMICS,
    FLAG_FLOORS,
    METRIC_INFO,
    METRICS,
    construction_breaks,
    measure,
    trend,
)
from voicer.report.loudness import partials_loudness_phon
from voicer.tone.tables import KeyTable, ModalTables, TableSettings, build_tables, simulate_blows
from voicer.tone.velocity import hammer_speed

KEYS = np.arange(21, 109)
DEMO_EVEN_UP_TO = 90  # keys above: see test_demo_flags_only_where_the_first_partial_is_in_the_pulse_sidelobes


@pytest.fixture(scope="module")
def demo_evenness(demo):
    return measure(demo)


@pytest.fixture(scope="module")
def demo_pulses(demo):
    """The demo's blows at the dynamics' speeds with their force pulses."""
    speeds = hammer_speed(list(DYNAMICS.values()), demo.instrument)
    return simulate_blows(demo, KEYS, speeds, record=True)


# --- LOWESS -----------------------------------------------------------------------------

def _tricube_weights(x: np.ndarray, i: int, half_width: float) -> np.ndarray:
    """Cleveland (1979), eq. (2.1): W((x_j - x_i) / h), W(u) = (1 - |u|^3)^3 for |u| < 1."""
    u = np.abs(x - x[i]) / half_width
    return np.clip(1 - u**3, 0, None) ** 3


@pytest.mark.parametrize("degree", [1, 2])
def test_local_regression_equals_weighted_polyfit(rng, degree):
    # Without robustness iterations LOWESS is a weighted least-squares polynomial at each
    # point: numpy.polyfit with w = sqrt(tricube weight) (polyfit weights the residuals).
    x = KEYS.astype(float)
    y = 0.02 * (x - 60) ** 2 / 10 + 0.1 * x + rng.normal(0, 0.5, len(x))
    span = 15
    got = trend(x, y, span_keys=span, iterations=0, degree=degree)
    for i in range(len(x)):
        w = _tricube_weights(x, i, (span - 1) / 2)
        keep = w > 0
        coef = np.polyfit(x[keep], y[keep], degree, w=np.sqrt(w[keep]))
        # Tolerance: round-off of two least-squares solutions of a 13-point problem.
        assert got[i] == pytest.approx(np.polyval(coef, x[i]), abs=1e-9)


def _metric_like_curve(x: np.ndarray) -> np.ndarray:
    """A smooth curve shaped like the demo's loudness (rising, then bending down)."""
    return 8.0 + 0.15 * (x - 21) - 25.0 * np.exp((x - 108) / 6.0)


def test_lowess_recovers_a_smooth_curve_through_planted_outliers(rng):
    x = KEYS.astype(float)
    truth = _metric_like_curve(x)
    noise = rng.normal(0, 0.05, len(x))
    clean = truth + noise
    planted = clean.copy()
    for key, size in ((40, 4.0), (60, -5.0), (61, -4.0), (77, 6.0)):  # two of them neighbours
        planted[key - 21] += size
    smooth = trend(x, clean)
    robust = trend(x, planted)
    # The trend follows the curve to within a few noise sd (0.05), the steep top included...
    np.testing.assert_allclose(smooth, truth, atol=0.2)
    # ...and the outliers do not move it by more than a tenth of the smallest of them.
    np.testing.assert_allclose(robust, smooth, atol=0.4)
    deviation = planted - robust
    for key, size in ((40, 4.0), (60, -5.0), (61, -4.0), (77, 6.0)):
        assert deviation[key - 21] == pytest.approx(size, abs=0.4)


def test_lowess_without_robustness_is_dragged_by_the_same_outliers(rng):
    # The check above is not vacuous: a plain local fit is pulled toward the outliers.
    x = KEYS.astype(float)
    clean = _metric_like_curve(x) + rng.normal(0, 0.05, len(x))
    planted = clean.copy()
    planted[60 - 21] -= 5.0
    planted[61 - 21] -= 4.0
    pulled = trend(x, planted, iterations=0) - trend(x, clean, iterations=0)
    assert np.max(np.abs(pulled)) > 1.0


def test_sections_keep_a_step_out_of_the_trend():
    # A step where the strings change (here 3 dB after key 45) is no deviation of any key
    # when the sections are fitted apart; one trend across it leaves deviations of a third
    # of the step at the keys beside it.
    x = KEYS.astype(float)
    y = 0.1 * x + np.where(x > 45, 3.0, 0.0)
    np.testing.assert_allclose(trend(x, y, breaks=(45,)), y, atol=1e-9)
    assert np.max(np.abs(trend(x, y) - y)) > 0.5


def test_trend_skips_missing_values_and_fits_columns_independently():
    x = KEYS.astype(float)
    y = np.column_stack([0.5 * x, -0.2 * x])
    y[-3:, 0] = np.nan
    got = trend(x, y)
    assert np.isnan(got[-3:, 0]).all()
    np.testing.assert_allclose(got[:-3, 0], y[:-3, 0], atol=1e-9)
    np.testing.assert_allclose(got[:, 1], y[:, 1], atol=1e-9)


def test_trend_refuses_bad_input():
    with pytest.raises(ParameterError, match="strictly ascending"):
        trend([21, 23, 22], [1.0, 2.0, 3.0])
    with pytest.raises(ParameterError, match="do not match 3 keys"):
        trend([21, 22, 23], [1.0, 2.0])
    with pytest.raises(ParameterError, match="span_keys=1 must be >= 2"):
        trend([21, 22, 23], [1.0, 2.0, 3.0], span_keys=1)


# --- metrics on the demo ---------------------------------------------------------------

def test_dynamics_and_metric_table():
    # The velocities are the fit's readings of the markings (one table for both).
    assert DYNAMICS == {"pp": DYNAMIC_VELOCITY["pp"], "mf": DYNAMIC_VELOCITY["mf"], "ff": DYNAMIC_VELOCITY["ff"]}
    assert DYNAMICS == {"pp": 28, "mf": 72, "ff": 104}
    assert tuple(METRIC_INFO) == METRICS == tuple(FLAG_FLOORS)


def test_demo_breaks_are_where_its_strings_change(demo):
    # The demo: single strings to E1 (28), bichords to A2 (45, the last wound key).
    assert construction_breaks(demo) == (28, 45)
    assert demo.instrument["last_wound_key"] == 45


def test_demo_metrics_shapes_and_speeds(demo, demo_evenness):
    ev = demo_evenness
    assert ev.dynamics == ("pp", "mf", "ff") and ev.velocities == (28, 72, 104)
    np.testing.assert_array_equal(ev.keys, KEYS)
    np.testing.assert_allclose(ev.speeds_m_s, hammer_speed([28, 72, 104], demo.instrument), rtol=1e-12)
    for table in (ev.values, ev.trend, ev.deviation, ev.scatter, ev.flagged):
        assert set(table) == set(METRICS)
        assert all(a.shape == (88, 3) for a in table.values())
    # Keys with 4 or fewer partials below the band limit have no partials 5-10.
    few = [k for k in KEYS if len(demo.scale.modes(int(k), sample_rate_hz=48000.0).n) <= 4]
    assert few and np.isnan(ev.values["high_partials_db"][np.isin(KEYS, few)]).all()
    assert np.isfinite(ev.values["high_partials_db"][~np.isin(KEYS, few)]).all()


def _table(key: int, freq_hz, amplitude_n, sigma_per_s) -> KeyTable:
    """A key's table with the same partials at two layers spanning the dynamics' speeds."""
    speeds = np.array([0.5, 6.0])
    amp = np.broadcast_to(np.asarray(amplitude_n, dtype=complex), (2, 1, len(freq_hz))).copy()
    return KeyTable(key=key, speeds_m_s=speeds, freq_hz=np.asarray(freq_hz, dtype=float),
                    sigma_per_s=np.asarray(sigma_per_s, dtype=float), amplitude_n=amp,
                    contact_s=np.full(2, 2e-3), peak_force_n=np.full(2, 10.0), rebound_m_s=np.ones(2),
                    contacts=np.ones(2, dtype=np.int64))


def test_metric_definitions_on_known_spectra(demo):
    # Tables of known partials (as a model plugin would give them) through measure().
    tables = ModalTables(preset=demo, settings=TableSettings(), computed=(), cached=(), keys={
        60: _table(60, [1000.0], [2.0], [0.5]),
        61: _table(61, [100.0], [1.0], [1.0]),
        62: _table(62, [100.0, 1000.0], [1.0, 1.0], [1.0, 2.0]),
        63: _table(63, 100.0 * np.arange(1, 7), [1.0, 0.5, 1.0, 1.0, 0.5, 0.5], np.ones(6)),
    })
    ev = measure(demo, keys=[60, 61, 62, 63], tables=tables)
    loud = ev.values["loudness_phon"]
    # Each key's loudness level is that of its partials by ISO 532-1 (voicer.report.loudness,
    # checked against MoSQITo in test_loudness.py), the same at every dynamic here.
    for i, k in enumerate((60, 61, 62, 63)):
        t = tables[k]
        np.testing.assert_allclose(loud[i], partials_loudness_phon(t.freq_hz, t.amplitude_n[0, 0]), rtol=1e-12)
    # A second partial adds loudness: 100 Hz and 1 kHz at 1 N against 100 Hz alone.
    assert np.all(loud[2] > loud[1])
    # Centroid of 1, 0.5, 1, 1, 0.5, 0.5 N at harmonics 1-6, power-weighted:
    # sum n a^2 / sum a^2 = (1 + 0.5 + 3 + 4 + 1.25 + 1.5) / 3.75 = 3.0 harmonics.
    np.testing.assert_allclose(ev.values["brightness"][3], 3.0, rtol=1e-12)
    # Partials 5-6 (all it has of 5-10) against 1-4: 10 log10(0.5 / 3.25).
    np.testing.assert_allclose(ev.values["high_partials_db"][3], 10 * np.log10(0.5 / 3.25), rtol=1e-12)
    # T60 = ln(1000) / sigma of the first partial (Chaigne & Askenfelt 1994).
    np.testing.assert_allclose(ev.values["sustain_s"][0], np.log(1000) / 0.5, rtol=1e-12)
    # One partial: no partials 5-10.
    assert np.isnan(ev.values["high_partials_db"][:3]).all()


def test_loudness_rises_from_pp_to_ff_at_every_key(demo_evenness):
    # Common practice (and Russell & Rossing 1998: faster hammers, louder notes).
    assert np.all(np.diff(demo_evenness.values["loudness_phon"], axis=1) > 0)


def test_attack_is_sharper_at_ff_at_every_key(demo_evenness):
    # physics.md, constant-free assertion 1: for p > 1 the contact shortens as v rises.
    assert np.all(np.diff(demo_evenness.values["attack_ms"], axis=1) < 0)


def test_attack_is_the_contact_duration_of_a_half_sine():
    # The effective duration is exact for a half-sine pulse (a linear felt on a rigid
    # anvil): (pi^2/8)(int F)^2 / int F^2 with int sin = 2T/pi, int sin^2 = T/2.
    from voicer.report.evenness import _effective_contact_s
    dt, duration = 1e-7, 2.5e-3
    t = np.arange(int(duration / dt)) * dt
    assert _effective_contact_s(np.sin(np.pi * t / duration), dt) == pytest.approx(duration, rel=1e-4)


def test_brightness_rises_with_dynamics_while_the_first_partial_is_in_the_main_lobe(demo_evenness, demo_pulses):
    # physics.md, constant-free assertion 3, and common practice: harder blows are brighter.
    ev = demo_evenness
    rising = np.all(np.diff(ev.values["brightness"], axis=1) > 0, axis=1)
    assert rising[KEYS <= 84].all()  # up to C6
    # Where it does not rise (the top octaves), the soft blow's contact lasts more than
    # 1.5 periods of the first partial, the first zero of a half-sine pulse's spectrum:
    # the first partial sits in the pulse's sidelobes and the centroid need not rise.
    for key in KEYS[~rising]:
        table = demo_pulses.tables[int(key)]
        assert table.freq_hz[0] * table.contact_s[0] > 1.5, key


def test_sustain_is_the_t60_of_the_first_partial(demo_evenness):
    # Chaigne & Askenfelt (1994) C4 losses (b1 0.5 /s, b3 6.25e-9 s), which the demo's C4
    # uses: T60 = 13.36 s at n = 1 (physics.md check values, 1 %); the same at every dynamic.
    sustain = demo_evenness.values["sustain_s"][60 - 21]
    np.testing.assert_allclose(sustain, 13.36, rtol=0.01)


def test_demo_is_even_below_the_top_octaves(demo_evenness):
    ev = demo_evenness
    low = ev.keys <= DEMO_EVEN_UP_TO
    for name in METRICS:
        assert not ev.flagged[name][low].any(), (name, ev.keys[low][ev.flagged[name][low].any(axis=1)])
    # Figures for the record (rms deviation from the trend, keys 21..90).
    assert ev.rms_deviation("loudness_phon", keys=range(21, 91)) < 0.2
    assert ev.rms_deviation("brightness", keys=range(21, 91)) < 0.03


def test_demo_flags_only_where_the_first_partial_is_in_the_pulse_sidelobes(demo_evenness, demo_pulses):
    # What the demo flags at the top is the model's prediction, not a fault of the trend:
    # its elastic felt gives symmetric force pulses whose spectra have deep dips, and in
    # the top octaves the contact outlasts the first partial's period, so f1 falls in the
    # pulse's sidelobes; where it meets a dip that key is much weaker (and, its first
    # partial gone, brighter) than its neighbours at that dynamic. The pulse's spectrum at
    # f1 is read here from the simulated force by a plain DFT (numpy), apart from the
    # modal read-out the metrics use: every flag is more than 30 dB down there (below the
    # first sidelobe peak of a half-sine, -23.5 dB).
    ev = demo_evenness
    flagged = np.zeros(ev.values["loudness_phon"].shape, dtype=bool)
    for name in METRICS:
        flagged |= ev.flagged[name]
    assert flagged.any()
    for i, j in zip(*np.nonzero(flagged)):
        key = int(ev.keys[i])
        force = np.asarray(demo_pulses.force_n[key][j])
        dt = demo_pulses.dt_s[key][j]
        f1 = demo_pulses.tables[key].freq_hz[0]
        spectrum = np.abs(np.sum(force * np.exp(-2j * np.pi * f1 * dt * np.arange(len(force))))) / force.sum()
        assert 20 * np.log10(spectrum) < -30.0, (key, ev.dynamics[j])


def test_a_harder_hammer_is_flagged_and_its_neighbours_are_not(demo, demo_evenness):
    # Common practice: hardened felt sounds brighter (physics.md section 8; assertion 2:
    # a harder felt shortens the contact and brightens the tone).
    key = 60
    harder = demo.with_key_values(key, {"felt_force_1mm_n": 2 * demo.scale.value("felt_force_1mm_n", key)})
    ev = measure(harder)
    i = key - 21
    base = demo_evenness
    assert np.all(ev.values["brightness"][i] > base.values["brightness"][i])
    assert np.all(ev.values["high_partials_db"][i] > base.values["high_partials_db"][i])
    assert np.all(ev.values["attack_ms"][i] < base.values["attack_ms"][i])
    assert ev.flagged["brightness"][i].all()
    assert key in ev.flagged_keys()
    assert set(ev.flagged_keys()) - set(base.flagged_keys()) == {key}
    near = (ev.keys >= key - 7) & (ev.keys <= key + 7) & (ev.keys != key)
    for name in METRICS:
        assert not ev.flagged[name][near].any(), name
    # The outlier does not drag the trend: its neighbours' brightness trend moves by less
    # than a twentieth of the key's own rise.
    rise = np.min(ev.values["brightness"][i] - base.values["brightness"][i])
    assert np.max(np.abs(ev.trend["brightness"][near] - base.trend["brightness"][near])) < rise / 20


def test_measure_from_tables_agrees_where_the_layers_interpolate_well(demo, demo_evenness):
    # The tables' 16 layers interpolated to the dynamics' speeds, against the exact speeds:
    # below the top octaves within 0.2 phon (interpolation error; the dips of the top move
    # with the speed and fall between layers). From F#6 (90) up the pp blow's first
    # partial meets the pulse's first dip: its loudness falls by 5 phon a key there, and
    # the layers miss it by 0.55 phon at F#6.
    ev = measure(demo, tables=build_tables(demo))
    low = ev.keys < DEMO_EVEN_UP_TO
    np.testing.assert_allclose(ev.values["loudness_phon"][low], demo_evenness.values["loudness_phon"][low], atol=0.2)
    np.testing.assert_allclose(ev.values["brightness"][low], demo_evenness.values["brightness"][low], rtol=0.01)
    np.testing.assert_array_equal(ev.values["attack_ms"], demo_evenness.values["attack_ms"])


def test_measure_refuses_bad_requests(demo, demo_evenness):
    with pytest.raises(ParameterError, match="dynamics \\['fff'\\] must be distinct names from pp, mf, ff"):
        measure(demo, dynamics=("fff",))
    with pytest.raises(ParameterError, match="key 20 is outside the compass"):
        measure(demo, keys=[20, 21])
    with pytest.raises(ParameterError, match="key 108 has no partial below the band limit"):
        measure(demo, keys=[100, 108], settings=TableSettings(sample_rate_hz=8000.0))
    other = demo.with_key_values(60, {"felt_force_1mm_n": 100.0})
    with pytest.raises(ParameterError, match="another preset"):
        measure(demo, keys=[60], tables=build_tables(other, keys=[60]))
    with pytest.raises(ParameterError, match="unknown metric 'loudness'"):
        demo_evenness.rms_deviation("loudness")
    with pytest.raises(ParameterError, match="dynamic 'p' was not measured"):
        demo_evenness.rms_deviation("loudness_phon", dynamic="p")


def test_outlier_hammers_deviate_at_every_dynamic(demo, demo_evenness) -> None:
    """The demo's top-octave flags are single dynamics meeting dips of the hammer's force
    spectrum (see the test above): no outlier hammer (flagged_keys with its default
    consistency across dynamics), though flags exist at single dynamics. Hammers planted
    harder (x 1.8 at E4 and F5: brighter, common practice) and softer (x 0.55 at D3, D#3:
    a dull patch) deviate the same way at pp, mf and ff and are found, and no other key."""
    assert demo_evenness.flagged_keys() == []
    assert demo_evenness.flagged_keys(consistent=False)  # the single-dynamic dips
    felt = demo.resolved["felt_force_1mm_n"]
    planted = demo
    for key, factor in ((50, 0.55), (51, 0.55), (64, 1.8), (77, 1.8)):
        planted = planted.with_key_values(key, {"felt_force_1mm_n": factor * float(felt[key - 21])})
    assert measure(planted).flagged_keys() == [50, 51, 64, 77]
