"""Presets: interpolation over anchors, validation messages, atomic saving, round trip."""

from __future__ import annotations

import copy
import os
import re
from pathlib import Path

import numpy as np
import pytest
import tomli_w

from voicer.errors import PresetError
from voicer.io.atomic import backup_path
from voicer.physics.constants import STEEL_DENSITY_KG_M3, STEEL_YOUNGS_MODULUS_PA
from voicer.physics.tuning import tuned_hz
from voicer.tone.params import KEY_PARAMS
from voicer.tone.preset import load_preset, preset_to_toml, save_preset


def write(tmp_path: Path, data: dict, name: str = "piano.toml") -> Path:
    path = tmp_path / name
    path.write_text(tomli_w.dumps(data))
    return path


def anchor(data: dict, key: int) -> dict:
    return next(a for a in data["anchor"] if a["key"] == key)


@pytest.fixture
def data(demo) -> dict:
    return copy.deepcopy(demo.to_dict())


# --- interpolation -----------------------------------------------------------------

def test_anchor_values_are_kept_exactly(demo) -> None:
    v = demo.resolved
    for a in demo.anchors:
        for name, value in a.items():
            if name != "key":
                assert v[name][a["key"] - 21] == value, (a["key"], name)


def test_interpolation_stays_between_anchors(demo) -> None:
    """PCHIP is monotone between data points (Fritsch & Carlson 1980): no overshoot."""
    v = demo.resolved
    for p in KEY_PARAMS:
        pts = [(a["key"], a[p.name]) for a in demo.anchors if p.name in a]
        for (k0, y0), (k1, y1) in zip(pts, pts[1:]):
            seg = v[p.name][k0 - 21:k1 - 21 + 1]
            if p.sectioned and k0 <= demo.instrument["last_wound_key"] < k1:
                continue  # the break: each section is interpolated on its own
            assert np.all(seg >= min(y0, y1) - 1e-12) and np.all(seg <= max(y0, y1) + 1e-12), p.name


def test_unison_count_held_between_anchors(demo) -> None:
    strings = demo.resolved["strings"]
    assert strings[28 - 21] == 1 and strings[29 - 21] == 2 and strings[45 - 21] == 2 and strings[46 - 21] == 3


def test_winding_only_in_the_wound_section(demo) -> None:
    w = demo.resolved["winding_diameter_mm"]
    last = demo.instrument["last_wound_key"]
    assert np.all(np.isfinite(w[: last - 20])) and np.all(np.isnan(w[last - 20:]))


def test_winding_given_as_mass(demo, data, tmp_path) -> None:
    """The same winding given as mass per length gives the same strings at the anchors."""
    wound = [a for a in data["anchor"] if "winding_diameter_mm" in a]
    for a in wound:
        a.pop("winding_diameter_mm")
        a["winding_mass_g_per_m"] = float(demo.scale.winding_mass_kg_per_m[a["key"] - 21] * 1e3)
    s = load_preset(write(tmp_path, data)).scale
    idx = [a["key"] - 21 for a in wound]
    np.testing.assert_allclose(s.tension_n[idx], demo.scale.tension_n[idx], rtol=1e-12)


# --- validation: one clear error naming file, key, field and range ------------------

def expect_error(tmp_path: Path, data: dict, *fragments: str) -> PresetError:
    path = write(tmp_path, data)
    with pytest.raises(PresetError) as info:
        load_preset(path)
    msg = str(info.value)
    assert msg.startswith(str(path)), msg
    for f in fragments:
        assert f in msg, f"{f!r} not in {msg!r}"
    return info.value


def test_unknown_field(data, tmp_path) -> None:
    anchor(data, 60)["hardness"] = 3.0
    err = expect_error(tmp_path, data, "key 60", "field 'hardness'", "unknown field", "strike_ratio")
    assert (err.key, err.field) == (60, "hardness")


def test_wrong_type(data, tmp_path) -> None:
    anchor(data, 60)["strike_ratio"] = "0.125"
    expect_error(tmp_path, data, "key 60", "field 'strike_ratio'", "expected a number", "allowed: 0 < x < 0.5")


def test_bool_is_not_a_number(data, tmp_path) -> None:
    anchor(data, 60)["hammer_mass_g"] = True
    expect_error(tmp_path, data, "field 'hammer_mass_g'", "expected a number")


def test_negative_length(data, tmp_path) -> None:
    anchor(data, 72)["speaking_length_m"] = -0.3
    expect_error(tmp_path, data, "key 72", "field 'speaking_length_m'", "-0.3", "0.02 <= x <= 3 m")


def test_unison_count_four(data, tmp_path) -> None:
    anchor(data, 46)["strings"] = 4
    expect_error(tmp_path, data, "key 46", "field 'strings'", "1..3")


def test_unison_count_must_be_whole(data, tmp_path) -> None:
    anchor(data, 46)["strings"] = 2.5
    expect_error(tmp_path, data, "field 'strings'", "whole number")


@pytest.mark.parametrize("value", [0.0, 0.5, 0.7])
def test_strike_ratio_open_interval(data, tmp_path, value) -> None:
    anchor(data, 60)["strike_ratio"] = value
    expect_error(tmp_path, data, "field 'strike_ratio'", "0 < x < 0.5")


def test_felt_exponent_below_one(data, tmp_path) -> None:
    anchor(data, 60)["felt_exponent"] = 0.9
    expect_error(tmp_path, data, "field 'felt_exponent'", "1 <= x <= 6")


def test_felt_stiffness_must_be_positive(data, tmp_path) -> None:
    anchor(data, 60)["felt_force_1mm_n"] = 0.0
    expect_error(tmp_path, data, "field 'felt_force_1mm_n'", "0 < x")


def test_nonsense_b_is_rejected(data, tmp_path) -> None:
    # A 2.4 mm wire on the 5 cm C8 string: a digit slip, far too stiff to be a piano.
    data["override"] = {"108": {"core_diameter_mm": 2.4}}
    expect_error(tmp_path, data, "key 108", "field 'core_diameter_mm'")


def test_too_stiff_string_states_the_allowed_diameter(demo, data, tmp_path) -> None:
    # A 2.5 mm wire over 3 cm at C8 cannot sound at its pitch at any tension. The largest
    # core for B <= 0.1 there, from Fletcher's B = pi^3 E d^4 / (64 T L^2) with
    # T = 4 mu L^2 f0^2 (plain wire): d = 8 L^2 f1 sqrt(B rho / ((1 + B) E)) / pi.
    data["override"] = {"108": {"core_diameter_mm": 2.5, "speaking_length_m": 0.03}}
    f1 = float(tuned_hz(108, demo.scale.value("stretch_cents", 108)))
    d_max_mm = 8 * 0.03**2 * f1 * np.sqrt(0.1 * STEEL_DENSITY_KG_M3 / (1.1 * STEEL_YOUNGS_MODULUS_PA)) / np.pi * 1e3
    expect_error(tmp_path, data, "key 108", "field 'core_diameter_mm'", "too stiff", f"up to {d_max_mm:.3g} mm")


def test_b_range_message(data, tmp_path) -> None:
    data["override"] = {"108": {"core_diameter_mm": 1.8}}
    expect_error(tmp_path, data, "key 108", "inharmonicity B=", "outside 1e-06..0.1")


def test_string_that_would_break(data, tmp_path) -> None:
    # 0.8 mm wire over 1.2 m at C4 needs about 1560 N; it breaks near 1100 N.
    data["override"] = {"60": {"core_diameter_mm": 0.8, "speaking_length_m": 1.2}}
    expect_error(tmp_path, data, "key 60", "field 'core_diameter_mm'", "would break a 0.8 mm core")


def test_winding_thinner_than_core(data, tmp_path) -> None:
    data["override"] = {"45": {"winding_diameter_mm": 1.0}}
    expect_error(tmp_path, data, "key 45", "field 'winding_diameter_mm'", "must exceed the core")


def test_winding_on_a_plain_key(data, tmp_path) -> None:
    anchor(data, 60)["winding_diameter_mm"] = 2.0
    expect_error(tmp_path, data, "key 60", "only wound keys (21..45")


def test_both_winding_fields(data, tmp_path) -> None:
    anchor(data, 33)["winding_mass_g_per_m"] = 60.0
    expect_error(tmp_path, data, "winding_diameter_mm or as winding_mass_g_per_m, not both")


def test_wound_section_without_winding(data, tmp_path) -> None:
    for a in data["anchor"]:
        a.pop("winding_diameter_mm", None)
    expect_error(tmp_path, data, "keys 21..45 are wound")


def test_missing_required_field(data, tmp_path) -> None:
    for a in data["anchor"]:
        a.pop("hammer_width_mm", None)
    expect_error(tmp_path, data, "field 'hammer_width_mm'", "no anchor", "0.5 <= x <= 50 mm")


def test_sectioned_field_needs_both_sections(data, tmp_path) -> None:
    for a in data["anchor"]:
        if a["key"] > 45:
            a.pop("speaking_length_m", None)
    expect_error(tmp_path, data, "field 'speaking_length_m'", "plain section 46..108")


def test_unknown_table(data, tmp_path) -> None:
    data["hammers"] = {"x": 1}
    expect_error(tmp_path, data, "unknown table or value 'hammers'", "instrument, anchor, override")


def test_unknown_instrument_field(data, tmp_path) -> None:
    data["instrument"]["pitch"] = 442.0
    expect_error(tmp_path, data, "field 'pitch'", "a4_hz")


def test_a4_out_of_range(data, tmp_path) -> None:
    data["instrument"]["a4_hz"] = 4400.0
    expect_error(tmp_path, data, "field 'a4_hz'", "380 <= x <= 480 Hz")


def test_end_condition_choice(data, tmp_path) -> None:
    data["instrument"]["end_condition"] = "free"
    expect_error(tmp_path, data, "field 'end_condition'", "'pinned', 'clamped'")


def test_duplicate_anchor(data, tmp_path) -> None:
    data["anchor"].append({"key": 60, "strike_ratio": 0.12})
    expect_error(tmp_path, data, "key 60", "same key")


def test_anchor_outside_compass(data, tmp_path) -> None:
    data["anchor"].append({"key": 109, "strike_ratio": 0.12})
    expect_error(tmp_path, data, "anchor key 109 is outside the compass 21..108")


def test_anchor_without_key(data, tmp_path) -> None:
    data["anchor"].append({"strike_ratio": 0.12})
    expect_error(tmp_path, data, "needs 'key'")


def test_bad_override_key(data, tmp_path) -> None:
    data["override"] = {"C4": {"strike_ratio": 0.12}}
    expect_error(tmp_path, data, "override key 'C4' is not a MIDI key number")


def test_override_value_checked(data, tmp_path) -> None:
    data["override"] = {"64": {"strings": 0}}
    expect_error(tmp_path, data, "key 64", "field 'strings'", "1..3")


def test_format_version(data, tmp_path) -> None:
    data["format"] = 2
    expect_error(tmp_path, data, "format = 2 is not supported")


def test_invalid_toml(tmp_path) -> None:
    path = tmp_path / "broken.toml"
    path.write_text("[instrument\nname = 1\n")
    with pytest.raises(PresetError, match=re.escape(str(path)) + ": not a valid TOML file"):
        load_preset(path)


def test_missing_file(tmp_path) -> None:
    with pytest.raises(PresetError, match="cannot read the preset"):
        load_preset(tmp_path / "nowhere.toml")


# --- saving ------------------------------------------------------------------------

def test_round_trip_is_identical(demo, tmp_path) -> None:
    first = save_preset(demo, tmp_path / "a.toml")
    again = load_preset(first)
    assert again == demo
    np.testing.assert_array_equal(again.scale.b, demo.scale.b)
    second = save_preset(again, tmp_path / "b.toml")
    assert first.read_bytes() == second.read_bytes()


def test_save_keeps_a_backup(demo, tmp_path) -> None:
    path = tmp_path / "client.toml"
    path.write_text("old content\n")
    save_preset(demo, path)
    assert backup_path(path).read_text() == "old content\n"
    assert load_preset(path) == demo


def test_failed_save_leaves_the_old_file(demo, tmp_path, monkeypatch) -> None:
    path = tmp_path / "client.toml"
    path.write_text("old content\n")

    def broken_replace(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", broken_replace)
    with pytest.raises(OSError, match="No space left"):
        save_preset(demo, path)
    assert path.read_text() == "old content\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["client.toml", "client.toml.bak"]


def test_saved_text_is_readable(demo) -> None:
    text = preset_to_toml(demo)
    assert text.startswith("format = 1\n") and "[[anchor]]\nkey = 21\n" in text


def test_hysteresis_needs_the_stulov_law(data, tmp_path) -> None:
    anchor(data, 60)["felt_hysteresis"] = 0.2
    expect_error(tmp_path, data, "field 'felt_hysteresis'", 'felt_law = "stulov"')
    data["instrument"]["felt_law"] = "stulov"
    assert load_preset(write(tmp_path, data, "ok.toml")).resolved["felt_hysteresis"][60 - 21] == 0.2


def test_mating_of_a_string_the_key_does_not_have(data, tmp_path) -> None:
    data["override"] = {"40": {"mating_3_mm": 0.2}}
    expect_error(tmp_path, data, "key 40", "field 'mating_3_mm'", "2 string(s)")


def test_velocity_map_must_rise(data, tmp_path) -> None:
    data["instrument"]["speed_at_velocity_1_m_s"] = 7.0
    expect_error(tmp_path, data, "field 'speed_at_velocity_1_m_s'", "must be below")
