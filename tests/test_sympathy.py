"""Sympathetic resonance: with the sustain pedal down the strings of other keys answer a
struck key's partials near their own (measured from rendered audio); with it up only
the strings without dampers do."""

from __future__ import annotations

import mido
import numpy as np
import pytest

from voicer.engine.bank import DEFAULT_SPLIT
from voicer.engine.instrument import Instrument
from voicer.engine.models import PhysicalModel
from voicer.engine.renderer import Renderer
from voicer.engine.sympathy import sympathetic_answers
from voicer.tone.preset import parse_preset
from voicer.tone.tables import TableSettings

FS = 48_000
C3, C4, G4, CS4 = 48, 60, 67, 61


def coupled(demo, coupling: float):
    data = demo.to_dict()
    data["instrument"]["sympathetic_coupling"] = coupling
    for anchor in data["anchor"]:
        anchor["bridge_loss_fraction"] = 0.6
    return parse_preset(data, source=f"sympathetic {coupling}")


@pytest.fixture(scope="module")
def states(demo):
    """Instruments with and without sympathetic coupling (the same strings otherwise)."""
    out = {}
    for s in (0.0, 0.1):
        tables = PhysicalModel().build(coupled(demo, s), settings=TableSettings())
        out[s] = (tables, Instrument(tables, sample_rate=FS, max_block=256, split=DEFAULT_SPLIT))
    return out


def render(inst: Instrument, pedal: bool, seconds: float, key: int = C3) -> np.ndarray:
    r = Renderer([inst], gain_db=-30.0)
    total = int(seconds * FS)
    out = np.zeros((2, total), dtype=np.float32)
    first = ([(0, mido.Message("control_change", control=64, value=127))] if pedal else []) + \
        [(1, mido.Message("note_on", note=key, velocity=100))]
    for pos in range(0, total, 256):
        r.process(out[:, pos:pos + 256], first if pos == 0 else [])
    return out[0].astype(np.float64)


def amplitudes(y: np.ndarray, freqs_hz, t0: float, t1: float) -> np.ndarray:
    """Least-squares amplitudes of sinusoids at known frequencies in y between t0 and t1
    (numpy.linalg.lstsq on their cosines and sines): resolves lines closer than a
    low-pass filter could, given the window is long against 1 / their spacing."""
    t = np.arange(len(y)) / FS
    sel = (t >= t0) & (t <= t1)
    cols = [f(2 * np.pi * fr * t[sel]) for fr in freqs_hz for f in (np.cos, np.sin)]
    coef = np.linalg.lstsq(np.column_stack(cols), y[sel], rcond=None)[0]
    return np.hypot(coef[0::2], coef[1::2])


def test_with_the_pedal_down_c4_and_g4_answer_c3(states):
    # Common practice (and Weinreich 1977's bridge coupling): with the dampers lifted, a
    # struck C3 sets ringing the strings whose partials lie near its own: C4 (near its
    # 2nd partial) and G4 (near its 3rd). What the coupling adds to the render is the
    # other strings' motion: driven at C3's partial and ringing at their own frequency,
    # which the stretch and the strings' stiffness set apart from C3's (0.09 and 0.35 Hz
    # here): their own lines are in the added sound, resolved from C3's over 6 s windows,
    # and still there late in the note.
    (_, plain), (t1, sym) = states[0.0], states[0.1]
    whole = render(sym, True, 14.0)
    added = whole - render(plain, True, 14.0)
    c3 = float(amplitudes(whole, [np.mean(t1[C3].freq_hz[:3])], 0.2, 1.2)[0])
    for key, n in ((C4, 2), (G4, 3)):
        own = float(np.mean(t1[key].freq_hz[:3]))  # its unison's first partial
        driving = float(np.mean(t1[C3].freq_hz[3 * (n - 1):3 * n]))  # C3's n-th partial
        assert abs(own - driving) > 0.05
        early = amplitudes(added, [own, driving], 1.0, 7.0)
        late = amplitudes(added, [own, driving], 8.0, 14.0)
        assert 20 * np.log10(early[0] / c3) > -60.0, (key, early, c3)
        assert 20 * np.log10(late[0] / c3) > -80.0, (key, late, c3)
    # C#4 has no partial near C3's: nothing of it answers.
    assert CS4 not in set(sympathetic_answers(t1)[C3].keys.tolist())
    assert {C4, G4} <= set(sympathetic_answers(t1)[C3].keys.tolist())


def test_with_the_pedal_up_only_the_strings_without_dampers_answer(states):
    # With the pedal up the dampers rest on C4 and G4 (common practice): nothing of them is
    # added to C3's sound. The strings above last_damped_key have no dampers and answer
    # whatever the pedal: C5's 4th partial sets C7 ringing, at C7's own frequency.
    (_, plain), (t1, sym) = states[0.0], states[0.1]
    last = t1.preset.instrument["last_damped_key"]
    free = {int(k) for a in sym.keys.values() if a.free_answers is not None for k in a.free_answers.keys}
    assert free and min(free) > last
    whole = render(sym, False, 6.0)
    added = whole - render(plain, False, 6.0)
    c3 = float(amplitudes(whole, [np.mean(t1[C3].freq_hz[:3])], 0.2, 1.2)[0])
    for key in (C4, G4):
        own = float(np.mean(t1[key].freq_hz[:3]))
        assert amplitudes(added, [own], 1.0, 5.0)[0] < 1e-4 * c3, key
    c5, c7 = 72, 96
    assert c7 in set(sym.keys[c5].free_answers.keys.tolist())
    whole = render(sym, False, 6.0, key=c5)
    added = whole - render(plain, False, 6.0, key=c5)
    c7_own = float(np.mean(t1[c7].freq_hz[:3]))
    c5_fourth = float(np.mean(t1[c5].freq_hz[9:12]))
    own, driving = amplitudes(added, [c7_own, c5_fourth], 1.0, 5.0)
    assert abs(c7_own - c5_fourth) > 0.2 and own > 1e-4 * float(amplitudes(whole, [c5_fourth], 0.2, 1.2)[0])


def test_answers_stay_within_the_budget_and_vanish_when_switched_off(states):
    (t0, _), (t1, _) = states[0.0], states[0.1]
    cap = t1.preset.instrument["sympathetic_max_entries"]
    for answers in sympathetic_answers(t1).values():
        assert len(answers.freq_hz) <= cap
        # A mode answers only near a partial: the weak-coupling response |c| = |k| / |L_p - L_m|.
    assert all(not len(a.freq_hz) for a in sympathetic_answers(t0).values())
