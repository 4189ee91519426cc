"""The renderer: sample accuracy, the rendered spectrum against the modal table (measured
from the audio with scipy), dampers and pedals, polyphony, A/B, safety, flood and
real-time rules."""

from __future__ import annotations

import time
import tracemalloc

import mido
import numpy as np
import pytest
from scipy import signal
from threadpoolctl import threadpool_limits

from voicer.engine.bank import DEFAULT_SPLIT
from voicer.engine.instrument import DAMPER_LEVELS, Instrument
from voicer.engine.renderer import Renderer
from voicer.io.sources import MidiFileSource
from voicer.physics.tuning import cents
from voicer.tone.preset import parse_preset
from voicer.tone.tables import build_tables
from voicer.tone.voicing import apply_voicing, load_voicing

FS = 48_000
KEYS = [48, 60, 64, 67, 72, 76, 96, 100]
GAIN_DB = -50.0


def on(note, vel=80):
    return mido.Message("note_on", note=note, velocity=vel)


def off(note):
    return mido.Message("note_off", note=note)


def cc(control, value):
    return mido.Message("control_change", control=control, value=value)


@pytest.fixture(scope="module")
def plain(demo):
    """The demo without sympathetic resonance: these tests follow each key's own partials
    through the dampers and pedals (the resonance: test_sympathy.py)."""
    data = demo.to_dict()
    data["instrument"]["sympathetic_coupling"] = 0.0
    return parse_preset(data, source=demo.source)


@pytest.fixture(scope="module")
def full_tables(plain):
    return build_tables(plain, use_cache=False)


@pytest.fixture(scope="module")
def tables(plain):
    return build_tables(plain, keys=KEYS, use_cache=False)


@pytest.fixture(scope="module")
def tables_b(plain, demo_path):
    plan = load_voicing(demo_path.parent.parent / "voicings" / "kestrel-190-mellow.toml")
    return build_tables(apply_voicing(plain, plan), keys=KEYS, use_cache=False)


def make(tables, *more, block=256, **kw):
    states = [Instrument(t, sample_rate=FS, max_block=block, split=DEFAULT_SPLIT, name=n)
              for t, n in zip((tables, *more), "AB")]
    return Renderer(states, gain_db=kw.pop("gain_db", GAIN_DB), **kw)


def render(renderer, events, total, block=256):
    """Render ``total`` samples calling process() with ``block`` frames at a time."""
    out = np.zeros((2, total), dtype=np.float32)
    events = sorted(events, key=lambda e: e[0])
    i = pos = 0
    while pos < total:
        n = min(block, total - pos)
        chunk = []
        while i < len(events) and events[i][0] < pos + n:
            chunk.append((events[i][0] - pos, events[i][1]))
            i += 1
        renderer.process(out[:, pos:pos + n], chunk)
        pos += n
    return out[0].astype(np.float64)


def partial_track(y, freq_hz, t0=0.25, t1=None, cutoff_hz=25.0):
    """Heterodyne a partial to 0 Hz and low-pass it (scipy.signal): returns t and the
    complex envelope z(t), with y ~ Re(z exp(i 2 pi f t))."""
    t = np.arange(len(y)) / FS
    sos = signal.butter(4, cutoff_hz, fs=FS, output="sos")
    base = y * np.exp(-2j * np.pi * freq_hz * t)
    z = 2 * (signal.sosfiltfilt(sos, base.real) + 1j * signal.sosfiltfilt(sos, base.imag))
    sel = (t >= t0) & (t <= (t1 if t1 is not None else t[-1] - 0.25))
    return t[sel], z[sel]


def measure(y, freq_hz, **kw):
    """Frequency, decay rate and level at t = 0 of one partial, from the audio."""
    t, z = partial_track(y, freq_hz, **kw)
    decay, log0 = np.polyfit(t, np.log(np.abs(z)), 1)
    turn = np.polyfit(t, np.unwrap(np.angle(z)), 1)[0]
    return freq_hz + turn / (2 * np.pi), -decay, np.exp(log0)


# --- sample accuracy ---------------------------------------------------------------

def passage():
    """A short passage touching every kind of event, some at block edges."""
    return [(0, on(60)), (255, on(76, 50)), (256, on(64, 60)), (1000, cc(64, 127)), (2000, off(60)),
            (2600, on(60, 100)), (3000, cc(66, 127)), (3500, off(64)), (4000, cc(67, 127)), (4200, on(72, 90)),
            (5000, "flip"), (6000, off(72)), (6500, cc(64, 0)), (7000, cc(66, 0)), (7100, on(96)),
            (8191, off(76)), (8192, cc(123, 0)), (9000, on(100, 127)), (10000, "flip")]


@pytest.mark.parametrize("block", [1, 64, 65, 8193])
def test_block_size_does_not_change_the_samples(tables, tables_b, block) -> None:
    """The same MIDI rendered with blocks of 1, 64, 65, 256 and 8193 samples gives the
    same samples (to float32 rounding of the bank's block products)."""
    total = 12_000
    ref = render(make(tables, tables_b), passage(), total, 256)
    got = render(make(tables, tables_b), passage(), total, block)
    assert np.abs(ref).max() > 0.01
    np.testing.assert_allclose(got, ref, atol=2e-5 * np.abs(ref).max())


def test_event_on_the_last_sample_of_a_block(tables) -> None:
    r = make(tables)
    out = np.zeros((2, 256), dtype=np.float32)
    r.process(out, [(255, on(60))])
    assert np.all(out[:, :255] == 0) and np.all(out[:, 255] != 0)


def test_note_on_velocity_zero_is_a_note_off(tables, tmp_path) -> None:
    """MIDI 1.0: note-on with velocity 0 means note-off (the file source normalises it)."""
    def song(release):
        mid = mido.MidiFile()
        track = mido.MidiTrack([on(60), release.copy(time=240)])
        mid.tracks.append(track)
        path = tmp_path / f"{release.type}.mid"
        mid.save(path)
        return [(int(round(t * FS)), m) for t, m in MidiFileSource(path).events()]

    zero = render(make(tables), song(mido.Message("note_on", note=60, velocity=0)), FS)
    explicit = render(make(tables), song(off(60)), FS)
    np.testing.assert_array_equal(zero, explicit)


# --- the sound against the modal table -----------------------------------------------

def test_sustained_spectrum_matches_the_table(tables) -> None:
    """A held note, measured from the rendered audio (heterodyne + scipy.signal
    Butterworth low-pass, line fits): partial frequencies within 0.1 cent, levels within
    0.1 dB, decay rates within 1 % of the modal table the voice was built from."""
    key, vel = 48, 90
    r = make(tables)
    y = render(r, [(0, on(key, vel))], 3 * FS)
    assert np.abs(y).max() < 10 ** (-7 / 20)  # below the limiter's knee: nothing bent
    data = r.states[0].keys[key]
    gain = 10 ** (GAIN_DB / 20)
    table = tables[key]
    beta = tables.preset.scale.value("strike_ratio", key)
    checked = 0
    for n in range(1, 17):
        start = abs(data.amplitude[vel, n - 1]) * gain
        if abs(np.sin(n * np.pi * beta)) < 0.2 or start * np.exp(-table.sigma_per_s[n - 1] * 3.0) < 3e-5:
            continue  # near a strike-point null, or culled (-100 dBFS) before the window ends
        f, sigma, level = measure(y, table.freq_hz[n - 1])
        assert abs(float(cents(f, table.freq_hz[n - 1]))) < 0.1, n
        assert sigma == pytest.approx(table.sigma_per_s[n - 1], rel=0.01), n
        assert 20 * np.log10(level / (abs(data.amplitude[vel, n - 1]) * gain)) == pytest.approx(0, abs=0.1), n
        checked += 1
    assert checked >= 8


def test_velocity_map_and_layers(tables) -> None:
    """The voice's amplitudes are the table interpolated at the velocity's hammer speed."""
    from voicer.tone.velocity import hammer_speed

    inst = make(tables).states[0]
    speed = float(hammer_speed(100, tables.preset.instrument))
    np.testing.assert_allclose(inst.keys[64].amplitude[100], tables[64].at_speed(speed), rtol=1e-12)


# --- dampers and pedals ------------------------------------------------------------

def released_decay(tables, events, key=60, t0=0.56, t1=0.75):
    """Decay rate of the first partial shortly after a release at 0.5 s (while a damped
    string is still well above the culling level)."""
    y = render(make(tables), events, int(1.5 * FS))
    return measure(y, tables[key].freq_hz[0], t0=t0, t1=t1)[1]


def test_damper_adds_its_rate_on_release(tables) -> None:
    sigma = tables[60].sigma_per_s[0]
    damper = tables.preset.scale.value("damper_rate_per_s", 60)
    got = released_decay(tables, [(0, on(60)), (int(0.5 * FS), off(60))])
    assert got == pytest.approx(sigma + damper, rel=0.01)


def test_sustain_pedal_holds_and_half_pedal_damps_in_part(tables) -> None:
    sigma = tables[60].sigma_per_s[0]
    damper = tables.preset.scale.value("damper_rate_per_s", 60)
    held = released_decay(tables, [(0, cc(64, 127)), (0, on(60)), (int(0.5 * FS), off(60))])
    assert held == pytest.approx(sigma, rel=0.01)
    # CC 60 is half way between half_pedal_low_cc 30 and half_pedal_high_cc 90.
    half = released_decay(tables, [(0, cc(64, 60)), (0, on(60)), (int(0.5 * FS), off(60))])
    level = round(0.5 * DAMPER_LEVELS) / DAMPER_LEVELS
    assert half == pytest.approx(sigma + level * damper, rel=0.01)


def test_sostenuto_holds_only_the_keys_it_caught(tables) -> None:
    events = [(0, on(60)), (100, cc(66, 127)), (200, on(64)), (int(0.5 * FS), off(60)), (int(0.5 * FS), off(64))]
    y = render(make(tables), events, int(1.5 * FS))
    s60 = measure(y, tables[60].freq_hz[0], t0=0.56, t1=0.75)[1]
    s64 = measure(y, tables[64].freq_hz[0], t0=0.56, t1=0.75)[1]
    assert s60 == pytest.approx(tables[60].sigma_per_s[0], rel=0.01)
    assert s64 == pytest.approx(tables[64].sigma_per_s[0] + tables.preset.scale.value("damper_rate_per_s", 64),
                                rel=0.01)


def test_undamped_treble_rings_on(tables) -> None:
    key = 100  # above last_damped_key = 88
    y = render(make(tables), [(0, on(key)), (int(0.2 * FS), off(key))], FS)
    sigma = measure(y, tables[key].freq_hz[0], t0=0.3, t1=0.7)[1]
    assert sigma == pytest.approx(tables[key].sigma_per_s[0], rel=0.01)


def test_una_corda_changes_the_strike(tables) -> None:
    inst = tables.preset.instrument
    plain = render(make(tables), [(0, on(60))], FS)
    shifted = render(make(tables), [(0, cc(67, 127)), (0, on(60))], FS)
    f = tables[60].freq_hz
    for n in (1, 3):
        a = measure(plain, f[n - 1])[2]
        b = measure(shifted, f[n - 1])[2]
        expected = inst["una_corda_level_db"] + inst["una_corda_tilt_db_per_octave"] * np.log2(f[n - 1] / f[0])
        assert 20 * np.log10(b / a) == pytest.approx(expected, abs=0.1)


def test_restrike_adds_to_the_vibrating_strings(tables) -> None:
    """Striking a sounding key adds a new strike; the old vibration goes on (linear
    superposition of the two strikes)."""
    t1 = 7000
    both = render(make(tables), [(0, on(60)), (t1, on(60, 100))], FS)
    first = render(make(tables), [(0, on(60))], FS)
    second = render(make(tables), [(t1, on(60, 100))], FS)
    np.testing.assert_allclose(both, first + second, atol=2e-5 * np.abs(both).max())


def test_partials_are_culled_below_minus_100_dbfs_and_not_before(tables) -> None:
    """Issue 4 item 1: partials below -100 dB re full scale are dropped (the default).

    A held C4 rings for 3 s. At every housekeeping point the bank keeps exactly the
    partials whose level, predicted from the modal table (velocity map, decay rate,
    master gain), is at or above -100 dBFS there: the count falls as they decay, the
    weakest one kept is above the threshold and none is dropped between the points."""
    from voicer.engine.defaults import DEFAULT_CULL_DBFS
    from voicer.engine.renderer import HOUSEKEEPING_FRAMES as HK
    from voicer.tone.velocity import hammer_speed

    assert DEFAULT_CULL_DBFS == -100.0
    key, vel = 60, 100
    r = make(tables)  # the renderer's default cull
    table = tables[key]
    start = np.abs(table.at_speed(float(hammer_speed(vel, tables.preset.instrument)))) * 10 ** (GAIN_DB / 20)
    threshold = 10 ** (-100 / 20)
    out = np.zeros((2, 256), dtype=np.float32)
    r.process(out, [(0, on(key, vel))])
    bank = r.banks[0]
    counts, weakest_kept_db, loudest_dropped_db = [], [], []
    for b in range(1, 3 * FS // 256):
        before = bank.count
        r.process(out, [])
        if b * 256 % HK:
            assert bank.count == before, f"partials dropped between housekeeping points at block {b}"
            continue
        level = start * np.exp(-table.sigma_per_s * (b * 256) / FS)  # at the housekeeping point
        kept = set(bank.index[: bank.count].tolist())
        clear = np.abs(level / threshold - 1) > 1e-9  # leave out a partial right at the threshold
        assert {n for n in kept if clear[n]} == set(np.flatnonzero(clear & (level >= threshold)).tolist()), b
        counts.append(bank.count)
        weakest_kept_db.append(20 * np.log10(min(level[n] for n in kept)) if kept else np.inf)
        dropped = [level[n] for n in range(len(level)) if n not in kept]
        loudest_dropped_db.append(20 * np.log10(max(dropped)) if dropped else -np.inf)
    assert counts[0] > 2 * counts[-1] > 0  # many partials dropped as the note decays
    assert all(a >= b for a, b in zip(counts, counts[1:]))
    assert min(weakest_kept_db) >= -100.0 and max(loudest_dropped_db) < -100.0


def test_all_notes_off_and_stop_clear_stuck_notes(tables) -> None:
    stuck = [(0, on(60)), (0, on(64)), (0, on(67))]
    ringing = render(make(tables), stuck, 2 * FS)
    cleared = render(make(tables), stuck + [(int(0.5 * FS), cc(123, 0))], 2 * FS)
    late = slice(int(1.5 * FS), 2 * FS)
    assert np.abs(cleared[late]).max() < 0.05 * np.abs(ringing[late]).max()
    r = make(tables)
    render(r, stuck, FS // 2)
    r.stop()
    tail = render(r, [], FS // 4)
    assert np.abs(tail[int(0.1 * FS):]).max() < 1e-5  # below -100 dBFS after 0.1 s
    assert r.voices[0].voices == 0


def test_peak_meter_catches_a_note_that_ended_between_readings(tables) -> None:
    # A short note that is over (all sound off) before the display reads the counts.
    r = make(tables)
    render(r, [(0, on(60)), (FS // 8, cc(120, 0))], FS // 2)
    assert r.voices[0].voices == 0 and r.banks[0].count == 0  # the instantaneous counts missed it
    voices, partials = r.meter.take()
    assert voices == 1 and partials > 0
    assert r.meter.take() == (0, 0)  # a reading starts the next interval from zero


# --- polyphony, A/B, safety ---------------------------------------------------------

def test_voice_limit_steals_released_voices_first(tables) -> None:
    r = make(tables, max_voices=3)
    voices = r.voices[0]
    render(r, [(0, on(60)), (100, on(64)), (200, off(60)), (300, on(67)), (400, on(72))], 2000)
    assert voices.active <= 3 and voices.steals == 1
    sounding = {voices.key_of[v] for k in range(128) for v in voices.by_key[k]}
    assert sounding == {64, 67, 72}  # 60, released, was the one faded out


def test_voice_limit_steals_the_quietest_when_none_is_released(tables) -> None:
    """With every key held, the quietest voice goes (here the middle one: neither the
    oldest nor the newest), and it fades out over FADE_S instead of being cut: its
    share of the output, measured from the audio, is its own sound times
    exp(-ln(1000) t / FADE_S) (FADE_S: the time to fall 60 dB, the usual T60), with no
    sample-to-sample jump beyond the voice's own."""
    from voicer.engine.instrument import FADE_S
    from voicer.engine.renderer import HOUSEKEEPING_FRAMES as HK

    quiet = [(100, on(64, 20))]
    loud = [(0, on(60, 120)), (200, on(67, 120))]
    total = 7 * HK
    alone = render(make(tables), quiet, total)  # the quiet voice on its own
    # Steal right after a housekeeping point (nothing is culled for the next 42 ms), near a
    # peak of the quiet voice, where a cut would click the most.
    steal_at = 5 * HK + int(np.argmax(np.abs(alone[5 * HK:5 * HK + 200])))
    r = make(tables, max_voices=3)
    y = render(r, loud + quiet + [(steal_at, on(72, 100))], total)
    others = render(make(tables), loud + [(steal_at, on(72, 100))], total)
    voices = r.voices[0]
    assert voices.steals == 1 and voices.active == 3
    assert {voices.key_of[v] for k in range(128) for v in voices.by_key[k]} == {60, 67, 72}  # 64 went
    # The stolen voice's share of the output (superposition: everything else is the same).
    share = y - others
    # Float32 sums of different sets of partials (as in the restrike test): observed 5e-7 of
    # the peak, allowed 2e-6.
    tol = 2e-6 * np.abs(y).max()
    np.testing.assert_allclose(share[:steal_at], alone[:steal_at], rtol=0, atol=tol)
    fade = np.exp(-np.log(1000.0) / FADE_S * np.arange(6 * HK - steal_at) / FS)
    np.testing.assert_allclose(share[steal_at:6 * HK], alone[steal_at:6 * HK] * fade, rtol=0, atol=tol)
    # The fade length measured from the audio: the ratio of the share to the voice alone,
    # least squares over 1 ms windows, falls 60 dB in FADE_S (within 1 %).
    win = FS // 1000
    t, ratio = [], []
    for lo in range(steal_at, steal_at + int(1.5 * FADE_S * FS) - win, win):
        a, b = alone[lo:lo + win], share[lo:lo + win]
        t.append((lo + win / 2 - steal_at) / FS)
        ratio.append(np.dot(a, b) / np.dot(a, a))
    rate = -np.polyfit(t, np.log(ratio), 1)[0]
    assert np.log(1000.0) / rate == pytest.approx(FADE_S, rel=0.01)
    # No click: around the steal the share moves from sample to sample no more than the
    # voice alone does, plus what the fade itself takes away per sample (<= ln(1000) /
    # (FADE_S fs) of the level); a cut would jump by the whole sample at the steal.
    near = slice(steal_at - win, steal_at + 10 * win)
    bound = np.abs(np.diff(alone[near])).max() + np.log(1000.0) / (FADE_S * FS) * np.abs(alone[near]).max()
    assert np.abs(np.diff(share[near])).max() <= bound + tol
    assert abs(alone[steal_at]) > 5 * bound  # which a cut here would break
    # Culled at the next housekeeping (below -100 dBFS by then): its voice is free again
    # (``voices`` counts the fading ones too).
    assert voices.voices == 3


def test_ab_flip_crossfades_to_the_other_state(tables, tables_b) -> None:
    """A flip inside a block starts at its own sample (not at the next block) and mixes
    a + w (b - a) with the renderer's linear law w_i = (i + 1) / fade over ``fade``
    samples (renderer.py, _fill_ramp), a and b rendered separately in each state."""
    events = [(0, on(60)), (0, on(67))]
    flip_at = 10_100  # inside a 256-sample block (10_100 = 39 * 256 + 116)
    ab = make(tables, tables_b)
    fade = ab.crossfade
    assert fade == round(0.02 * FS)  # crossfade_s default, 20 ms
    y = render(ab, events + [(flip_at, "flip")], 20_000)
    only_a = render(make(tables), events, 20_000)
    only_b = render(make(tables_b), events, 20_000)
    # Both states render the same blocks as when alone; what is left is the float32
    # rounding of y, a and b (IEEE 754 binary32: half an ulp each, an ulp <= 2**-23 of
    # the peak): two ulps of the peak.
    tol = 2.0**-22 * np.abs(only_a).max()
    assert not np.allclose(only_a, only_b, atol=1000 * tol)  # the states really differ
    np.testing.assert_allclose(y[:flip_at], only_a[:flip_at], atol=tol)
    a, b = only_a[flip_at:flip_at + fade], only_b[flip_at:flip_at + fade]
    w = np.arange(1, fade + 1) / fade
    np.testing.assert_allclose(y[flip_at:flip_at + fade], a + w * (b - a), rtol=0, atol=tol)
    np.testing.assert_allclose(y[flip_at + fade:], only_b[flip_at + fade:], atol=tol)
    # The check tells the law apart from one sample later (w = i / fade) and from a cut.
    late = np.arange(fade) / fade
    assert np.abs(y[flip_at:flip_at + fade] - (a + late * (b - a))).max() > 20 * tol
    assert np.abs(y[flip_at:flip_at + fade] - b).max() > 1000 * tol
    assert ab.state_name == "B" and ab.stats.flips == 1


def test_ab_flip_between_blocks_lands_in_the_next_block(tables, tables_b) -> None:
    """flip() called between callbacks (the keyboard's space bar, through LiveInput) starts
    the crossfade at the first sample of the next block: within one block."""
    events = [(0, on(60)), (0, on(67))]
    ab = make(tables, tables_b)
    first = render(ab, events, 256 * 40)
    ab.flip()
    rest = render(ab, [], 256 * 10)
    both = np.concatenate([first, rest])
    only_a = render(make(tables), events, 256 * 50)
    only_b = render(make(tables_b), events, 256 * 50)
    tol = 2.0**-22 * np.abs(only_a).max()  # as above: float32 rounding
    at, fade = 256 * 40, ab.crossfade
    np.testing.assert_allclose(both[:at], only_a[:at], atol=tol)
    w = np.arange(1, fade + 1) / fade
    a, b = only_a[at:at + fade], only_b[at:at + fade]
    np.testing.assert_allclose(both[at:at + fade], a + w * (b - a), rtol=0, atol=tol)
    np.testing.assert_allclose(both[at + fade:], only_b[at + fade:], atol=tol)


def test_ab_by_controller_and_program_change(tables, tables_b) -> None:
    r = make(tables, tables_b, ab_cc=80)
    render(r, [(0, cc(80, 127)), (10, cc(80, 127)), (20, cc(80, 0))], 256)
    assert r.state_name == "B"  # a press flips once, holding does not flip again
    render(r, [(0, mido.Message("program_change", program=3))], 256)
    assert r.state_name == "A"


def test_output_is_capped_below_the_ceiling(tables) -> None:
    r = make(tables, gain_db=0.0)  # absurdly loud on purpose
    y = render(r, [(0, on(k, 127)) for k in KEYS], FS // 2)
    ceiling = 10 ** (-1 / 20)
    assert np.abs(y).max() <= ceiling + 1e-7 and r.safety.limited > 0


def test_non_finite_state_is_zeroed_and_the_voice_reset(tables) -> None:
    r = make(tables)
    render(r, [(0, on(60)), (0, on(64))], 512)
    bank = r.banks[0]
    bad_owner = int(bank.owner[0])
    bank.state[0] = np.nan
    y = render(r, [], 512)
    assert np.all(np.isfinite(y)) and r.stats.nonfinite > 0
    assert bad_owner not in set(bank.owner[: bank.count].tolist())
    assert np.abs(render(r, [], 512)).max() > 0  # the other voice plays on


def test_flood_of_random_midi(full_tables) -> None:
    """100,000 random MIDI events in 10 s of audio: the voice limit holds, every sample is
    finite and below the ceiling, and the render time stays bounded."""
    r = make(full_tables)
    rng = np.random.default_rng(7)
    n = 100_000
    times = np.sort(rng.integers(0, 10 * FS, n))
    kinds = rng.integers(0, 10, n)
    events = []
    for t, kind in zip(times.tolist(), kinds.tolist()):
        key = int(rng.integers(21, 109))
        if kind < 5:
            events.append((t, on(key, int(rng.integers(1, 128)))))
        elif kind < 9:
            events.append((t, off(key)))
        else:
            events.append((t, cc(int(rng.choice([64, 66, 67])), int(rng.integers(0, 128)))))
    out = np.zeros((2, 10 * FS), dtype=np.float32)
    i = pos = 0
    peak_voices = 0
    # One BLAS thread, as `voicer play` runs the callback: with two on a busy 2-core machine
    # the block products stall (issue 4, speed), and this render took 120 s instead of 5.
    with threadpool_limits(limits=1):
        t0 = time.perf_counter()
        while pos < out.shape[1]:
            chunk = []
            while i < len(events) and events[i][0] < pos + 256:
                chunk.append((events[i][0] - pos, events[i][1]))
                i += 1
            r.process(out[:, pos:pos + 256], chunk)
            peak_voices = max(peak_voices, r.voices[0].active)
            pos += 256
        elapsed = time.perf_counter() - t0
    assert peak_voices <= r.voices[0].max_voices
    assert np.all(np.isfinite(out)) and np.abs(out).max() <= 10 ** (-1 / 20) + 1e-7
    assert elapsed < 60.0, elapsed


def _traced_growth(renderer: Renderer, script, repeats: int) -> int:
    """Peak traced memory (tracemalloc) above its start while ``renderer`` plays ``script``
    (one list of events per call of its block size): the least over ``repeats`` passes.

    A temporary made on a path of the script shows in every pass; the least filters out
    what Python and numpy keep once in a while (a list growing its capacity, a cache)."""
    out = np.zeros((2, renderer.block), dtype=np.float32)
    passes = []
    tracemalloc.start()
    try:
        for _ in range(repeats):
            tracemalloc.reset_peak()
            before, _ = tracemalloc.get_traced_memory()
            for events in script:
                renderer.process(out, events)
            _, peak = tracemalloc.get_traced_memory()
            passes.append(peak - before)
    finally:
        tracemalloc.stop()
    return min(passes)


#: Blocks touching every path of the callback: notes past the voice limit (stealing the
#: released, then the quietest), sustain (full and half), sostenuto, una corda, all notes
#: off, A/B by command, controller and program change, and housekeeping.
ALLOCATION_SCRIPT = [
    [(5, cc(64, 127))], [(7, off(24)), (9, off(26))], [(1, "flip")], [(3, on(72, 110)), (4, cc(67, 127))],
    [(100, cc(64, 60))], [(0, on(30)), (10, on(31)), (20, on(33))], [(50, on(26)), (60, cc(66, 127))],
    [(0, cc(66, 0)), (200, cc(80, 127))], [(30, cc(80, 0)), (40, mido.Message("program_change", program=2))],
    [(0, cc(64, 0)), (255, on(40, 127))], [(0, on(41, 5)), (1, on(43, 127)), (2, cc(67, 0))],
    [(128, cc(123, 0))], [], [(0, on(50, 90)), (64, on(52, 90)), (128, on(53, 90))], [], []]


def _playing(tables, *, block: int = 256, max_voices: int = 24, idle: bool = False) -> Renderer:
    """An A/B renderer warmed up on ALLOCATION_SCRIPT, its voices full (or, with ``idle``,
    the same renderer with nothing ever played)."""
    r = make(tables, tables, block=block, gain_db=-20.0, max_voices=max_voices, ab_cc=80)
    out = np.zeros((2, block), dtype=np.float32)
    chord = [(i, on(k, 110)) for i, k in enumerate(range(24, 96, 2))]  # 36 keys; re-strikes add voices
    for _ in range(0 if idle else max_voices // 12):  # past the voice limit: voices are stolen
        r.process(out, chord)
    for _ in range(3):  # warm-up: every path once
        for events in ALLOCATION_SCRIPT:
            r.process(out, [] if idle else events)
    return r


#: Python's own objects that a peak of traced memory also sees (numpy's view objects,
#: events, frames): about 1.5 kB on this machine, idle or not.
PYTHON_SLACK = 2048


def test_callback_allocates_no_arrays_after_warm_up(full_tables) -> None:
    """The audio callback body (Renderer.process), through notes, voice stealing, pedals,
    A/B flips and housekeeping, allocates no arrays after warm-up (tracemalloc):

    * above an idle renderer (the same calls with nothing sounding), its traced peak grows
      by less than numpy's fixed per-call structure of a grouped update (``np.add.at``,
      used to sum each voice's partials for stealing: numpy 2 allocates about 5 kB of
      iterator state per call, whatever the sizes; measured here) plus PYTHON_SLACK, far
      less than an array over the partials (measured 4.5 kB above idle with 1,273
      partials, 4.1 kB with 3,892);
    * nothing grows with the partials (three times the voices and partials) or with the
      block (256 -> 2048 samples: a block of float64 grows by 14 kB): the peaks differ by
      less than PYTHON_SLACK.
    """
    fixed = _numpy_at_overhead()
    quiet = [[] for _ in ALLOCATION_SCRIPT]
    baseline = _traced_growth(_playing(full_tables, idle=True), quiet, 4)
    runs = {}
    for name, kw in {"base": {}, "voices": {"max_voices": 72}, "block": {"block": 2048}}.items():
        r = _playing(full_tables, **kw)
        steals, flips = r.voices[0].steals, r.stats.flips
        growth = _traced_growth(r, ALLOCATION_SCRIPT, 4)
        assert r.voices[0].steals - steals >= 8 and r.stats.flips - flips == 12, name  # the paths were taken
        runs[name] = (growth, r.banks[0].count)
    (base, count), (more, more_count), (longer, _) = runs["base"], runs["voices"], runs["block"]
    assert count > 1000 and more_count > 2.5 * count, runs
    assert base - baseline < fixed + PYTHON_SLACK, (runs, baseline, fixed)
    assert more - base < PYTHON_SLACK and longer - base < PYTHON_SLACK, (runs, baseline)


def _numpy_at_overhead() -> int:
    """Traced peak of one ``np.add.at`` on four numbers (after a first call)."""
    a, idx = np.zeros(4), np.zeros(4, dtype=np.int64)
    np.add.at(a, idx, 1.0)
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        before, _ = tracemalloc.get_traced_memory()
        np.add.at(a, idx, 1.0)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak - before


def test_allocation_check_sees_a_block_sized_temporary(tables) -> None:
    """The measurement above can fail: an effect that makes one float64 temporary of the
    block per call is caught."""

    class Allocating(HalfGain):
        def process(self, block: np.ndarray) -> None:
            block *= np.ones(block.shape[1])  # one temporary of 256 float64

    quiet = [[] for _ in range(8)]
    baseline = _traced_growth(make(tables, effects=[HalfGain()]), quiet, 2)
    growth = _traced_growth(make(tables, effects=[Allocating()]), quiet, 2)
    assert growth - baseline >= 256 * 8, (growth, baseline)


class HalfGain:
    """A minimal effect plugin (voicer.effects protocol): halves the signal in place."""

    name = "half"
    latency_frames = 0

    def prepare(self, sample_rate: float, max_block: int, channels: int) -> None:
        self.prepared = (sample_rate, max_block, channels)

    def process(self, block: np.ndarray) -> None:
        block *= 0.5

    def reset(self) -> None:
        pass


def test_effects_process_the_master_signal(tables) -> None:
    from voicer.engine.host import Effect

    effect = HalfGain()
    assert isinstance(effect, Effect)  # the protocol, checked at run time
    effect.prepare(FS, 256, 1)
    plain = render(make(tables), [(0, on(60))], 4096)
    halved = render(make(tables, effects=[effect]), [(0, on(60))], 4096)
    np.testing.assert_allclose(halved, 0.5 * plain, rtol=1e-6, atol=1e-9)
