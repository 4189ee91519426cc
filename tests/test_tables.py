"""Modal tables of the demo instrument: convergence, strike point, literature trends,
velocity layers and the cache."""

from __future__ import annotations

import numpy as np
import pytest

from voicer.errors import VoicerError
from voicer.physics.strike import StepSettings
from voicer.report.spectrum import levels_db, spectral_centroid_hz
from voicer.tone import cache
from voicer.tone.preset import parse_preset
from voicer.tone.tables import TableSettings, build_tables, simulate_blows
from voicer.tone.velocity import hammer_speed, layer_speeds

MF = 2.0  # m/s, mezzo-forte (Russell & Rossing 1998: about 1-6 m/s span the dynamic range)


def blow(preset, key, speeds, settings=TableSettings(), **fields):
    if fields:
        preset = preset.with_key_values(key, fields)
    return simulate_blows(preset, [key], np.atleast_1d(speeds), settings=settings).tables[key]


def spectrum(table, layer=0):
    return table.freq_hz, table.amplitude_n[layer].sum(axis=0)


@pytest.mark.parametrize("key", [33, 60, 84, 100])
def test_converged_in_step_and_mode_count(demo, key) -> None:
    """Halving the time step and doubling the mode count change the levels of the first
    30 partials by less than 0.2 dB (the issue's bound). Left out: partials at a
    strike-point null (|sin(n pi beta)| < 0.05) and partials more than 90 dB below the
    strongest of their blow (the deepest dips of the pulse spectrum, e.g. -107 dB at C6 n = 14,
    whose level is a difference of nearly equal numbers; inaudible beside the others)."""
    base = blow(demo, key, [0.5, MF, 6.0])
    n_base = len(base.freq_hz)
    # No band limit on the finer run: exactly twice the modes.
    fine = blow(demo, key, [0.5, MF, 6.0], TableSettings(sample_rate_hz=1e7, max_partials=2 * n_base,
                                                        steps=StepSettings(scale=0.5)))
    assert len(fine.freq_hz) == 2 * n_base
    n = min(30, len(base.freq_hz))
    beta = demo.scale.value("strike_ratio", key)
    strong = np.abs(np.sin(np.arange(1, n + 1) * np.pi * beta)) > 0.05
    base_db = levels_db(base.amplitude_n.sum(axis=1)[:, :n])
    diff = levels_db(fine.amplitude_n.sum(axis=1)[:, :n]) - base_db
    audible = strong[None, :] & (base_db > base_db.max(axis=1, keepdims=True) - 90.0)
    assert audible.sum() >= 0.7 * audible.size
    assert np.max(np.abs(diff[audible])) < 0.2


def test_strike_point_null_with_a_narrow_hammer(demo) -> None:
    """At strike ratio 1/8 with a narrow hammer, partial 8 lies at least 20 dB below the
    smooth envelope of its neighbours (common practice; sin(8 pi / 8) = 0)."""
    t = blow(demo, 60, MF, strike_ratio=0.125, hammer_width_mm=1.0)
    lv = levels_db(spectrum(t)[1])
    envelope = (lv[6] + lv[8]) / 2
    assert lv[7] < envelope - 20


def test_wider_hammer_lowers_high_partials(demo) -> None:
    """A wider contact averages the mode shapes, sinc(n w / 2L) (physics.md section 6):
    every partial that this factor lowers by more than 1 dB comes out lower relative to
    the fundamental. (The low partials even rise a little: the wider footprint meets a
    stiffer string and the contact gets slightly shorter.)"""
    key, w_narrow, w_wide = 60, 4.0, 24.0
    narrow = levels_db(spectrum(blow(demo, key, MF, hammer_width_mm=w_narrow))[1])
    wide = levels_db(spectrum(blow(demo, key, MF, hammer_width_mm=w_wide))[1])
    n = np.arange(1, len(narrow) + 1)
    length_mm = demo.scale.value("speaking_length_m", key) * 1e3
    beta = demo.scale.value("strike_ratio", key)
    sinc_db = 20 * np.log10(np.abs(np.sinc(n * w_wide / (2 * length_mm))))
    affected = (sinc_db < -1.0) & (np.abs(np.sin(n * np.pi * beta)) > 0.05) & (n < 2 * length_mm / w_wide)
    assert affected.sum() >= 10
    assert np.all((wide - wide[0])[affected] < (narrow - narrow[0])[affected])


def test_harder_felt_and_faster_blows_are_shorter_and_brighter(demo) -> None:
    """Hall (1986-92), Chaigne & Askenfelt (1994), Askenfelt & Jansson (1990): harder felt
    (larger K) and higher velocity give a shorter contact and a brighter spectrum."""
    key = 60
    f1 = demo.scale.value("felt_force_1mm_n", key)
    soft = blow(demo, key, [1.0, 4.0])
    hard = blow(demo, key, [1.0, 4.0], felt_force_1mm_n=2 * f1)
    assert np.all(hard.contact_s < soft.contact_s)
    assert soft.contact_s[1] < soft.contact_s[0]
    c_soft = [spectral_centroid_hz(*spectrum(soft, j)) for j in (0, 1)]
    c_hard = [spectral_centroid_hz(*spectrum(hard, j)) for j in (0, 1)]
    assert c_hard[0] > c_soft[0] and c_hard[1] > c_soft[1] and c_soft[1] > c_soft[0]


def test_heavier_hammer_gives_longer_contact(demo) -> None:
    # physics.md constant-free assertion 2 (Chaigne & Askenfelt 1994): T_c ~ (M/K)^(1/(p+1)).
    key = 60
    m = demo.scale.value("hammer_mass_g", key)
    assert blow(demo, key, MF, hammer_mass_g=1.5 * m).contact_s[0] > blow(demo, key, MF).contact_s[0]


def test_contact_durations_in_published_ranges(demo) -> None:
    """Askenfelt & Jansson (1990): a few ms in the middle at mf, about 4 ms in the bass and
    under 1 ms in the top treble (physics.md section 3, the last two from memory); from
    pp to ff at C4 the contact shortens by about +-20 %, a ratio of about 1.2-1.6."""
    t = build_tables(demo, keys=[24, 60, 100])
    mf = int(np.argmin(np.abs(t[60].speeds_m_s - MF)))
    assert 1.5e-3 <= t[60].contact_s[mf] <= 4e-3
    assert 3e-3 <= t[24].contact_s[0] <= 5e-3  # soft blow in the low bass
    assert t[100].contact_s[mf] < 1e-3
    assert t[100].contact_s[mf] < t[60].contact_s[mf] < t[24].contact_s[mf]
    assert 1.2 <= t[60].contact_s[0] / t[60].contact_s[-1] <= 1.6


def test_mating_fault_changes_the_unison(demo) -> None:
    """A string sitting 0.3 mm high meets the hammer first and takes more of the blow
    (common practice: an uneven mating is a voicing fault the technician corrects)."""
    even = blow(demo, 60, MF)
    faulty = blow(demo, 60, MF, mating_2_mm=0.3)
    np.testing.assert_allclose(np.abs(even.amplitude_n[0, 0]), np.abs(even.amplitude_n[0, 1]), rtol=1e-9)
    a = np.abs(faulty.amplitude_n[0, :, 0])
    assert a[1] > a[0] and a[1] > a[2]
    np.testing.assert_allclose(a[0], a[2], rtol=1e-9)


def test_velocity_layers_and_map(demo) -> None:
    speeds = layer_speeds()
    assert len(speeds) == 16 and speeds[0] == pytest.approx(0.5) and speeds[-1] == pytest.approx(6.0)
    np.testing.assert_allclose(speeds[1:] / speeds[:-1], (12.0) ** (1 / 15), rtol=1e-12)
    v = hammer_speed(np.arange(1, 128), demo.instrument)
    assert v[0] == pytest.approx(0.5) and v[-1] == pytest.approx(6.0) and np.all(np.diff(v) > 0)


def test_layer_interpolation(demo) -> None:
    """At a layer speed the interpolation returns the layer; between two layers it stays
    within 0.3 dB of a direct simulation at that speed for the first 12 partials and
    within 1.5 dB up to partial 20. (Those weaker partials ripple by a few dB from layer
    to layer, as the dips of the pulse spectrum move with speed; 16 layers sample the
    ripple only coarsely.)"""
    t = build_tables(demo, keys=[60])[60]
    layer = t.amplitude_n[5].sum(axis=0)
    # (Exact strike-point nulls sit at the interpolation floor, 1e-12 of the largest.)
    np.testing.assert_allclose(t.at_speed(float(t.speeds_m_s[5])), layer, rtol=1e-9, atol=1e-10 * np.abs(layer).max())
    mid = float(np.sqrt(t.speeds_m_s[5] * t.speeds_m_s[6]))
    direct = blow(demo, 60, mid)
    beta = demo.scale.value("strike_ratio", 60)
    strong = np.abs(np.sin(np.arange(1, 21) * np.pi * beta)) > 0.05
    diff = np.abs(levels_db(t.at_speed(mid)[:20]) - levels_db(direct.amplitude_n[0].sum(axis=0)[:20]))
    assert np.max(diff[:12][strong[:12]]) < 0.3 and np.max(diff[strong]) < 1.5
    # Beyond the loudest layer the spectrum scales with speed.
    np.testing.assert_allclose(t.at_speed(12.0), 2 * t.at_speed(6.0), rtol=1e-9)


def test_cache_reuses_and_recomputes_only_what_changed(demo) -> None:
    keys = [40, 41, 60]
    first = build_tables(demo, keys=keys)
    assert first.computed == (40, 41, 60) and first.cached == ()
    again = build_tables(demo, keys=keys)
    assert again.computed == () and again.cached == (40, 41, 60)
    np.testing.assert_array_equal(again[60].amplitude_n, first[60].amplitude_n)
    changed = build_tables(demo.with_key_values(41, {"strike_ratio": 0.13}), keys=keys)
    assert changed.computed == (41,)
    assert not np.allclose(changed[41].amplitude_n, first[41].amplitude_n)
    data = demo.to_dict()
    data["instrument"]["a4_hz"] = 442.0
    from voicer.tone.preset import parse_preset

    assert build_tables(parse_preset(data), keys=keys).computed == (40, 41, 60)


def test_unreadable_cache_entry_is_recomputed(demo) -> None:
    build_tables(demo, keys=[60])
    for entry in cache.cache_dir().glob("*.npz"):
        entry.write_bytes(b"not a zip file")
    assert build_tables(demo, keys=[60]).computed == (60,)


def test_full_compass_builds(demo) -> None:
    t = build_tables(demo, use_cache=False)
    assert sorted(t.keys) == list(range(21, 109))
    for table in t.keys.values():
        assert np.all(np.isfinite(table.amplitude_n)) and np.all(table.contact_s > 0)
        assert table.amplitude_n.shape[:2] == (16, int(demo.scale.value("strings", table.key)))


def test_stulov_felt_in_a_preset(demo) -> None:
    """Stulov's hysteretic felt (1995): slower rebound than the elastic felt of the same
    stiffness, a longer contact, and a darker tone."""
    data = demo.to_dict()
    data["instrument"]["felt_law"] = "stulov"
    from voicer.tone.preset import parse_preset

    lossy = parse_preset(data).with_key_values(60, {"felt_hysteresis": 0.4, "felt_relaxation_us": 500.0})
    elastic = blow(demo, 60, MF)
    hyst = blow(lossy, 60, MF)
    assert hyst.rebound_m_s[0] < elastic.rebound_m_s[0]
    assert spectral_centroid_hz(*spectrum(hyst)) < spectral_centroid_hz(*spectrum(elastic))


def test_clamped_ends_build(demo) -> None:
    data = demo.to_dict()
    data["instrument"]["end_condition"] = "clamped"
    from voicer.tone.preset import parse_preset

    t = blow(parse_preset(data), 60, MF)
    pinned = blow(demo, 60, MF)
    # Same blow, slightly different string model: the low partials agree within a few dB.
    diff = levels_db(spectrum(t)[1][:6]) - levels_db(spectrum(pinned)[1][:6])
    assert np.all(np.abs(diff) < 3.0) and t.freq_hz[0] == pytest.approx(pinned.freq_hz[0], rel=1e-4)


def test_engine_only_fields_do_not_invalidate_tables(demo) -> None:
    build_tables(demo, keys=[60])
    changed = demo.with_key_values(60, {"damper_rate_per_s": 40.0})
    assert build_tables(changed, keys=[60]).computed == ()


def test_velocity_curve_and_end_speeds_shape_the_map(demo) -> None:
    # The preset's map: log(speed) linear in ((velocity - 1) / 126)^curve between the end
    # speeds (its definition, tone/params.py); a curve of 2 gives the midpoint velocity 64
    # lo (hi / lo)^(1/4).
    data = demo.to_dict()
    data["instrument"].update({"velocity_curve": 2.0, "speed_at_velocity_1_m_s": 0.3,
                               "speed_at_velocity_127_m_s": 8.0})
    inst = parse_preset(data, source="curve 2").instrument
    v = hammer_speed(np.array([1, 64, 127]), inst)
    np.testing.assert_allclose(v, [0.3, 0.3 * (8.0 / 0.3) ** 0.25, 8.0], rtol=1e-12)
    assert np.all(np.diff(hammer_speed(np.arange(1, 128), inst)) > 0)


def test_a_blow_that_never_releases_names_its_key_and_speed(demo) -> None:
    # The bound: a contact that has not ended within the time given is an error
    # naming the key and the hammer's velocity, never a hang (here a bound far too short).
    with pytest.raises(VoicerError, match=r"key 40 \(E2\) at 2 m/s"):
        simulate_blows(demo, [40], [2.0], max_time_s=1e-4)
