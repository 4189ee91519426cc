"""Voicing plans: key specs, validation messages, applying changes in order, the bundled plan.

References: MIDI key numbers (MIDI 1.0 specification; common practice: C4 = 60, A4 = 69,
the 88-key piano compass A0..C8 = 21..108). Expected values are computed from the
definitions of the three operations (new = old * factor, old + add, value).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import tomli_w

from voicer.errors import PresetError
from voicer.resources import presets_dir
from voicer.tone.params import KEY_PARAMS
from voicer.tone.preset import Preset
from voicer.tone.voicing import Change, apply_voicing, load_voicing, parse_keys, parse_voicing

BUNDLED_PLAN = presets_dir() / "voicings" / "kestrel-190-mellow.toml"
GOOD = {"keys": 60, "field": "felt_force_1mm_n", "factor": 0.9}  # a harmless change 1
# One multiply or add and its comparison: a couple of ulps of float64.
RTOL_ONE_OP = 1e-15


def write_plan(tmp_path: Path, changes: list[dict[str, Any]], **top: Any) -> Path:
    path = tmp_path / "plan.toml"
    path.write_text(tomli_w.dumps({"format": 1, "name": "test plan", **top, "change": changes}), encoding="utf-8")
    return path


def in_file(path: Path, rest: str) -> str:
    """Regex: the message starts with the plan file, then ``rest`` (a regex)."""
    return "^" + re.escape(str(path)) + ": " + rest


def idx(keys: Any) -> np.ndarray:
    return np.asarray(list(keys)) - 21  # resolved arrays run over keys 21..108


# --- key specs ------------------------------------------------------------------------

@pytest.mark.parametrize("spec, keys", [
    (60, (60,)),
    ("60", (60,)),
    ("52-55", (52, 53, 54, 55)),
    ("21-21", (21,)),
    ([64, 60, 62, 60], (60, 62, 64)),  # a list is a set of keys, sorted
])
def test_parse_keys_forms(spec: Any, keys: tuple[int, ...]) -> None:
    assert parse_keys(spec) == keys


def test_parse_keys_whole_compass() -> None:
    # Common practice: a full piano has 88 keys, MIDI 21 (A0) to 108 (C8).
    keys = parse_keys("21-108")
    assert len(keys) == 88 and keys[0] == 21 and keys[-1] == 108


@pytest.mark.parametrize("spec, message", [
    (20, r"20 is not a MIDI key in 21\.\.108"),
    (109, r"109 is not a MIDI key in 21\.\.108"),
    ("15-30", r"15 is not a MIDI key in 21\.\.108"),
    ("100-110", r"110 is not a MIDI key in 21\.\.108"),
    ([60, 120], r"120 is not a MIDI key in 21\.\.108"),
    (60.0, r"60\.0 is not a MIDI key"),
    (True, r"True is not a MIDI key"),
    (["60"], r"'60' is not a MIDI key"),
    ("67-52", r"range '67-52' runs backwards"),
    ("C4", r"'C4' is not a key range like \"52-67\""),
    ("52-", r"'52-' is not a key range"),
    ("52-60-70", r"'52-60-70' is not a key range"),
])
def test_bad_keys_name_file_and_change(tmp_path: Path, spec: Any, message: str) -> None:
    path = write_plan(tmp_path, [GOOD, {"keys": spec, "field": "strike_ratio", "factor": 1.0}])
    with pytest.raises(PresetError, match=in_file(path, "change 2 keys: " + message)):
        load_voicing(path)


# --- change tables --------------------------------------------------------------------

SR = {"keys": 60, "field": "strike_ratio"}
SR2 = r"field 'strike_ratio': change 2: "  # errors after the field is known also name it


@pytest.mark.parametrize("change, message", [
    (SR, SR2 + r"give exactly one of factor, add, value \(got none\)"),
    ({**SR, "factor": 1.0, "add": 0.01}, SR2 + r"give exactly one of factor, add, value \(got factor, add\)"),
    ({**SR, "factor": 1.0, "add": 0.0, "value": 0.12}, SR2 + r"give exactly one of .*\(got factor, add, value\)"),
    ({**SR, "factor": 1.0, "key": 61}, r"change 2: unknown entry 'key'; allowed: keys, field"),
    ({"keys": 60, "field": "hammer_hardness", "factor": 1.0}, r"change 2: field 'hammer_hardness' is not a per-key"),
    ({"keys": 60, "field": "a4_hz", "add": 1.0}, r"change 2: field 'a4_hz' is not a per-key number"),  # [instrument]
    ({"keys": 60, "field": "strings", "value": 2}, r"change 2: field 'strings' is not a per-key number"),  # integer
    ({"keys": 60, "factor": 1.0}, r"change 2: field None is not a per-key number"),
    ({**SR, "factor": "0.9"}, SR2 + r"factor = '0\.9' is not a number"),
    ({**SR, "add": True}, SR2 + r"add = True is not a number"),
    ({**SR, "value": [0.1]}, SR2 + r"value = \[0\.1\] is not a number"),
    ({**SR, "factor": 0}, SR2 + r"factor = 0 must be > 0"),
    ({**SR, "factor": -0.5}, SR2 + r"factor = -0\.5 must be > 0"),
    ({**SR, "factor": float("nan")}, SR2 + r"factor = nan must be > 0"),
    ({"field": "strike_ratio", "factor": 0.9}, SR2 + r"'keys' is missing"),
])
def test_bad_change_names_file_and_change(tmp_path: Path, change: dict[str, Any], message: str) -> None:
    path = write_plan(tmp_path, [GOOD, change])
    with pytest.raises(PresetError, match=in_file(path, message)):
        load_voicing(path)


def test_unknown_field_message_lists_the_per_key_numbers(tmp_path: Path) -> None:
    path = write_plan(tmp_path, [{"keys": 60, "field": "felt", "factor": 1.0}])
    with pytest.raises(PresetError) as info:
        load_voicing(path)
    listed = str(info.value).split("per-key fields: ", 1)[1].split(", ")
    assert listed == [p.name for p in KEY_PARAMS if p.kind == "float"]


@pytest.mark.parametrize("data, message", [
    ({"format": 1, "changes": []}, r"unknown table or value 'changes'; allowed: format, name, description, change"),
    ({"format": 3}, r"format = 3 is not supported; this voicer reads format = 1 or 2"),  # 2: test_voicing_ops.py
    ({"format": 1, "name": 3}, r"name and description must be text"),
    ({"format": 1, "change": {"keys": 60, "field": "strike_ratio", "factor": 1.0}},
     r"\[\[change\]\] must be an array of tables"),
    ({"format": 1, "change": [60]}, r"change 1 must be a table"),
])
def test_bad_plan_top_level(data: dict[str, Any], message: str) -> None:
    with pytest.raises(PresetError, match="^plan.toml: " + message):
        parse_voicing(data, source="plan.toml")


def test_format_true_is_rejected() -> None:
    # The preset loader rejects format = true (a TOML boolean is not the number 1; preset.py
    # checks isinstance(fmt, bool)), so a plan must too.
    with pytest.raises(PresetError, match=r"^plan.toml: format = True is not supported"):
        parse_voicing({"format": True}, source="plan.toml")
        pytest.fail("BUG voicing.py:88: format = true is accepted as format 1 (True == 1 in Python); "
                    "the preset loader rejects it")


def test_unreadable_and_invalid_files(tmp_path: Path) -> None:
    missing = tmp_path / "nope.toml"
    with pytest.raises(PresetError, match=in_file(missing, "cannot read the voicing plan")):
        load_voicing(missing)
    bad = tmp_path / "bad.toml"
    bad.write_text("[[change]\nkeys = 60\n", encoding="utf-8")
    with pytest.raises(PresetError, match=in_file(bad, "not a valid TOML file")):
        load_voicing(bad)


def test_parsed_plan(tmp_path: Path) -> None:
    path = write_plan(tmp_path, [{"keys": "60-62", "field": "hammer_mass_g", "add": 1},
                                 {"keys": [70], "field": "strike_ratio", "value": 0.12}], description="d")
    plan = load_voicing(path)
    assert (plan.name, plan.description, plan.source) == ("test plan", "d", str(path))
    assert plan.changes == (Change((60, 61, 62), "hammer_mass_g", "add", 1.0),
                            Change((70,), "strike_ratio", "value", 0.12))
    assert isinstance(plan.changes[0].amount, float)  # an integer amount in TOML is still a number


# --- applying ---------------------------------------------------------------------------

def plan_of(tmp_path: Path, *changes: dict[str, Any]):
    return load_voicing(write_plan(tmp_path, list(changes)))


def assert_only(voiced: Preset, demo: Preset, field: str, keys: Any, expected: np.ndarray) -> None:
    """``field`` takes ``expected`` on ``keys``; every other key and field is as in ``demo``."""
    listed = idx(keys)
    np.testing.assert_allclose(voiced.resolved[field][listed], expected, rtol=RTOL_ONE_OP)
    others = np.setdiff1d(np.arange(88), listed)
    np.testing.assert_array_equal(voiced.resolved[field][others], demo.resolved[field][others])
    for name, values in demo.resolved.items():
        if name != field:
            np.testing.assert_array_equal(voiced.resolved[name], values, err_msg=name)


@pytest.mark.parametrize("op, amount, expect", [
    ("factor", 0.8, lambda old: old * 0.8),
    ("add", -12.5, lambda old: old - 12.5),
    ("value", 150.0, lambda old: np.full_like(old, 150.0)),
])
def test_each_op_on_exactly_the_listed_keys(tmp_path: Path, demo: Preset, op: str, amount: float, expect) -> None:
    keys = (40, 41, 42, 60, 77)  # across the break (last wound key 45) and up the middle
    voiced = apply_voicing(demo, plan_of(tmp_path, {"keys": list(keys), "field": "felt_force_1mm_n", op: amount}))
    assert_only(voiced, demo, "felt_force_1mm_n", keys, expect(demo.resolved["felt_force_1mm_n"][idx(keys)]))


def test_apply_leaves_the_input_preset_alone(tmp_path: Path, demo: Preset) -> None:
    before = {k: v.copy() for k, v in demo.resolved.items()}
    apply_voicing(demo, plan_of(tmp_path, {"keys": "52-81", "field": "strike_ratio", "value": 0.11}))
    assert not demo.overrides
    for name, values in before.items():
        np.testing.assert_array_equal(demo.resolved[name], values, err_msg=name)


def test_changes_apply_in_order_and_compose(tmp_path: Path, demo: Preset) -> None:
    old = demo.resolved["felt_force_1mm_n"]
    a = {"keys": "60-64", "field": "felt_force_1mm_n", "factor": 2.0}
    b = {"keys": "62-66", "field": "felt_force_1mm_n", "add": 10.0}
    keys = range(60, 67)
    x = old[idx(keys)]
    a_then_b = np.array([2 * x[0], 2 * x[1], 2 * x[2] + 10, 2 * x[3] + 10, 2 * x[4] + 10, x[5] + 10, x[6] + 10])
    b_then_a = np.array([2 * x[0], 2 * x[1], 2 * (x[2] + 10), 2 * (x[3] + 10), 2 * (x[4] + 10), x[5] + 10, x[6] + 10])
    assert_only(apply_voicing(demo, plan_of(tmp_path, a, b)), demo, "felt_force_1mm_n", keys, a_then_b)
    assert_only(apply_voicing(demo, plan_of(tmp_path, b, a)), demo, "felt_force_1mm_n", keys, b_then_a)
    # Applying two plans one after the other is the same as one plan with both changes.
    twice = apply_voicing(apply_voicing(demo, plan_of(tmp_path, a)), plan_of(tmp_path, b))
    np.testing.assert_allclose(twice.resolved["felt_force_1mm_n"][idx(keys)], a_then_b, rtol=RTOL_ONE_OP)


def test_value_then_factor(tmp_path: Path, demo: Preset) -> None:
    voiced = apply_voicing(demo, plan_of(tmp_path, {"keys": 60, "field": "hammer_mass_g", "value": 9.0},
                                         {"keys": 60, "field": "hammer_mass_g", "factor": 0.5}))
    assert_only(voiced, demo, "hammer_mass_g", [60], np.array([4.5]))


def test_empty_plan_changes_nothing(demo: Preset) -> None:
    assert apply_voicing(demo, parse_voicing({"format": 1})) == demo


def test_out_of_range_result_is_an_error_not_a_clamp(tmp_path: Path, demo: Preset) -> None:
    # strike_ratio is 0 < x < 0.5; the demo has ~0.125 in the middle, so factor 10 gives ~1.25 on every
    # listed key: any one of them may be the one reported, but it must be named.
    path = write_plan(tmp_path, [GOOD, {"keys": "58-62", "field": "strike_ratio", "factor": 10}])
    message = (r"key (\d+): field 'strike_ratio': change 2 \(factor 10\) gives 1\.2\d* "
               r"is outside the allowed range 0 < x < 0\.5")
    with pytest.raises(PresetError, match=in_file(path, message)) as info:
        apply_voicing(demo, load_voicing(path))
    assert (info.value.file, info.value.field) == (str(path), "strike_ratio")
    assert info.value.key in range(58, 63) and f"key {info.value.key}:" in str(info.value)


def test_out_of_range_names_the_key_that_fails(tmp_path: Path, demo: Preset) -> None:
    # Demo strike ratios (resolved): A0 0.118, C4 0.125, E7 0.078; times 4.02 only C4 reaches 0.5.
    path = write_plan(tmp_path, [{"keys": [21, 60, 100], "field": "strike_ratio", "factor": 4.02}])
    with pytest.raises(PresetError, match=in_file(path, r"key 60: field 'strike_ratio': change 1 \(factor 4\.02\) "
                                                      r"gives 0\.5025 is outside the allowed range")):
        apply_voicing(demo, load_voicing(path))


def test_add_below_the_range_is_an_error(tmp_path: Path, demo: Preset) -> None:
    # felt_force_1mm_n must be > 0; the demo's C4 felt is 140 N, so -1000 N goes below.
    path = write_plan(tmp_path, [{"keys": [60], "field": "felt_force_1mm_n", "add": -1000}])
    with pytest.raises(PresetError, match=in_file(path, r"key 60: field 'felt_force_1mm_n': change 1 \(add -1000\) "
                                                      r"gives -860.* is outside the allowed range 0 < x")):
        apply_voicing(demo, load_voicing(path))


# --- the bundled plan -------------------------------------------------------------------

def test_bundled_plan_loads(demo: Preset) -> None:
    plan = load_voicing(BUNDLED_PLAN)
    assert plan.name and plan.description
    # MIDI key numbers (common practice, C4 = 60): E3 = 52, A5 = 81, C6 = 84, C8 = 108.
    assert plan.changes == (Change(tuple(range(52, 82)), "felt_force_1mm_n", "factor", 0.85),
                            Change(tuple(range(84, 109)), "felt_force_1mm_n", "factor", 0.92))


def test_bundled_plan_softens_the_felt(demo: Preset) -> None:
    voiced = apply_voicing(demo, load_voicing(BUNDLED_PLAN))
    ratio = voiced.resolved["felt_force_1mm_n"] / demo.resolved["felt_force_1mm_n"]
    # The plan's description: E3-A5 felt softer by 15 %, C6-C8 by 8 %; the rest untouched.
    np.testing.assert_allclose(ratio[idx(range(52, 82))], 0.85, rtol=RTOL_ONE_OP)
    np.testing.assert_allclose(ratio[idx(range(84, 109))], 0.92, rtol=RTOL_ONE_OP)
    untouched = idx([*range(21, 52), 82, 83])
    np.testing.assert_array_equal(ratio[untouched], 1.0)
    for name, values in demo.resolved.items():
        if name != "felt_force_1mm_n":
            np.testing.assert_array_equal(voiced.resolved[name], values, err_msg=name)
