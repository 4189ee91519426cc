"""Coupled unison strings: Weinreich's (1977, JASA 62, 1474) coupling matrix against its
closed forms and against direct integration of coupled oscillators (scipy solve_ivp),
and the double decay and beats measured from audio the engine renders."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, signal

from voicer.engine.bank import DEFAULT_SPLIT
from voicer.engine.instrument import Instrument
from voicer.engine.models import PhysicalModel
from voicer.engine.renderer import Renderer
from voicer.errors import ParameterError, PresetError
from voicer.physics.unison import coupled_modes, heard_amplitudes, unison_matrix
from voicer.tone.preset import parse_preset
from voicer.tone.tables import TableSettings, build_tables
from voicer.tone.unison import couple_tables, couple_unison, is_coupled

FS = 48_000


def modes(own, z, **kw):
    return coupled_modes(unison_matrix(np.asarray(own), z, **kw))


# --- the matrix -------------------------------------------------------------------------

def test_rates_of_a_resistive_pair_match_the_closed_form():
    # physics.md check values (Weinreich 1977): strings at -+delta around the partial, a
    # resistive bridge z = i eta, no losses of their own: delta = 0 gives rates {0, 2 eta},
    # delta = eta gives {eta, eta}; lambda = z -+ sqrt(delta^2 + z^2) in general.
    eta = 0.7
    lam, _ = modes([0.0, 0.0], 1j * eta)
    np.testing.assert_allclose(np.sort(lam.imag), [0.0, 2 * eta], atol=1e-9)
    lam, _ = modes([-eta, eta], 1j * eta)
    np.testing.assert_allclose(lam.imag, [eta, eta], atol=1e-6)  # a double root: eig is good to sqrt(eps)
    for delta, z in ((0.3, 0.5j), (1.2, 0.4 + 0.5j), (0.2, -0.3 + 0.1j)):
        lam, _ = modes([-delta, delta], z)
        root = np.sqrt(delta**2 + z**2)
        for expected in (z - root, z + root):
            assert np.min(np.abs(lam - expected)) < 1e-12


def test_eigenvalues_sum_to_the_trace():
    # physics.md constant-free assertion 6; three strings, two polarizations.
    own = np.array([2 * np.pi * 440 + 0.5j, 2 * np.pi * 440.1 + 0.4j, 2 * np.pi * 439.95 + 0.6j])
    matrix = unison_matrix(own, 0.3 + 0.8j, polarizations=2, horizontal=0.2, cross=0.1)
    lam, _ = coupled_modes(matrix)
    assert lam.sum() == pytest.approx(np.trace(matrix), rel=1e-13)


def test_in_tune_pair_prompt_sound_and_silent_antisymmetric_mode():
    # Weinreich 1977: with identical strings the in-phase mode decays faster than one
    # string alone on the bridge (sigma + 2 eta against sigma + eta) and a symmetric blow
    # does not excite the anti-phase mode, which leaves the bridge still.
    sigma, eta = 0.2, 0.6
    own = np.full(2, 2 * np.pi * 220 + 1j * sigma)
    lam, vec = modes(own, 1j * eta)
    alone, _ = modes(own[:1], 1j * eta)
    fast, slow = np.argmax(lam.imag), np.argmin(lam.imag)
    assert lam[fast].imag == pytest.approx(sigma + 2 * eta, rel=1e-12)
    assert lam[fast].imag > alone[0].imag == pytest.approx(sigma + eta, rel=1e-12)
    heard = heard_amplitudes(vec, np.array([[1.0, 1.0]]))[0]
    assert abs(heard[slow]) < 1e-12 and heard[fast] == pytest.approx(2.0, rel=1e-12)
    # An antisymmetric blow (one string struck harder) does reach it: the aftersound of a
    # mating fault.
    heard = heard_amplitudes(vec, np.array([[1.0, 0.6]]))[0]
    assert abs(heard[slow]) > 0 and heard.sum() == pytest.approx(1.6, rel=1e-12)


def test_aftersound_rate_grows_as_mistuning_squared():
    # physics.md (Weinreich 1977): resistive coupling, delta << eta: the slow mode decays at
    # about delta^2 / (2 eta) (exactly eta - sqrt(eta^2 - delta^2); 1 % at delta = eta / 5).
    eta = 1.0
    for delta in (0.05, 0.1, 0.2):
        lam, _ = modes([-delta, delta], 1j * eta)
        assert lam.imag.min() == pytest.approx(delta**2 / (2 * eta), rel=0.011)


def test_reactive_bridge_pushes_the_frequencies_apart():
    # Weinreich 1977: a reactive coupling chi splits the modes by 2 sqrt(delta^2 + chi^2),
    # more than the strings' own 2 delta.
    delta = 0.3
    for chi in (0.1, 0.5):
        lam, _ = modes([-delta, delta], chi)
        assert np.ptp(lam.real) == pytest.approx(2 * np.hypot(delta, chi), rel=1e-12)
        assert np.ptp(lam.real) > 2 * delta


def test_modes_against_direct_integration_of_three_coupled_oscillators():
    # Three real string oscillators sharing a bridge force, integrated with scipy's
    # solve_ivp (DOP853):  x_s'' + 2 s_s x_s' + w_s^2 x_s + sum_j (2 eta x_j' + 2 chi w0 x_j) = 0
    # (a damping and a stiffness term through the bridge). Near resonance this is
    # x' = i H x with H = diag(w_s + i s_s) + (chi + i eta) 1 1^T, so the modes' bridge
    # force must follow the integrated one: levels within 0.5 dB over 5 s (the check).
    w0 = 2 * np.pi * 261.6
    cents = np.array([0.0, 0.6, -0.4])
    w = w0 * 2 ** (cents / 1200)
    s = np.array([0.3, 0.35, 0.25])
    eta, chi = 0.8, 0.1
    a0 = np.array([1.0, 0.8, 0.9])  # each string's amplitude after the blow (a mating spread)

    def rhs(t, y):
        x, v = y[:3], y[3:]
        bridge = 2 * eta * v.sum() + 2 * chi * w0 * x.sum()
        return np.concatenate([v, -2 * s * v - w**2 * x - bridge])

    own = w + 1j * s
    matrix = unison_matrix(own, chi + 1j * eta)
    start = a0 * 1.0  # x = Re(a e^{i w t}): x(0) = a, x'(0) = Re(i H a)
    y0 = np.concatenate([start, (1j * matrix @ start).real])
    t = np.linspace(0, 5.0, 40001)
    sol = integrate.solve_ivp(rhs, (0, 5.0), y0, method="DOP853", t_eval=t, rtol=1e-10, atol=1e-14)
    direct = sol.y[:3].sum(axis=0)
    lam, vec = coupled_modes(matrix)
    heard = heard_amplitudes(vec, start[None, :])[0]
    predicted = (heard[None, :] * np.exp(1j * lam[None, :] * t[:, None])).sum(axis=1)
    # Envelopes: the analytic signal of the integrated force (scipy.signal.hilbert) and the
    # modulus of the modes' sum, in 50 ms steps away from the ends. The reduction to
    # first order drops terms of order sigma^2 / omega; they show late, in the
    # aftersound (0.24 dB at 4.5 s here, 0.5 dB at 110 Hz).
    env = np.abs(signal.hilbert(direct))
    pick = slice(400, -1600, 400)
    level = 20 * np.log10(env[pick] / np.abs(predicted[pick]))
    assert np.max(np.abs(level)) < 0.5, np.max(np.abs(level))
    assert 20 * np.log10(env[-1600] / env[400]) < -40  # the check spans the prompt sound and the aftersound
    # The first-order system itself, integrated as it stands: the modes are its exact
    # solution, to the integrator's tolerance.
    first = integrate.solve_ivp(lambda t, x: 1j * matrix @ x, (0, 5.0), start.astype(complex), method="DOP853",
                                t_eval=t, rtol=1e-11, atol=1e-14)
    np.testing.assert_allclose(first.y.sum(axis=0), predicted, rtol=0, atol=1e-8)


# --- the heard tables ---------------------------------------------------------------------

def uncoupled(demo):
    """The demo with the defaults of the unison fields: no bridge loss, no mistuning."""
    data = demo.to_dict()
    for anchor in data["anchor"]:
        for name in ("bridge_loss_fraction", "mistune_1_cents", "mistune_2_cents", "mistune_3_cents"):
            anchor.pop(name, None)
    data["instrument"]["body"] = "none"
    return parse_preset(data, source="uncoupled")


def test_uncoupled_keys_keep_their_sound(demo):
    # The defaults (no bridge loss, no mistuning, one polarization) leave every key as the
    # sum of its strings: one entry per partial, the same amplitudes.
    demo = uncoupled(demo)
    raw = build_tables(demo, keys=[40, 60])
    heard = couple_tables(raw)
    for k in (40, 60):
        assert not is_coupled(demo, k)
        np.testing.assert_array_equal(heard[k].freq_hz, raw[k].freq_hz)
        np.testing.assert_array_equal(heard[k].amplitude_n[:, 0], raw[k].amplitude_n.sum(axis=1))


def test_coupled_key_has_a_mode_per_string_and_the_same_blow(demo):
    p = demo.with_key_values(60, {"bridge_loss_fraction": 0.6, "mistune_2_cents": 0.3, "mistune_3_cents": -0.4})
    raw = build_tables(p, keys=[60])[60]
    heard = couple_unison(raw, p)
    n = len(raw.freq_hz)
    assert heard.amplitude_n.shape == (raw.amplitude_n.shape[0], 1, 3 * n)
    # At the blow the modes add up to the strings' force (a = V c).
    np.testing.assert_allclose(heard.amplitude_n[:, 0].reshape(-1, n, 3).sum(axis=2), raw.amplitude_n.sum(axis=1),
                               rtol=1e-9, atol=1e-12)
    # Rates: the prompt mode near sigma (1 + 2 r), the slow ones near (1 - r) sigma.
    rates = heard.sigma_per_s.reshape(n, 3)
    sigma = raw.sigma_per_s
    assert np.all(rates.max(axis=1) > sigma) and np.all(rates.min(axis=1) < sigma)
    np.testing.assert_allclose(rates.sum(axis=1), sigma * ((1 - 0.6) * 3 + 3 * 0.6), rtol=1e-9)  # the trace


def test_two_polarizations_add_slow_modes_heard_through_the_bridge(demo):
    data = demo.to_dict()
    data["instrument"]["polarizations"] = 2
    from voicer.tone.preset import parse_preset
    p = parse_preset(data, source="two-polarizations").with_key_values(
        60, {"bridge_loss_fraction": 0.5, "polarization_split_cents": 1.0, "horizontal_coupling": 0.1,
             "polarization_coupling": 0.2})
    heard = couple_unison(build_tables(p, keys=[60])[60], p)
    n = len(heard.freq_hz) // 6
    amp = np.abs(heard.amplitude_n[8, 0].reshape(n, 6))
    assert np.all(amp.max(axis=1) > 0)
    bad = p.with_key_values(60, {"horizontal_coupling": 0.01, "polarization_coupling": 0.5})
    with pytest.raises(ParameterError, match="key 60: a mode of the unison would not lose energy"):
        couple_unison(build_tables(bad, keys=[60])[60], bad)


def test_preset_fields_are_checked(demo):
    with pytest.raises(PresetError, match="bridge_loss_fraction"):
        demo.with_key_values(60, {"bridge_loss_fraction": 1.0})
    with pytest.raises(PresetError, match="mistune_2_cents"):
        demo.with_key_values(60, {"mistune_2_cents": 80.0})


# --- rendered audio -----------------------------------------------------------------------

def render_key(preset, key: int, seconds: float, velocity: int = 90) -> np.ndarray:
    import mido
    tables = couple_tables(build_tables(preset, keys=[key]))
    renderer = Renderer([Instrument(tables, sample_rate=FS, max_block=256, split=DEFAULT_SPLIT)], gain_db=-40.0)
    total = int(seconds * FS)
    out = np.zeros((2, total), dtype=np.float32)
    for pos in range(0, total, 256):
        events = [(0, mido.Message("note_on", note=key, velocity=velocity))] if pos == 0 else []
        renderer.process(out[:, pos:pos + 256], events)
    return out[0].astype(np.float64)


def envelope_db(y: np.ndarray, freq_hz: float, cutoff_hz: float = 8.0) -> np.ndarray:
    """Level of one partial: heterodyned to 0 Hz and low-passed (scipy.signal), in dB."""
    t = np.arange(len(y)) / FS
    sos = signal.butter(4, cutoff_hz, fs=FS, output="sos")
    base = y * np.exp(-2j * np.pi * freq_hz * t)
    z = signal.sosfiltfilt(sos, base.real) + 1j * signal.sosfiltfilt(sos, base.imag)
    return 20 * np.log10(np.abs(z) + 1e-30)


def two_slopes(level: np.ndarray, early: tuple[float, float], late: tuple[float, float]):
    """Decay rates (dB/s) of the two stages and the late line's level at t = 0."""
    t = np.arange(len(level)) / FS
    fits = [np.polyfit(t[(t >= a) & (t <= b)], level[(t >= a) & (t <= b)], 1) for a, b in (early, late)]
    return -fits[0][0], -fits[1][0], fits[1][1]


def test_small_mistuning_gives_double_decay_and_the_knee_rises_with_it(demo):
    # Weinreich 1977 (section III and its figures of double decay, from memory): strings
    # tuned within the coupling's reach (delta < eta) lock into a prompt sound, which
    # decays faster than one string alone, and an aftersound, which decays slower; the
    # larger the mistuning, the louder the aftersound comes in (the knee rises, and comes
    # sooner) and the faster it decays. Measured from the rendered audio of C3 (three
    # strings, string 3 tuned c cents sharp; 70 % of a string's loss goes to the bridge).
    key = 48
    f1 = demo.scale.f0_hz[key - 21]
    found = []
    for cents in (0.5, 1.0):
        p = uncoupled(demo).with_key_values(key, {"bridge_loss_fraction": 0.7, "mistune_3_cents": cents})
        level = envelope_db(render_key(p, key, 12.0), f1)
        found.append(two_slopes(level - level[FS // 10], (0.3, 2.0), (9.0, 11.5)))
    sigma_db = 20 / np.log(10) * float(demo.scale.modes(key).sigma_per_s[0])  # one string alone, dB/s
    for prompt, after, _ in found:
        assert prompt > 2.0 * sigma_db and after < 0.6 * sigma_db, (prompt, after, sigma_db)
    (_, after_small, knee_small), (_, after_large, knee_large) = found
    assert knee_large > knee_small + 6 and after_large > after_small, found


def test_large_mistuning_beats_at_the_difference_frequency(demo):
    # Weinreich 1977: beyond the coupling's reach (delta > eta) the modes keep their own
    # frequencies and the partial's envelope beats at their difference. Measured from the
    # audio: the strongest line of the level's spectrum (scipy.signal.periodogram).
    key = 60
    p = uncoupled(demo).with_key_values(key, {"bridge_loss_fraction": 0.2, "mistune_1_cents": -1.5, "mistune_2_cents": 1.5,
                                   "mistune_3_cents": 1.5})
    heard = couple_unison(build_tables(p, keys=[key])[key], p)
    strongest = np.argsort(np.abs(heard.amplitude_n[10, 0, :3]))[-2:]  # the in-phase pair 2-3 is silent
    first = heard.freq_hz[:3][strongest]
    expected = abs(first[1] - first[0])  # string 1 against the pair of strings 2 and 3
    y = render_key(p, key, 6.0)
    level = envelope_db(y, float(np.mean(first)), cutoff_hz=20.0)[FS // 2:]
    # The level's beating about its decay: scipy.signal.detrend takes out the decay line.
    f, power = signal.periodogram(signal.detrend(level), fs=FS, window="hann", nfft=1 << 22)
    band = (f > 0.3) & (f < 10)
    assert f[band][np.argmax(power[band])] == pytest.approx(expected, rel=0.03)
    assert 0.4 < expected < 0.5  # 3 cents at C4: 0.45 Hz, far beyond the coupling (eta / pi = 0.03 Hz)


def test_physical_model_plays_the_coupled_unison(demo):
    p = uncoupled(demo).with_key_values(60, {"bridge_loss_fraction": 0.5, "mistune_2_cents": 0.4})
    built = PhysicalModel().build(p, settings=TableSettings())
    assert len(built[60].freq_hz) == 3 * len(build_tables(p, keys=[60])[60].freq_hz)
    assert len(built[59].freq_hz) == len(build_tables(p, keys=[59])[59].freq_hz)
