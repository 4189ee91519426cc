"""Preset sections of a fitted preset: [measured.K] (partials of a recorded strike) and
[provenance]: validation messages, round trip, kept through voicing, the stage split."""

from __future__ import annotations

import copy
import datetime
import math
from pathlib import Path

import numpy as np
import pytest
import tomli_w
from scipy import optimize

from voicer.errors import PresetError
from voicer.physics.constants import T60_LN
from voicer.tone.preset import load_preset, parse_preset, preset_to_toml, save_preset
from voicer.tone.tables import TableSettings, build_tables
from voicer.tone.voicing import Change, VoicingPlan, apply_voicing

NAN = math.nan


def measured_60() -> dict:
    """An invented strike of C4: partial 1 has prompt sound and aftersound."""
    return {
        "speed_m_s": 2.4,
        "n": [1, 2, 3, 5],
        "freq_hz": [261.9, 524.1, 786.9, 1314.6],
        "level_db": [-3.0, -9.0, -12.5, -20.0],
        "t60_s": [6.0, 5.0, 4.0, 2.5],
        "after_level_db": [-21.0, NAN, NAN, NAN],
        "after_t60_s": [30.0, NAN, NAN, NAN],
        "fitted": {"felt_force_1mm_n": 110.0, "felt_exponent": 2.6, "strike_ratio": 0.121},
    }


@pytest.fixture
def data(demo) -> dict:
    out = copy.deepcopy(demo.to_dict())
    out["provenance"] = {
        "fitted_at": datetime.datetime(2026, 12, 2, 10, 0, tzinfo=datetime.timezone.utc),
        "base": "kestrel-190",
        "note": [{"key": 60, "file": "takes/060-C4-mf-1.flac", "onset_s": 0.52, "quality": "good"}],
    }
    m40 = measured_60() | {"speed_m_s": 1.1, "fitted": {"felt_force_1mm_n": 60.0}}
    m40["freq_hz"] = [82.5, 165.2, 248.1, 414.9]
    out["measured"] = {"60": measured_60(), "40": m40}
    return out


def write(tmp_path: Path, data: dict, name: str = "client.toml") -> Path:
    path = tmp_path / name
    path.write_text(tomli_w.dumps(data))
    return path


def expect_error(tmp_path: Path, data: dict, key: int | None, field: str | None, *fragments: str) -> PresetError:
    path = write(tmp_path, data)
    with pytest.raises(PresetError) as info:
        load_preset(path)
    err, msg = info.value, str(info.value)
    assert msg.startswith(str(path)), msg
    assert (err.file, err.key, err.field) == (str(path), key, field), msg
    for f in fragments:
        assert f in msg, f"{f!r} not in {msg!r}"
    return err


# --- round trip ----------------------------------------------------------------------

def test_round_trip_keeps_everything(data, tmp_path) -> None:
    """load -> save -> load gives an equal preset, and saving again the same text (nan,
    the TOML 1.0 value, survives tomli-w and tomllib)."""
    first = load_preset(write(tmp_path, data))
    path = save_preset(first, tmp_path / "again.toml")
    second = load_preset(path)
    assert second == first
    assert preset_to_toml(second) == path.read_text()
    m = second.measured[60]
    assert np.isnan(m.after_level_db[1:]).all() and m.after_level_db[0] == -21.0
    assert m.n.dtype.kind == "i" and list(m.n) == [1, 2, 3, 5]
    assert dict(m.fitted) == data["measured"]["60"]["fitted"]
    assert second.provenance == data["provenance"]  # verbatim, the date a date
    assert sorted(second.measured) == [40, 60]


def test_sections_are_optional_and_empty_by_default(demo) -> None:
    assert demo.measured == {} and demo.provenance == {}
    assert "measured" not in demo.to_dict() and "provenance" not in demo.to_dict()
    assert demo.fit_reference is demo


def test_aftersound_arrays_may_be_left_out(data, tmp_path) -> None:
    for name in ("after_level_db", "after_t60_s"):
        del data["measured"]["60"][name]
    m = load_preset(write(tmp_path, data)).measured[60]
    assert not m.two_stage.any() and len(m.after_t60_s) == 4


def test_measured_arrays_are_read_only(data) -> None:
    m = parse_preset(data).measured[60]
    with pytest.raises(ValueError):
        m.level_db[0] = 0.0


# --- carried through voicing -----------------------------------------------------------

def test_apply_voicing_and_with_key_values_keep_the_sections(data) -> None:
    preset = parse_preset(data)
    plan = VoicingPlan(name="harder C4", description="", changes=(Change((60,), "felt_force_1mm_n", "factor", 1.3),))
    voiced = apply_voicing(preset, plan)
    assert voiced.measured == preset.measured and voiced.provenance == preset.provenance
    assert voiced.resolved["felt_force_1mm_n"][60 - 21] == pytest.approx(1.3 * preset.resolved["felt_force_1mm_n"][39])
    changed = preset.with_key_values(61, {"strike_ratio": 0.11})
    assert changed.measured == preset.measured and changed.provenance == preset.provenance


def test_fit_reference_restores_the_fitted_values(data) -> None:
    """Each measured key gets its fitted values; every other key and field is untouched."""
    preset = parse_preset(data)
    ref = preset.fit_reference
    assert ref.measured == {} and ref.provenance == {}
    fitted = {60: data["measured"]["60"]["fitted"], 40: data["measured"]["40"]["fitted"]}
    for name, values in preset.resolved.items():
        expect = values.copy()
        for key, fields in fitted.items():
            if name in fields:
                expect[key - 21] = fields[name]
        np.testing.assert_array_equal(ref.resolved[name], expect, err_msg=name)


def test_measured_data_are_not_in_the_table_cache_key(data, demo) -> None:
    """The physical model ignores the measured sections: its tables come from the cache."""
    settings = TableSettings(layers=2, max_partials=12)
    assert build_tables(demo, settings=settings, keys=[61]).computed == (61,)
    assert build_tables(parse_preset(data), settings=settings, keys=[61]).cached == (61,)


# --- the stages ------------------------------------------------------------------------

def test_entries_split_the_onset_level_between_the_stages(data) -> None:
    m = parse_preset(data).measured[60]
    e = m.entries()
    assert list(e.n) == [1, 1, 2, 3, 5]  # partial 1: prompt entry, then aftersound entry
    np.testing.assert_allclose(e.freq_hz[:2], 261.9, rtol=0)
    # The two amplitudes add up to the onset level; the aftersound's is its own line.
    assert 20 * np.log10(e.amplitude_n[0] + e.amplitude_n[1]) == pytest.approx(-3.0, abs=1e-12)
    assert 20 * np.log10(e.amplitude_n[1]) == pytest.approx(-21.0, abs=1e-12)
    # T60 = ln(1000) / sigma (a 60 dB fall of the amplitude, 20 log10 e^{-sigma T60}).
    np.testing.assert_allclose(e.sigma_per_s, T60_LN / np.array([6.0, 30.0, 5.0, 4.0, 2.5]), rtol=1e-15)


def test_knee_is_where_the_stage_lines_cross(data) -> None:
    """Against a root of a_p e^{-s_p t} - a_a e^{-s_a t} found by scipy.optimize.brentq."""
    m = parse_preset(data).measured[60]
    e = m.entries()
    crossing = optimize.brentq(lambda t: e.amplitude_n[0] * np.exp(-e.sigma_per_s[0] * t)
                               - e.amplitude_n[1] * np.exp(-e.sigma_per_s[1] * t), 0.0, 100.0, xtol=1e-12)
    assert m.knee_s()[0] == pytest.approx(crossing, rel=1e-9)
    assert np.isnan(m.knee_s()[1:]).all()


# --- validation: one error naming file, key, field and the allowed range -------------------

def m60(data: dict) -> dict:
    return data["measured"]["60"]


@pytest.mark.parametrize("edit, key, field, fragments", [
    (lambda d: d["measured"].update({"20": d["measured"].pop("60")}), 20, None, ("measured key 20", "21..108")),
    (lambda d: d["measured"].update({"C4": d["measured"].pop("60")}), None, None, ("'C4' is not a MIDI key",)),
    (lambda d: m60(d).update(colour="warm"), 60, "colour", ("[measured.60]", "unknown field", "after_t60_s, fitted")),
    (lambda d: m60(d).pop("t60_s"), 60, "t60_s", ("is missing", "speed_m_s, n, freq_hz, level_db, t60_s")),
    (lambda d: m60(d).update(speed_m_s=25.0), 60, "speed_m_s", ("25.0", "0.05 <= x <= 20 m/s")),
    (lambda d: m60(d).update(speed_m_s=True), 60, "speed_m_s", ("expected a number",)),
    (lambda d: m60(d).update(n=[1, 3, 2, 5]), 60, "n", ("ascending and unique", "3 is followed by 2")),
    (lambda d: m60(d).update(n=[1, 2, 2, 5]), 60, "n", ("ascending and unique",)),
    (lambda d: m60(d).update(n=[0, 2, 3, 5]), 60, "n", ("entry 1", "1..100000")),
    (lambda d: m60(d).update(n=[1, 2.0, 3, 5]), 60, "n", ("entry 2", "whole number")),
    (lambda d: m60(d).update(n=[]), 60, "n", ("is empty",)),
    (lambda d: m60(d).update(freq_hz=261.9), 60, "freq_hz", ("must be an array",)),
    (lambda d: m60(d).update(freq_hz=[261.9, 524.1, 786.9]), 60, "freq_hz", ("has 3 values but n has 4",)),
    (lambda d: m60(d)["t60_s"].append(1.0), 60, "t60_s", ("has 5 values but n has 4",)),
    (lambda d: m60(d)["after_t60_s"].pop(), 60, "after_t60_s", ("has 3 values but n has 4",)),
    (lambda d: m60(d)["freq_hz"].__setitem__(2, math.inf), 60, "freq_hz", ("partial n = 3", "not a finite number",
                                                                              "0 < x <= 1e+06 Hz")),
    (lambda d: m60(d)["freq_hz"].__setitem__(2, NAN), 60, "freq_hz", ("partial n = 3", "not a finite number")),
    (lambda d: m60(d)["freq_hz"].__setitem__(0, -261.9), 60, "freq_hz", ("partial n = 1", "0 < x")),
    (lambda d: m60(d)["freq_hz"].__setitem__(2, 500.0), 60, "freq_hz", ("partial n = 3", "not above partial n = 2")),
    (lambda d: m60(d)["level_db"].__setitem__(1, NAN), 60, "level_db", ("partial n = 2", "not a finite number",
                                                                          "-200 <= x <= 60 dB re 1 N")),
    (lambda d: m60(d)["level_db"].__setitem__(1, 90.0), 60, "level_db", ("partial n = 2", "-200 <= x <= 60")),
    (lambda d: m60(d)["t60_s"].__setitem__(3, 0.0), 60, "t60_s", ("partial n = 5", "0 < x <= 1000 s")),
    (lambda d: m60(d)["t60_s"].__setitem__(3, 5000.0), 60, "t60_s", ("partial n = 5", "0 < x <= 1000 s")),
    (lambda d: m60(d)["after_t60_s"].__setitem__(0, 6.0), 60, "after_t60_s", ("partial n = 1", "above t60_s = 6.0",
                                                                               "or nan for one stage")),
    (lambda d: m60(d)["after_t60_s"].__setitem__(0, 4.0), 60, "after_t60_s", ("partial n = 1", "above t60_s")),
    (lambda d: m60(d)["after_t60_s"].__setitem__(0, math.inf), 60, "after_t60_s", ("not a finite number",)),
    (lambda d: m60(d)["after_level_db"].__setitem__(0, -3.0), 60, "after_level_db", ("partial n = 1",
                                                                                      "below level_db = -3.0")),
    (lambda d: m60(d)["after_level_db"].__setitem__(2, -30.0), 60, "after_t60_s", ("partial n = 3", "both nan")),
    (lambda d: m60(d)["after_t60_s"].__setitem__(2, 9.0), 60, "after_level_db", ("partial n = 3", "both nan")),
    (lambda d: m60(d).pop("fitted"), 60, "fitted", ("[measured.60.fitted] table",)),
    (lambda d: m60(d).update(fitted={}), 60, "fitted", ("[measured.60.fitted] is empty",)),
    (lambda d: m60(d)["fitted"].update(felt_colour=1.0), 60, "felt_colour", ("[measured.60.fitted]", "unknown field",
                                                                              "strike_ratio")),
    (lambda d: m60(d)["fitted"].update(felt_exponent=7.0), 60, "felt_exponent", ("[measured.60.fitted]", "7.0",
                                                                                  "1 <= x <= 6")),
    # Rules across fields, checked by making the preset the fitted values describe:
    (lambda d: m60(d)["fitted"].update(winding_diameter_mm=2.0), 60, "winding_diameter_mm",
     ("[measured.60.fitted]:", "only wound keys (21..45")),
    (lambda d: d["measured"]["40"]["fitted"].update(mating_3_mm=0.2), 40, "mating_3_mm",
     ("[measured.40.fitted]:", "2 string(s)")),
    (lambda d: d["measured"]["40"]["fitted"].update(winding_mass_g_per_m=60.0), 40, "winding_mass_g_per_m",
     ("[measured.40.fitted]:", "not both")),
    (lambda d: m60(d)["fitted"].update(felt_hysteresis=0.2), 60, "felt_hysteresis",
     ("[measured.60.fitted]:", "felt_law = \"stulov\"")),
    (lambda d: d.update(measured=[1, 2]), None, None, ("[measured] must be a table",)),
    (lambda d: d.update(provenance="yesterday"), None, None, ("[provenance] must be a table",)),
])
def test_measured_section_errors(data, tmp_path, edit, key, field, fragments) -> None:
    edit(data)
    expect_error(tmp_path, data, key, field, *fragments)


@pytest.mark.parametrize("value, path", [
    (None, "provenance.base"),
    ({"takes": [1, object()]}, "provenance.base.takes[1]"),
    ({1: "x"}, "provenance.base"),
])
def test_provenance_holds_toml_values_only(data, value, path) -> None:
    """Only what TOML can hold (data given from Python rather than read from a file)."""
    data["provenance"]["base"] = value
    with pytest.raises(PresetError, match="is not a TOML value|names must be text") as info:
        parse_preset(data, source="client.toml")
    assert info.value.field == path and str(info.value).startswith("client.toml")
