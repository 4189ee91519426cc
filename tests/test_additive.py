"""The additive model: measured partials replayed through the engine (levels, T60s and the
two-stage knee measured back from the rendered audio with scipy.signal), velocity layers
from the model's hammer spectrum, a voicing change as the ratio of predicted spectra."""

from __future__ import annotations

import copy
import math

import mido
import numpy as np
import pytest
import soundfile
from scipy import optimize, signal

from voicer.cli import main
from voicer.engine.additive import VOICING_GAIN_LIMIT_DB, AdditiveModel, additive_table
from voicer.engine.bank import DEFAULT_SPLIT
from voicer.engine.host import load_plugin
from voicer.engine.instrument import Instrument
from voicer.engine.models import PhysicalModel
from voicer.engine.renderer import Renderer
from voicer.physics.constants import T60_LN
from voicer.tone.preset import parse_preset, save_preset
from voicer.tone.tables import ModalTables, TableSettings, build_tables
from voicer.tone.velocity import hammer_speed
from voicer.tone.voicing import Change, VoicingPlan, apply_voicing

FS = 48_000
KEY, VELOCITY = 60, 90
GAIN_DB = -20.0
SETTINGS = TableSettings(layers=6, max_partials=48)  # few layers and partials: quick to build
FITTED = ("felt_force_1mm_n", "felt_exponent", "strike_ratio", "hammer_mass_g", "hammer_width_mm")


# Module fixtures build tables before the per-test cache is set (conftest.module_cache).
pytestmark = pytest.mark.usefixtures("module_cache", "shared_cache")


def measured_strike(preset) -> dict:
    """An invented recorded C4, struck at the speed of MIDI velocity 90: 12 partials a little
    off the model's frequencies, partial 2 with prompt sound and aftersound; fitted to the
    preset's own values of the key."""
    n = np.arange(1, 13)
    level = -6.0 - 1.5 * n
    t60 = 12.0 / (1.0 + 0.35 * n)
    after_level, after_t60 = np.full(12, math.nan), np.full(12, math.nan)
    t60[1], after_level[1], after_t60[1] = 2.0, level[1] - 26.0, 10.0  # knee near 1.07 s
    i = KEY - 21
    return {
        "speed_m_s": float(hammer_speed(VELOCITY, preset.instrument)),
        "n": n.tolist(),
        "freq_hz": (261.5 * n * np.sqrt(1 + 4e-4 * n**2)).tolist(),
        "level_db": level.tolist(), "t60_s": t60.tolist(),
        "after_level_db": after_level.tolist(), "after_t60_s": after_t60.tolist(),
        "fitted": {name: float(preset.resolved[name][i]) for name in FITTED},
    }


def with_strike(preset):
    data = copy.deepcopy(preset.to_dict())
    data["measured"] = {str(KEY): measured_strike(preset)}
    return parse_preset(data, source="client.toml")


@pytest.fixture(scope="module")
def fitted(demo):
    """A fitted preset: the fit put key 60's strike point at 0.121 (the demo's anchor has
    exactly 1/8, a node of partial 8; see the node test)."""
    return with_strike(demo.with_key_values(KEY, {"strike_ratio": 0.121}))


@pytest.fixture(scope="module")
def tables(fitted):
    return AdditiveModel().build(fitted, settings=SETTINGS)


def plan(field: str, op: str, amount: float) -> VoicingPlan:
    return VoicingPlan(name="test", description="", changes=(Change((KEY,), field, op, amount),))


def db(x):
    return 20 * np.log10(np.abs(x))


def layers(table):
    """The physical model's amplitudes at its layer speeds, as the engine reads them."""
    return table.at_speeds(table.speeds_m_s)


# --- replay: the rendered audio against the measured section ---------------------------------

@pytest.fixture(scope="module")
def rendered(fitted, tables):
    """Key 60 at velocity 90 (the measured speed), 4 s, rendered by the engine."""
    one = ModalTables(preset=fitted, settings=SETTINGS, keys={KEY: tables[KEY]}, computed=(), cached=())
    renderer = Renderer([Instrument(one, sample_rate=FS, max_block=256, split=DEFAULT_SPLIT)], gain_db=GAIN_DB)
    total = 4 * FS
    out = np.zeros((2, total), dtype=np.float32)
    for pos in range(0, total, 256):
        events = [(0, mido.Message("note_on", note=KEY, velocity=VELOCITY))] if pos == 0 else []
        renderer.process(out[:, pos:pos + 256], events)
    return out[0].astype(np.float64)


def envelope(y, freq_hz, t0=0.25, t1=3.75, cutoff_hz=25.0, fs=FS):
    """Heterodyne one partial to 0 Hz and low-pass it (scipy.signal Butterworth, forwards and
    backwards): t and the complex envelope z, with y ~ Re(z exp(i 2 pi f t))."""
    t = np.arange(len(y)) / fs
    sos = signal.butter(4, cutoff_hz, fs=fs, output="sos")
    base = y * np.exp(-2j * np.pi * freq_hz * t)
    z = 2 * (signal.sosfiltfilt(sos, base.real) + 1j * signal.sosfiltfilt(sos, base.imag))
    sel = (t >= t0) & (t <= t1)
    return t[sel], z[sel]


def test_replay_levels_and_decays_match_the_measurement(fitted, rendered) -> None:
    """One-stage partials measured from the audio (line fit of the log envelope): onset level
    within 0.5 dB, T60 within 3 %, frequency within 0.1 cent of the measured section."""
    m = fitted.measured[KEY]
    assert np.abs(rendered).max() < 10 ** (-7 / 20)  # below the safety stage's knee: nothing bent
    for i in np.flatnonzero(~m.two_stage):
        # Fit while the partial is within 50 dB of its onset (well above the -100 dBFS culling).
        t, z = envelope(rendered, m.freq_hz[i], t1=min(3.75, 0.25 + m.t60_s[i] * 50 / 60))
        slope, log0 = np.polyfit(t, np.log(np.abs(z)), 1)
        turn = np.polyfit(t, np.unwrap(np.angle(z)), 1)[0]
        assert 20 * np.log10(np.exp(log0)) - GAIN_DB == pytest.approx(m.level_db[i], abs=0.5), m.n[i]
        assert T60_LN / -slope == pytest.approx(m.t60_s[i], rel=0.03), m.n[i]
        assert 1200 * abs(np.log2(1 + turn / (2 * np.pi * m.freq_hz[i]))) < 0.1, m.n[i]


def test_two_stage_partial_shows_both_slopes_and_the_knee(fitted, rendered) -> None:
    """Partial 2 (Weinreich 1977 double decay): a two-exponential fit of the audio's envelope
    (scipy.optimize.curve_fit) gives both stages (levels 0.5 dB, T60s 3 %); the late part
    alone decays at the aftersound's rate; at the analytic knee t = ln(a_p/a_a)/(s_p - s_a)
    the envelope is 6.02 dB (two equal stages: 20 log10 2) above the aftersound line."""
    m = fitted.measured[KEY]
    i = int(np.flatnonzero(m.two_stage)[0])
    gain = 10 ** (GAIN_DB / 20)
    t, z = envelope(rendered, m.freq_hz[i])
    mag = np.abs(z) / gain

    def model(t, a_p, s_p, a_a, s_a):
        return np.log(a_p * np.exp(-s_p * t) + a_a * np.exp(-s_a * t))

    total, after = 10 ** (m.level_db[i] / 20), 10 ** (m.after_level_db[i] / 20)
    guess = [0.8 * total, 1.2 * T60_LN / m.t60_s[i], 1.2 * after, 0.8 * T60_LN / m.after_t60_s[i]]
    (a_p, s_p, a_a, s_a), _ = optimize.curve_fit(model, t, np.log(mag), p0=guess)
    assert 20 * np.log10(a_p + a_a) == pytest.approx(m.level_db[i], abs=0.5)
    assert 20 * np.log10(a_a) == pytest.approx(m.after_level_db[i], abs=0.5)
    assert T60_LN / s_p == pytest.approx(m.t60_s[i], rel=0.03)
    assert T60_LN / s_a == pytest.approx(m.after_t60_s[i], rel=0.03)
    knee = m.knee_s()[i]
    assert 0.5 < knee < 3.0  # inside the window
    assert np.log(a_p / a_a) / (s_p - s_a) == pytest.approx(knee, rel=0.03)
    late = t > knee + 1.5  # the prompt stage is > 19 dB below the aftersound there
    slope = np.polyfit(t[late], np.log(mag[late]), 1)[0]
    assert T60_LN / -slope == pytest.approx(m.after_t60_s[i], rel=0.03)
    at_knee = db(np.interp(knee, t, mag)) - (m.after_level_db[i] - 20 * np.log10(np.e) * s_a * knee)
    assert at_knee == pytest.approx(20 * np.log10(2), abs=0.2)


# --- the table: exact replay, velocity layers, voicing ratio -----------------------------------

def test_unvoiced_table_replays_the_measurement_exactly(fitted, tables) -> None:
    """At the measured speed the entries are the measured stages, to float rounding: per
    partial 10^(level/20) in one entry, or split as a_p = 10^(level/20) - a_a and
    a_a = 10^(after_level/20); decay rates ln(1000) / T60."""
    m, table = fitted.measured[KEY], tables[KEY]
    amp, rate, freq = [], [], []
    for i in range(len(m.n)):
        total = 10 ** (m.level_db[i] / 20)
        if np.isnan(m.after_level_db[i]):
            amp += [total]
            rate += [T60_LN / m.t60_s[i]]
            freq += [m.freq_hz[i]]
        else:
            after = 10 ** (m.after_level_db[i] / 20)
            amp += [total - after, after]
            rate += [T60_LN / m.t60_s[i], T60_LN / m.after_t60_s[i]]
            freq += [m.freq_hz[i]] * 2
    np.testing.assert_allclose(np.abs(table.at_speed(m.speed_m_s)), amp, rtol=1e-12)
    np.testing.assert_allclose(table.sigma_per_s, rate, rtol=1e-15)
    np.testing.assert_array_equal(table.freq_hz, freq)


def test_other_speeds_follow_the_models_hammer_spectrum(fitted, tables) -> None:
    """Layer j over the measured speed: the physical model's |P(v_j) / P(s)| per partial."""
    m, table = fitted.measured[KEY], tables[KEY]
    phys = build_tables(fitted, settings=SETTINGS, keys=[KEY])[KEY]
    n = m.entries().n
    want = np.abs(layers(phys)[:, n - 1]) / np.abs(phys.at_speed(m.speed_m_s)[n - 1])
    got = np.abs(table.amplitude_n[:, 0]) / np.abs(table.at_speed(m.speed_m_s))
    np.testing.assert_allclose(got, want, rtol=1e-12)
    assert db(want).max() - db(want).min() > 30  # the layers span a real dynamic range


def test_harder_felt_changes_the_partials_as_the_model_does(fitted, tables) -> None:
    """Felt 30 % harder on key 60 (a voicing plan): each entry changes by the same dB as the
    physical model's partial at the measured speed and at every layer (float rounding),
    with the voiced model's phase."""
    voiced = apply_voicing(fitted, plan("felt_force_1mm_n", "factor", 1.3))
    after = AdditiveModel().build(voiced, settings=SETTINGS)[KEY]
    phys0 = build_tables(fitted, settings=SETTINGS, keys=[KEY])[KEY]
    phys1 = build_tables(voiced, settings=SETTINGS, keys=[KEY])[KEY]
    s, n = fitted.measured[KEY].speed_m_s, fitted.measured[KEY].entries().n
    change = db(after.at_speed(s)) - db(tables[KEY].at_speed(s))
    model = (db(phys1.at_speed(s)) - db(phys0.at_speed(s)))[n - 1]
    np.testing.assert_allclose(change, model, rtol=0, atol=1e-9)
    assert np.abs(model).max() > 1.0  # the plan is heard
    got = db(after.amplitude_n[:, 0]) - db(tables[KEY].amplitude_n[:, 0])
    model_layers = (db(layers(phys1)) - db(layers(phys0)))[:, n - 1]
    assert np.abs(model_layers).max() < VOICING_GAIN_LIMIT_DB  # no cap reached: exact everywhere
    np.testing.assert_allclose(got, model_layers, rtol=0, atol=1e-9)
    np.testing.assert_allclose(np.angle(after.amplitude_n[:, 0]), np.angle(layers(phys1))[:, n - 1], rtol=0, atol=1e-9)


def test_voicing_change_is_capped_where_the_model_has_a_null(fitted, tables) -> None:
    """Strike point moved to 1/7: partial 7 falls into the model's sin(n pi beta) notch.
    The change applied is the model's, held within +-20 dB."""
    voiced = apply_voicing(fitted, plan("strike_ratio", "value", 1 / 7))
    after = AdditiveModel().build(voiced, settings=SETTINGS)[KEY]
    phys0 = build_tables(fitted, settings=SETTINGS, keys=[KEY])[KEY]
    phys1 = build_tables(voiced, settings=SETTINGS, keys=[KEY])[KEY]
    n = fitted.measured[KEY].entries().n
    model = (db(layers(phys1)) - db(layers(phys0)))[:, n - 1]
    got = db(after.amplitude_n[:, 0]) - db(tables[KEY].amplitude_n[:, 0])
    lim = VOICING_GAIN_LIMIT_DB
    assert model[:, n == 7].max() < -lim  # the null is deeper than the cap
    np.testing.assert_allclose(got, np.clip(model, -lim, lim), rtol=0, atol=1e-9)


def test_a_partial_at_a_node_of_the_model_follows_its_neighbours(demo) -> None:
    """Strike ratio exactly 1/8: the model's partial 8 is rounding noise (no ratio to read);
    the recorded partial 8 takes the speed dependence interpolated in log-magnitude from
    partials 7 and 9, and is still replayed exactly at the measured speed."""
    preset = with_strike(demo)
    assert preset.resolved["strike_ratio"][KEY - 21] == 0.125
    phys = build_tables(preset, settings=SETTINGS, keys=[KEY])[KEY]
    total = np.abs(phys.amplitude_n.sum(axis=1))
    assert total[:, 7].max() < 1e-15 * total.max()  # the node
    table = AdditiveModel().build(preset, settings=SETTINGS)[KEY]
    m = preset.measured[KEY]
    e = m.entries()
    np.testing.assert_allclose(np.abs(table.at_speed(m.speed_m_s)), e.amplitude_n, rtol=1e-12)
    log_p = np.log(total[:, [6, 8]])
    filled = np.exp(log_p.mean(axis=1))  # halfway in n between partials 7 and 9
    ref_s = np.exp(np.mean(np.log(np.abs(phys.at_speed(m.speed_m_s)[[6, 8]]))))
    got = np.abs(table.amplitude_n[:, 0, e.n == 8][:, 0]) / e.amplitude_n[e.n == 8][0]
    # PCHIP is not linear in its data, so the filled value at s differs from the mean of
    # the neighbours' by a little (Fritsch & Carlson 1980): 0.1 dB.
    np.testing.assert_allclose(db(got), db(filled / ref_s), atol=0.1)


def test_keys_without_measurement_are_the_physical_tables(fitted, tables) -> None:
    # As the physical model plugin builds them: heard through the unison's coupling.
    phys = PhysicalModel().build(fitted, settings=SETTINGS)
    assert sorted(tables.keys) == sorted(phys.keys)
    for key, table in phys.keys.items():
        if key == KEY:
            continue
        for name, value in table.to_arrays().items():
            np.testing.assert_array_equal(tables[key].to_arrays()[name], value, err_msg=f"{key} {name}")


def test_entries_at_or_above_045_fs_are_dropped(fitted) -> None:
    """The bank's band limit (0.45 fs, as for the physical model's partials)."""
    phys = build_tables(fitted, settings=SETTINGS, keys=[KEY])[KEY]
    m = fitted.measured[KEY]
    low = additive_table(m, phys, phys, sample_rate_hz=5000.0)
    assert len(low.freq_hz) == np.sum(m.entries().freq_hz < 2250.0) < len(m.entries().freq_hz)
    assert low.freq_hz.max() < 2250.0 and low.amplitude_n.shape == (SETTINGS.layers, 1, len(low.freq_hz))


def test_selectable_as_a_model_plugin(capsys) -> None:
    assert load_plugin("models", "additive") is AdditiveModel
    assert main(["plugins"]) == 0
    line = next(line for line in capsys.readouterr().out.splitlines() if line.split()[:1] == ["additive"])
    assert line.split()[1:] == ["voicer.engine.additive:AdditiveModel", "ok"]


def test_render_command_plays_the_measurement(fitted, tmp_path) -> None:
    """`voicer render client.toml --model additive`: the saved fitted preset, read back, the
    plugin chosen by name; partial 3's onset level and T60 measured from the file."""
    preset = save_preset(fitted, tmp_path / "client.toml")
    song = mido.MidiFile()
    song.tracks.append(mido.MidiTrack([mido.Message("note_on", note=KEY, velocity=VELOCITY),
                                       mido.Message("note_off", note=KEY, time=2 * song.ticks_per_beat)]))
    song.save(tmp_path / "c4.mid")  # 120 bpm: released after 1 s
    out = tmp_path / "c4.flac"
    assert main(["render", str(preset), str(tmp_path / "c4.mid"), "-o", str(out), "--model", "additive",
                 "--sample-rate", "16000", "--gain-db", str(GAIN_DB), "--tail", "0.2", "--subtype", "PCM_24"]) == 0
    y, fs = soundfile.read(out)
    m = fitted.measured[KEY]
    t, z = envelope(y[:, 0], m.freq_hz[2], t1=0.95, fs=fs)
    slope, log0 = np.polyfit(t, np.log(np.abs(z)), 1)
    assert 20 * np.log10(np.exp(log0)) - GAIN_DB == pytest.approx(m.level_db[2], abs=0.5)
    assert T60_LN / -slope == pytest.approx(m.t60_s[2], rel=0.03)
