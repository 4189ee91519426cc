"""Preset out of fitted keys: the instrument's pitch, and what the replay keeps."""

from __future__ import annotations

import math

import pytest

from voicer.analysis.fit import UNDECAYED_T60_S, _valid_partials
from voicer.analysis.preset_out import KeyFit, fitted_preset


def key_fit(demo, key: int, cents_off: float) -> KeyFit:
    """A key measured ``cents_off`` away from where the demo preset tunes it."""
    i = key - 21
    stretch = float(demo.resolved["stretch_cents"][i])
    f1 = float(demo.scale.f0_hz[i]) * 2 ** (cents_off / 1200)
    return KeyFit(key=key, sources=(("take/x.wav", 0.0),), first_partial_hz=f1, cents_from_et=stretch + cents_off,
                  b=float(demo.scale.b[i]), b_uncertainty=1e-7, quality="good")


def test_a_few_stretched_bass_notes_are_not_a_flat_piano(demo) -> None:
    """Two bass notes tuned exactly as the demo's stretch has them (several cents flat of
    ET; stretch tuning, common practice): the piano is at the base's pitch, A4 = 440 Hz
    (ISO 16), and the keys keep their stretch."""
    preset = fitted_preset(demo, [key_fit(demo, 30, 0.0), key_fit(demo, 36, 0.0)], provenance={})
    assert demo.resolved["stretch_cents"][36 - 21] < -3.0  # the case: a stretched bass
    assert preset.instrument["a4_hz"] == pytest.approx(440.0, abs=0.01)
    for key in (30, 36):
        assert preset.resolved["stretch_cents"][key - 21] == pytest.approx(demo.resolved["stretch_cents"][key - 21],
                                                                            abs=0.05)


def test_a_piano_sharp_as_a_whole_moves_a4(demo) -> None:
    """Three keys all 12 cents above the base's tuning: A4 = 440 x 2^(12/1200) = 443.06 Hz
    (ET from A4, ISO 16), and their stretch stays the base's."""
    preset = fitted_preset(demo, [key_fit(demo, k, 12.0) for k in (40, 60, 80)], provenance={})
    assert preset.instrument["a4_hz"] == pytest.approx(440.0 * 2 ** (12 / 1200), abs=0.01)
    assert preset.resolved["stretch_cents"][60 - 21] == pytest.approx(demo.resolved["stretch_cents"][60 - 21], abs=0.1)


def test_an_odd_partial_is_left_out_of_the_replay_not_the_fit() -> None:
    """A partial whose values a preset refuses (an aftersound line at -15000 dB re 1 N,
    as a cut-off envelope once gave; the preset allows -200..60 dB) is dropped with a
    remark naming it, and the others are kept as they were."""
    measured = {"speed_m_s": 2.0, "n": [1, 2, 3], "freq_hz": [100.0, 200.1, 300.4], "level_db": [-10.0, -14.0, -20.0],
                "t60_s": [12.0, 9.0, 7.0], "after_level_db": [-30.0, -15000.0, math.nan],
                "after_t60_s": [UNDECAYED_T60_S, 30.0, math.nan]}
    remarks: list[str] = []
    kept = _valid_partials(48, measured, remarks)
    assert kept["n"] == [1, 3] and kept["level_db"] == [-10.0, -20.0] and kept["after_t60_s"][0] == UNDECAYED_T60_S
    assert kept["speed_m_s"] == 2.0
    assert len(remarks) == 1 and "partial 2" in remarks[0] and "after_level_db" in remarks[0], remarks
