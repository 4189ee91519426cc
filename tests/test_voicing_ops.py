"""Voicing operations in trade terms (format-2 plans): schema errors with file and line,
the mapping table, what each operation does to the predicted tone, reversing and
composing plans, the bundled recital plan.

Sources: trade directions are common practice (needling softens and darkens, hardener
brightens; near the crown it mostly changes soft playing, at the shoulders loud playing;
physics.md section 8). The strike-point nulls are Mode n ~ sin(n pi beta) (physics.md
section 6; Chaigne & Askenfelt 1994). A lighter hammer shortens the contact:
T_c ~ (M/K)^(1/(p+1)) (physics.md, constant-free hammer assertion 2). MIDI keys:
21..108 (MIDI 1.0; common practice). Brightness is the power-weighted spectral centroid
over the first partial's frequency and loudness the loudness level in phon of ISO 532-1
(Zwicker; voicer.report.loudness, checked against MoSQITo in test_loudness.py), as the
evenness report measures them, from blows at 1.0 m/s (pp) and 5.0 m/s (ff) (Russell &
Rossing 1998: 1-6 m/s span the dynamic range).
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import tomli_w

import voicer
from voicer.errors import PresetError
from voicer.report.loudness import partials_loudness_phon
from voicer.report.spectrum import levels_db, spectral_centroid_hz
from voicer.resources import presets_dir
from voicer.tone import voicing as voicing_module
from voicer.tone.preset import Preset, parse_preset
from voicer.tone.tables import simulate_blows, simulate_variants
from voicer.tone.voicing import (COMPRESSION_ANCHORS_MM, OPERATIONS, SPILL, Change, Operation, VoicedPreset,
                                 VoicingPlan, apply_voicing, compose, compression_points_mm, load_voicing,
                                 operations_markdown, parse_voicing, plan_to_toml, reverse_plan)

RECITAL = presets_dir() / "voicings" / "kestrel-190-recital.toml"
README = Path(__file__).resolve().parent.parent / "README.md"
PP, FF = 1.0, 5.0  # hammer speeds, m/s
# A float64 expression of a few operations (log, exp, pow) and its inverse: well within 1e-13 relative.
RTOL_ROUND_TRIP = 1e-13
SPEC = {s.name: s for s in OPERATIONS}


def op(name: str, keys: Any, **amounts: Any) -> Operation:
    """An operation as the parser builds it: every amount of its spec, defaults filled in."""
    full = {p.name: amounts.get(p.name, p.default) for p in SPEC[name].amounts}
    keys = (keys,) if isinstance(keys, int) else tuple(keys)
    return Operation(name, keys, full)


def plan(*steps: Change | Operation, name: str = "test") -> VoicingPlan:
    return VoicingPlan(name=name, description="", changes=tuple(steps))


def write(tmp_path: Path, tables: list[tuple[str, dict[str, Any]]], fmt: int = 2) -> tuple[Path, list[int]]:
    """A plan file with a comment header and one ``[[kind]]`` block per table, written line
    by line; returns the path and the line number of each block's header."""
    lines = [f"format = {fmt}", 'name = "test plan"', "", "# a comment line", ""]
    headers = []
    for kind, table in tables:
        lines.append(f"[[{kind}]]")
        headers.append(len(lines))
        lines += tomli_w.dumps(table).strip().splitlines()
        lines.append("")
    path = tmp_path / "plan.toml"
    path.write_text("\n".join(lines), encoding="utf-8")
    return path, headers


def in_file(path: Path, rest: str) -> str:
    return "^" + re.escape(str(path)) + ": " + rest


NEEDLE = {"op": "needle", "keys": "52-60", "amount_percent": 10, "where": "crown"}


# --- reading: every operation, and clear errors naming file and line --------------------------

def test_every_operation_parses(tmp_path: Path) -> None:
    path, _ = write(tmp_path, [
        ("operation", NEEDLE),
        ("change", {"keys": 60, "field": "hammer_mass_g", "add": 0.1}),
        ("operation", {"op": "harden", "keys": [47, 48], "amount_percent": 12.5, "where": "throughout"}),
        ("operation", {"op": "file", "keys": 52, "mass_g": 0.2}),
        ("operation", {"op": "strike_point", "keys": "97-108", "move_mm": 0.5, "toward": "near_end"}),
        ("operation", {"op": "mating", "keys": 58, "string": 3, "move_mm": -0.15}),
    ])
    got = load_voicing(path).changes
    assert got == (op("needle", range(52, 61), amount_percent=10.0, where="crown"),
                   Change((60,), "hammer_mass_g", "add", 0.1),  # file order: between the operations
                   op("harden", (47, 48), amount_percent=12.5, where="throughout"),
                   op("file", 52, mass_g=0.2, width_mm=0.0),  # width_mm defaults to 0
                   op("strike_point", range(97, 109), move_mm=0.5, toward="near_end"),
                   op("mating", 58, string=3, move_mm=-0.15))
    assert isinstance(got[0].amounts["amount_percent"], float)  # TOML 10 is the number 10.0


def test_tables_apply_in_file_order(tmp_path: Path) -> None:
    path, _ = write(tmp_path, [("change", {"keys": 60, "field": "strike_ratio", "value": 0.12}),
                               ("operation", {"op": "strike_point", "keys": 60, "move_mm": 1.0, "toward": "bridge"}),
                               ("change", {"keys": 60, "field": "strike_ratio", "add": 0.001})])
    assert [type(s).__name__ for s in load_voicing(path).changes] == ["Change", "Operation", "Change"]


@pytest.mark.parametrize("table, message", [
    ({**NEEDLE, "op": "steam"}, r"operation 2 \(line L\): op = 'steam' is not an operation; allowed: needle, "
                                r"harden, file, strike_point, mating"),
    ({k: v for k, v in NEEDLE.items() if k != "op"}, r"operation 2 \(line L\): 'op' is missing; allowed: needle"),
    ({**NEEDLE, "amount": 10}, r"operation 2 \(line L\) needle: unknown entry 'amount'; allowed: op, keys, "
                               r"amount_percent, where"),
    ({**NEEDLE, "keys": "100-110"}, r"operation 2 \(line L\) keys: 110 is not a MIDI key in 21\.\.108"),
    ({**NEEDLE, "keys": 20}, r"operation 2 \(line L\) keys: 20 is not a MIDI key in 21\.\.108"),
    ({k: v for k, v in NEEDLE.items() if k != "keys"}, r"operation 2 \(line L\) needle: 'keys' is missing"),
    ({**NEEDLE, "amount_percent": 31}, r"field 'amount_percent': operation 2 \(line L\) needle: 31\.0 is outside "
                                       r"the allowed range 0 < x <= 30 %"),
    ({**NEEDLE, "amount_percent": 0}, r"field 'amount_percent': .*needle: 0\.0 is outside the allowed range"),
    ({**NEEDLE, "op": "harden", "amount_percent": -5}, r"field 'amount_percent': .*harden: -5\.0 is outside"),
    ({**NEEDLE, "amount_percent": "10"}, r"field 'amount_percent': .*expected a number \(float\), got str"),
    ({**NEEDLE, "where": "hammer"}, r"field 'where': .*'hammer' is not allowed; allowed: one of 'crown', "
                                    r"'shoulders', 'throughout'"),
    ({k: v for k, v in NEEDLE.items() if k != "where"}, r"field 'where': operation 2 \(line L\) needle: 'where' "
                                                         r"is missing"),
    ({"op": "file", "keys": 60, "mass_g": 1.2}, r"field 'mass_g': .*file: 1\.2 is outside the allowed range "
                                                r"0 <= x <= 1 g"),
    ({"op": "file", "keys": 60, "width_mm": 0.5}, r"field 'width_mm': .*0\.5 is outside the allowed range "
                                                  r"-3 <= x <= 0 mm"),
    ({"op": "file", "keys": 60, "width_mm": -3.5}, r"field 'width_mm': .*-3\.5 is outside"),
    ({"op": "file", "keys": 60}, r"operation 2 \(line L\) file: removes nothing"),
    ({"op": "strike_point", "keys": 60, "move_mm": 6, "toward": "bridge"},
     r"field 'move_mm': .*strike_point: 6\.0 is outside the allowed range 0 < x <= 5 mm"),
    ({"op": "strike_point", "keys": 60, "move_mm": 0, "toward": "bridge"}, r"field 'move_mm': .*0\.0 is outside"),
    ({"op": "strike_point", "keys": 60, "move_mm": 1, "toward": "agraffe"},
     r"field 'toward': .*'agraffe' is not allowed; allowed: one of 'near_end', 'bridge'"),
    ({"op": "mating", "keys": 60, "string": 4, "move_mm": 0.1}, r"field 'string': .*mating: 4 is outside the "
                                                                r"allowed range 1\.\.3"),
    ({"op": "mating", "keys": 60, "string": 1.0, "move_mm": 0.1}, r"field 'string': .*expected a whole number"),
    ({"op": "mating", "keys": 60, "string": 1, "move_mm": 1.5}, r"field 'move_mm': .*1\.5 is outside the allowed "
                                                                r"range -1 <= x <= 1 mm"),
])
def test_bad_operation_names_file_line_and_range(tmp_path: Path, table: dict[str, Any], message: str) -> None:
    path, headers = write(tmp_path, [("operation", NEEDLE), ("change", {"keys": 60, "field": "strike_ratio",
                                                                        "factor": 1.0}), ("operation", table)])
    with pytest.raises(PresetError, match=in_file(path, message.replace("line L", f"line {headers[2]}"))):
        load_voicing(path)


def test_error_in_an_inline_array_names_index_and_line(tmp_path: Path) -> None:
    path = tmp_path / "inline.toml"
    path.write_text('format = 2\n\n# two operations written inline\noperation = [\n'
                    '  { op = "needle", keys = 60, amount_percent = 5, where = "crown" },\n'
                    '  { op = "needle", keys = 61, amount_percent = 50, where = "crown" },\n]\n', encoding="utf-8")
    with pytest.raises(PresetError, match=in_file(path, r"field 'amount_percent': operation 2 \(in the array at "
                                                        r"line 4\) needle: 50\.0 is outside")):
        load_voicing(path)


def test_without_the_text_an_error_names_the_index() -> None:
    with pytest.raises(PresetError, match=r"^p\.toml: field 'amount_percent': operation 1 needle: 40\.0 is outside"):
        parse_voicing({"format": 2, "operation": [{**NEEDLE, "amount_percent": 40}]}, source="p.toml")


@pytest.mark.parametrize("data, message", [
    ({"format": 1, "operation": [NEEDLE]}, r"\[\[operation\]\] tables need format = 2 \(this plan says format = 1\)"),
    ({"operation": [NEEDLE]}, r"\[\[operation\]\] tables need format = 2"),  # format defaults to 1
    ({"format": 3}, r"format = 3 is not supported; this voicer reads format = 1 or 2"),
    ({"format": 2, "operations": []}, r"unknown table or value 'operations'; allowed: format, name, description, "
                                      r"change, operation"),
    ({"format": 2, "operation": NEEDLE}, r"\[\[operation\]\] must be an array of tables"),
    ({"format": 2, "operation": [60]}, r"operation 1 must be a table"),
])
def test_bad_format_2_plan_top_level(data: dict[str, Any], message: str) -> None:
    with pytest.raises(PresetError, match="^plan.toml: " + message):
        parse_voicing(data, source="plan.toml")


# --- applying: the mapping table ---------------------------------------------------------

def test_compression_points_are_the_demos_pp_and_ff_blows(demo: Preset) -> None:
    # The documented c_s, c_l must be what the simulation gives: the peak total felt force
    # of blows at 1 and 5 m/s as compression (F / F1)^(1/p), at every key.
    keys = range(21, 109)
    blows = simulate_blows(demo, keys, [PP, FF])
    for key in keys:
        f1, p = demo.resolved["felt_force_1mm_n"][key - 21], demo.resolved["felt_exponent"][key - 21]
        measured = (blows.tables[key].peak_force_n / f1) ** (1.0 / p)
        # The module notes claim 2.5 % (anchors rounded to 2-3 digits, log-linear between them).
        np.testing.assert_allclose(compression_points_mm(key), measured, rtol=0.025, err_msg=f"key {key}")
    assert [k for k, _, _ in COMPRESSION_ANCHORS_MM] == sorted(k for k, _, _ in COMPRESSION_ANCHORS_MM)


@pytest.mark.parametrize("name", ["needle", "harden"])
@pytest.mark.parametrize("where", ["crown", "shoulders", "throughout"])
def test_felt_forces_change_at_the_two_compressions(demo: Preset, name: str, where: str) -> None:
    keys = (33, 60, 90)
    voiced = apply_voicing(demo, plan(op(name, keys, amount_percent=20.0, where=where)))
    g = 0.8 if name == "needle" else 1.2
    g_s, g_l = {"crown": (g, g ** SPILL["crown"]), "shoulders": (g ** SPILL["shoulders"], g),
                "throughout": (g, g)}[where]
    for key in keys:
        i = key - 21

        def force(preset: Preset, c_mm: float) -> float:  # F = F1 (c / 1 mm)^p
            return preset.resolved["felt_force_1mm_n"][i] * c_mm ** preset.resolved["felt_exponent"][i]

        c_s, c_l = compression_points_mm(key)
        assert force(voiced, c_s) == pytest.approx(g_s * force(demo, c_s), rel=1e-12)
        assert force(voiced, c_l) == pytest.approx(g_l * force(demo, c_l), rel=1e-12)
    if where == "throughout":  # a plain factor on F1, the exponent untouched
        np.testing.assert_array_equal(voiced.resolved["felt_exponent"], demo.resolved["felt_exponent"])
    changed = {n for n in demo.resolved if not np.array_equal(voiced.resolved[n], demo.resolved[n], equal_nan=True)}
    assert changed == ({"felt_force_1mm_n"} if where == "throughout" else {"felt_force_1mm_n", "felt_exponent"})
    untouched = np.setdiff1d(np.arange(88), np.asarray(keys) - 21)
    np.testing.assert_array_equal(voiced.resolved["felt_force_1mm_n"][untouched],
                                  demo.resolved["felt_force_1mm_n"][untouched])


def test_file_strike_point_and_mating_map_to_their_fields(demo: Preset) -> None:
    v = demo.resolved
    voiced = apply_voicing(demo, plan(op("file", (52, 53), mass_g=0.25, width_mm=-1.5),
                                      op("strike_point", (60, 100), move_mm=2.0, toward="near_end"),
                                      op("strike_point", 40, move_mm=3.0, toward="bridge"),
                                      op("mating", (58, 59), string=3, move_mm=0.2)))
    r = voiced.resolved
    np.testing.assert_allclose(r["hammer_mass_g"][[31, 32]], v["hammer_mass_g"][[31, 32]] - 0.25, rtol=1e-15)
    np.testing.assert_allclose(r["hammer_width_mm"][[31, 32]], v["hammer_width_mm"][[31, 32]] - 1.5, rtol=1e-15)
    # strike ratio is a fraction of the speaking length: the move in mm over the length in mm
    moved_mm = (r["strike_ratio"] - v["strike_ratio"]) * v["speaking_length_m"] * 1e3
    np.testing.assert_allclose(moved_mm[[60 - 21, 40 - 21, 100 - 21]], [-2.0, 3.0, -2.0], rtol=1e-12)
    np.testing.assert_array_equal(r["mating_3_mm"][[37, 38]], [0.2, 0.2])
    for name in r:
        others = {"hammer_mass_g": [31, 32], "hammer_width_mm": [31, 32], "strike_ratio": [39, 19, 79],
                  "mating_3_mm": [37, 38]}.get(name, [])
        rest = np.setdiff1d(np.arange(88), others)
        np.testing.assert_array_equal(r[name][rest], v[name][rest], err_msg=name)


@pytest.mark.parametrize("key, string, strings", [(40, 3, 2), (29, 3, 2), (24, 2, 1), (21, 3, 1)])
def test_mating_a_string_the_key_does_not_have(tmp_path: Path, demo: Preset, key: int, string: int,
                                               strings: int) -> None:
    # Demo unisons (README): single strings to E1 (28), bichords F1-A2 (29-45).
    path, headers = write(tmp_path, [("operation", NEEDLE),
                                     ("operation", {"op": "mating", "keys": [key, 60], "string": string,
                                                    "move_mm": 0.1})])
    with pytest.raises(PresetError, match=in_file(path, rf"key {key}: field 'mating_{string}_mm': operation 2 "
                                                        rf"\(line {headers[1]}\): mating string {string}: this key "
                                                        rf"has {strings} string\(s\), so there is no string {string}")):
        apply_voicing(demo, load_voicing(path))


def test_out_of_range_result_names_file_line_and_key(tmp_path: Path, demo: Preset) -> None:
    # C8: strike ratio 0.065 of 50 mm = 3.25 mm from the near end; 3.5 mm closer is past it.
    path, headers = write(tmp_path, [("operation", {"op": "strike_point", "keys": 108, "move_mm": 3.5,
                                                    "toward": "near_end"})])
    with pytest.raises(PresetError, match=in_file(path, rf"key 108: field 'strike_ratio': operation 1 \(line "
                                                        rf"{headers[0]}\): strike point 3\.5 mm toward the near end "
                                                        r"gives -0\.00\d+ is outside the allowed range 0 < x < 0\.5")):
        apply_voicing(demo, load_voicing(path))


# --- what the operations do to the tone ---------------------------------------------------

def tone(table) -> tuple[np.ndarray, np.ndarray]:
    """Brightness (centroid in harmonics) and loudness (phon) at each speed of a key table."""
    total = table.amplitude_n.sum(axis=1)  # the unison's strings together on the bridge
    bright = np.array([spectral_centroid_hz(table.freq_hz, a) / table.freq_hz[0] for a in total])
    return bright, partials_loudness_phon(table.freq_hz, total)


# Bass (A1, bichord), middle (C4) and treble (E5). Above about G5 the tone is nearly one
# partial (centroid within 1-3 % of the first) and its centroid follows the dips of the
# hammer's force spectrum, not the felt (voicer.report.evenness says the same).
FELT_KEYS = (33, 60, 76)


@pytest.fixture(scope="module")
def felt_tones(demo: Preset) -> dict[tuple[int, str, str], tuple[np.ndarray, np.ndarray]]:
    """(key, op, where) -> relative brightness change and loudness change in dB at (pp, ff),
    for needling and hardening by 20 %."""
    cases = [(k, "base", "") for k in FELT_KEYS]
    cases += [(k, name, where) for k in FELT_KEYS for name in ("needle", "harden")
              for where in ("crown", "shoulders", "throughout")]
    presets = [demo if name == "base" else apply_voicing(demo, plan(op(name, k, amount_percent=20.0, where=where)))
               for k, name, where in cases]
    tables = simulate_variants([(p, k) for p, (k, _, _) in zip(presets, cases)], [PP, FF])
    tones = {case: tone(t) for case, t in zip(cases, tables)}
    out = {}
    for (k, name, where), (bright, loud) in tones.items():
        b0, l0 = tones[(k, "base", "")]
        out[(k, name, where)] = (bright / b0 - 1.0, loud - l0)
    return out


@pytest.mark.parametrize("key", FELT_KEYS)
def test_needling_darkens_where_it_acts(felt_tones, key: int) -> None:
    # Common practice: needling lowers brightness; at the shoulders mostly at ff, at the
    # crown mostly at pp; throughout at both.
    (crown_pp, crown_ff), (sh_pp, sh_ff), (th_pp, th_ff) = (felt_tones[(key, "needle", w)][0]
                                                            for w in ("crown", "shoulders", "throughout"))
    assert sh_ff < sh_pp < 0, f"shoulders: brightness change pp {sh_pp:+.2%}, ff {sh_ff:+.2%}"
    assert crown_pp < crown_ff < 0, f"crown: brightness change pp {crown_pp:+.2%}, ff {crown_ff:+.2%}"
    assert th_pp < 0 and th_ff < 0


@pytest.mark.parametrize("key", FELT_KEYS)
def test_hardening_brightens_where_it_acts(felt_tones, key: int) -> None:
    # Common practice: hardener raises brightness, the reverse of needling.
    (crown_pp, crown_ff), (sh_pp, sh_ff), (th_pp, th_ff) = (felt_tones[(key, "harden", w)][0]
                                                            for w in ("crown", "shoulders", "throughout"))
    assert sh_ff > sh_pp > 0, f"shoulders: brightness change pp {sh_pp:+.2%}, ff {sh_ff:+.2%}"
    assert crown_pp > crown_ff > 0, f"crown: brightness change pp {crown_pp:+.2%}, ff {crown_ff:+.2%}"
    assert th_pp > 0 and th_ff > 0


@pytest.mark.parametrize("key", FELT_KEYS)
def test_loudness_follows_the_felt_where_it_acts(felt_tones, key: int) -> None:
    # Common practice: needling makes the dynamic it acts on quieter, hardening louder:
    # at the crown pp changes more than ff, at the shoulders ff more than pp; throughout,
    # both. (Loudness as heard: the power of the partials hardly changes at ff, where the
    # hammer's momentum sets the first partials; see voicer.report.evenness.)
    for name, sign in (("needle", -1.0), ("harden", 1.0)):
        crown_pp, crown_ff = felt_tones[(key, name, "crown")][1] * sign
        sh_pp, sh_ff = felt_tones[(key, name, "shoulders")][1] * sign
        th_pp, th_ff = felt_tones[(key, name, "throughout")][1] * sign
        assert crown_pp > crown_ff > 0, f"{name} crown: loudness pp {crown_pp:+.2f}, ff {crown_ff:+.2f} phon"
        assert sh_ff > sh_pp > 0, f"{name} shoulders: loudness pp {sh_pp:+.2f}, ff {sh_ff:+.2f} phon"
        assert th_pp > 0 and th_ff > 0


def _to_null(demo: Preset, key: int, toward: str) -> tuple[int, tuple[Operation, ...]]:
    """The partial m nearest above (near end) or below (bridge) 1/beta, and operations of at
    most 5 mm moving the strike point to beta = 1/m, where sin(m pi beta) = 0."""
    beta, length_mm = demo.resolved["strike_ratio"][key - 21], demo.resolved["speaking_length_m"][key - 21] * 1e3
    m = math.floor(1 / beta) + 1 if toward == "near_end" else math.ceil(1 / beta) - 1
    distance = abs(beta - 1 / m) * length_mm
    steps = math.ceil(distance / 5.0)
    return m, tuple(op("strike_point", key, move_mm=distance / steps, toward=toward) for _ in range(steps))


@pytest.mark.parametrize("key", [33, 60, 76, 84])
def test_strike_point_moves_the_null(demo: Preset, key: int) -> None:
    # Physics: mode n is excited in proportion to sin(n pi beta), the hammer width's
    # average of it included, so beta = 1/m silences partial m exactly; toward the near
    # end the null moves to a higher partial, toward the bridge to a lower one.
    cases = [(demo, None)]
    for toward in ("near_end", "bridge"):
        m, steps = _to_null(demo, key, toward)
        cases.append((apply_voicing(demo, plan(*steps)), m))
    tables = simulate_variants([(p, key) for p, _ in cases], [PP, FF])
    base_db = levels_db(tables[0].amplitude_n.sum(axis=1))
    for (preset, m), table in zip(cases[1:], tables[1:]):
        assert preset.resolved["strike_ratio"][key - 21] == pytest.approx(1 / m, rel=1e-12)
        db = levels_db(table.amplitude_n.sum(axis=1))
        # Silenced: far below the strongest partial and 100 dB or more below where it was
        # (in the treble, partial 9 was already 60-90 dB down: the hammer's spectrum is steep).
        assert np.all(db[:, m - 1] < db.max(axis=1) - 150), f"partial {m} is not silenced"
        assert np.all(db[:, m - 1] < base_db[:, m - 1] - 100), f"partial {m} was silent before"
    ratio_near, ratio_bridge = (p.resolved["strike_ratio"][key - 21] for p, _ in cases[1:])
    assert cases[1][1] > 1 / demo.resolved["strike_ratio"][key - 21] > cases[2][1]
    assert ratio_near < demo.resolved["strike_ratio"][key - 21] < ratio_bridge


@pytest.mark.parametrize("key", [33, 48, 60, 68])
def test_strike_point_toward_the_near_end_brightens(demo: Preset, key: int) -> None:
    # Physics and common practice: a strike nearer the end excites higher partials
    # relatively more (sin(n pi beta) grows with n up to n = 1/(2 beta)). Checked from A1
    # to G#4; above, the centroid of a nearly single-partial tone follows the hammer
    # spectrum's dips (see FELT_KEYS).
    presets = [demo] + [apply_voicing(demo, plan(op("strike_point", key, move_mm=2.0, toward=t)))
                        for t in ("near_end", "bridge")]
    base, near, bridge = (tone(t)[0] for t in simulate_variants([(p, key) for p in presets], [PP, FF]))
    assert np.all(near > base) and np.all(bridge < base), (base, near, bridge)


def test_filing_mass_off_shortens_the_contact(demo: Preset) -> None:
    # Physics.md, constant-free assertion 2: T_c ~ (M/K)^(1/(p+1)): a lighter hammer leaves
    # sooner; with less momentum the blow is quieter (summed partial power).
    keys = (33, 60, 76)
    items = [(demo, k) for k in keys] + [(apply_voicing(demo, plan(op("file", k, mass_g=1.0))), k) for k in keys]
    tables = simulate_variants(items, [PP, FF])
    for before, after in zip(tables[:3], tables[3:]):
        assert np.all(after.contact_s < before.contact_s), (before.key, before.contact_s, after.contact_s)
        power = [np.sum(np.abs(t.amplitude_n.sum(axis=1)) ** 2, axis=1) for t in (before, after)]
        assert np.all(power[1] < power[0])


def test_mating_fix_evens_the_unison(demo: Preset) -> None:
    # A string sitting low (0.2 mm further from the hammer) is met late and takes less of
    # the blow; moving it 0.2 mm nearer makes the three strings alike again (a symmetric
    # unison: every string gets the same partials).
    low = demo.with_key_values(58, {"mating_3_mm": -0.2})
    fixed = apply_voicing(low, plan(op("mating", 58, string=3, move_mm=0.2)))
    assert fixed.resolved["mating_3_mm"][58 - 21] == 0.0
    before, after = (t.amplitude_n for t in simulate_variants([(low, 58), (fixed, 58)], [PP, FF]))
    assert np.all(np.abs(before[:, 2, 0]) < np.abs(before[:, 0, 0]))
    np.testing.assert_allclose(after[:, 2], after[:, 0], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(after[:, 1], after[:, 0], rtol=1e-9, atol=1e-12)


# --- reversing and composing -------------------------------------------------------------------

def every_kind() -> VoicingPlan:
    return plan(op("needle", range(52, 62), amount_percent=20.0, where="crown"),
                op("harden", (33, 47, 48), amount_percent=12.0, where="shoulders"),
                Change((60, 61), "hammer_mass_g", "factor", 1.07),
                op("file", 52, mass_g=0.3, width_mm=-1.0),
                op("strike_point", range(97, 109), move_mm=0.5, toward="near_end"),
                Change((70,), "strike_ratio", "add", 0.003),
                op("mating", (40, 58), string=2, move_mm=0.15),
                op("needle", 66, amount_percent=30.0, where="throughout"), name="every kind")


def assert_same_preset(a: Preset, b: Preset) -> None:
    assert a.to_dict() == b.to_dict()
    for name, values in b.resolved.items():
        np.testing.assert_array_equal(a.resolved[name], values, err_msg=name)


def test_inverse_amounts() -> None:
    # Needling 20 % at the crown is undone by hardening there by 1 / (1 - 0.2) - 1 = 25 %;
    # hardening 25 % by needling 1 - 1 / 1.25 = 20 %.
    (inv,) = reverse_plan(plan(op("needle", 60, amount_percent=20.0, where="crown"))).changes
    assert (inv.op, inv.amounts["where"]) == ("harden", "crown")
    assert inv.amounts["amount_percent"] == pytest.approx(25.0, rel=1e-14)
    (inv,) = reverse_plan(plan(op("harden", 60, amount_percent=25.0, where="shoulders"))).changes
    assert (inv.op, inv.amounts["where"]) == ("needle", "shoulders")
    assert inv.amounts["amount_percent"] == pytest.approx(20.0, rel=1e-14)
    forward = every_kind()
    backward = reverse_plan(forward)
    assert [s.undoes for s in backward.changes] == list(reversed(forward.changes))
    assert backward.changes[0].amounts["amount_percent"] == pytest.approx(100 * (1 / 0.7 - 1))  # past 30 %: allowed
    assert reverse_plan(backward).changes == forward.changes


def test_applied_and_reversed_gives_back_the_original_exactly(demo: Preset) -> None:
    forward = every_kind()
    voiced = apply_voicing(demo, forward)
    assert isinstance(voiced, VoicedPreset) and voiced != demo
    back = apply_voicing(voiced, reverse_plan(forward))
    assert back is demo  # the remembered preset itself
    assert_same_preset(back, demo)


def test_reversed_elsewhere_agrees_to_rounding(demo: Preset) -> None:
    # A voiced preset read back from its data has no memory: the inverse steps apply in
    # arithmetic and give the original's values to rounding, as overrides.
    forward = every_kind()
    saved = parse_preset(apply_voicing(demo, forward).to_dict())
    back = apply_voicing(saved, reverse_plan(forward))
    assert back.overrides and not demo.overrides
    for name, values in demo.resolved.items():
        np.testing.assert_allclose(back.resolved[name], values, rtol=RTOL_ROUND_TRIP, atol=1e-15, err_msg=name)


def test_plans_compose(demo: Preset) -> None:
    steps = every_kind().changes
    a, b = plan(*steps[:4], name="A"), plan(*steps[4:], name="B")
    one_after_other = apply_voicing(apply_voicing(demo, a), b)
    both = compose(a, b)
    assert both.changes == steps and both.name == "A then B"
    assert_same_preset(apply_voicing(demo, both), one_after_other)
    # Undo B alone: back to the piano after A, exactly; then A: back to the demo.
    after_a = apply_voicing(one_after_other, reverse_plan(b))
    assert_same_preset(after_a, apply_voicing(demo, a))
    assert apply_voicing(after_a, reverse_plan(a)) is demo
    assert apply_voicing(one_after_other, reverse_plan(both)) is demo


def test_value_change_cannot_be_reversed(tmp_path: Path) -> None:
    path, _ = write(tmp_path, [("operation", NEEDLE), ("change", {"keys": 60, "field": "strike_ratio",
                                                                  "value": 0.12})])
    with pytest.raises(PresetError, match=in_file(path, r"field 'strike_ratio': change 1 sets strike_ratio to 0\.12: "
                                                        r"a value change has no reverse")):
        reverse_plan(load_voicing(path))


def test_voiced_preset_equals_a_plain_one_with_the_same_contents(demo: Preset) -> None:
    voiced = apply_voicing(demo, plan(op("needle", 60, amount_percent=10.0, where="crown")))
    plain = parse_preset(voiced.to_dict())
    assert voiced == plain and plain == voiced and type(plain) is Preset
    assert apply_voicing(demo, plan()) is demo


def test_a_plan_writes_back_as_itself(tmp_path: Path, demo: Preset) -> None:
    forward = every_kind()
    path = tmp_path / "written.toml"
    path.write_text(plan_to_toml(forward), encoding="utf-8")
    read = load_voicing(path)
    assert read.changes == forward.changes and read.name == forward.name  # kinds interleaved, order kept
    assert_same_preset(apply_voicing(demo, read), apply_voicing(demo, forward))
    # A reversed plan is a preview, not a job: undoing 30 % of needling is 42.9 % of hardener.
    path.write_text(plan_to_toml(reverse_plan(forward)), encoding="utf-8")
    with pytest.raises(PresetError, match=r"field 'amount_percent': operation 1 \(line \d+\) harden: 42\.857\d* "
                                          r"is outside the allowed range 0 < x <= 30 %"):
        load_voicing(path)


# --- the bundled plan, the docs ------------------------------------------------------------------

def test_bundled_recital_plan(demo: Preset) -> None:
    recital = load_voicing(RECITAL)
    assert recital.name and recital.description
    # MIDI keys (common practice, C4 = 60): F3-C#4 = 53-61, F#4 = 66, B2-C3 = 47-48, E3 = 52,
    # C#7-C8 = 97-108, A#3 = 58 (a trichord), E2 = 40 (a bichord).
    assert recital.changes == (op("needle", range(53, 62), amount_percent=15.0, where="shoulders"),
                               op("needle", 66, amount_percent=10.0, where="crown"),
                               op("harden", (47, 48), amount_percent=10.0, where="throughout"),
                               op("file", 52, mass_g=0.2, width_mm=-1.0),
                               op("strike_point", range(97, 109), move_mm=0.5, toward="near_end"),
                               op("mating", 58, string=3, move_mm=0.15),
                               op("mating", 40, string=2, move_mm=0.2))
    voiced = apply_voicing(demo, recital)
    assert apply_voicing(voiced, reverse_plan(recital)) is demo
    # The glassy patch is darker at ff than at pp (shoulder needling; common practice).
    tables = simulate_variants([(p, k) for k in (55, 59) for p in (demo, voiced)], [PP, FF])
    for before, after in zip(tables[::2], tables[1::2]):
        change = tone(after)[0] / tone(before)[0] - 1.0
        assert change[1] < change[0] < 0, (before.key, change)


def test_readme_has_the_operation_table() -> None:
    section = README.read_text(encoding="utf-8").split("## Voicing plans", 1)[1].split("\n## ", 1)[0]
    assert operations_markdown() in section, "paste voicer.tone.voicing.operations_markdown() into the README"
    assert "cannot be undone" in section


def test_module_notes_state_every_range() -> None:
    doc = voicing_module.__doc__
    for spec in OPERATIONS:
        for p in spec.amounts:
            if p.kind != "str":
                assert p.range_text() in doc, f"{spec.name} {p.name}: {p.range_text()} not in the module notes"


def test_public_names() -> None:
    for name in ("VoicingPlan", "Change", "Operation", "VoicedPreset", "load_voicing", "parse_voicing",
                 "apply_voicing", "compose", "reverse_plan", "OPERATIONS"):
        assert name in voicer.__all__ and getattr(voicer, name) is getattr(voicing_module, name)


def test_tune_unison_retunes_one_string_and_reverses(demo: Preset) -> None:
    # A unison correction in cents (common practice: a technician cleans up a unison by a
    # cent or two): mistune_<string>_cents plus move_cents, undone by the opposite move.
    p = demo.with_key_values(60, {"mistune_3_cents": 2.0})
    step = plan(op("tune_unison", 60, string=3, move_cents=-2.0))
    voiced = apply_voicing(p, step)
    assert voiced.resolved["mistune_3_cents"][60 - 21] == pytest.approx(0.0, abs=1e-12)
    back = apply_voicing(voiced, reverse_plan(step))
    assert back.to_dict() == p.to_dict()


def test_tune_unison_ends_the_beat_it_corrects(demo: Preset) -> None:
    # Weinreich 1977: a string a few cents off beats against the others; brought back in
    # tune, the modes lock (their frequencies then lie within the bridge's coupling, a
    # small fraction of the beat).
    from voicer.tone.tables import build_tables
    from voicer.tone.unison import couple_unison
    off = demo.with_key_values(60, {"mistune_2_cents": 0.0, "mistune_3_cents": 3.0})
    fixed = apply_voicing(off, plan(op("tune_unison", 60, string=3, move_cents=-3.0)))
    raw = build_tables(off, keys=[60])[60]
    spread = [np.ptp(couple_unison(raw, p).freq_hz[:3]) for p in (off, fixed)]
    assert spread[0] > 0.4 and spread[1] < 0.1 * spread[0], spread


def test_tune_unison_refuses_a_string_the_key_does_not_have(demo: Preset, tmp_path: Path) -> None:
    path, _ = write(tmp_path, [("operation", {"op": "tune_unison", "keys": 40, "string": 3, "move_cents": 1.0})])
    with pytest.raises(PresetError, match="tuning string 3: this key has 2 string"):
        apply_voicing(demo, voicing_module.load_voicing(path))
    path, _ = write(tmp_path, [("operation", {"op": "tune_unison", "keys": 60, "string": 2, "move_cents": 8.0})])
    with pytest.raises(PresetError, match="move_cents"):
        voicing_module.load_voicing(path)
