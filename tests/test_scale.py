"""Scale model: mass, tension, wave speed, B and the demo instrument against references."""

from __future__ import annotations

import numpy as np
import pytest

from voicer.errors import ParameterError
from voicer.physics.constants import COPPER_DENSITY_KG_M3, STEEL_DENSITY_KG_M3, STEEL_YOUNGS_MODULUS_PA
from voicer.physics.scale import TooStiffError, core_diameter_for_b, derive_strings, fletcher_b, winding_mass_kg_per_m
from voicer.physics.strings import clamped_ratios, pinned_ratios, strike_weights
from voicer.physics.tuning import KEYS, equal_tempered_hz, tuned_hz
from voicer.tone.preset import parse_preset, preset_to_toml


def test_fletcher_b_check_value() -> None:
    # physics.md check value ([calc] from Fletcher 1964's B = pi^3 E d^4 / (64 T L^2)):
    # d 1.0 mm, L 0.62 m, T 670 N, E 2.0e11 Pa -> 3.762e-4, tolerance 1e-3 relative.
    assert float(fletcher_b(1.0e-3, 670.0, 0.62, youngs_modulus_pa=2.0e11)) == pytest.approx(3.762e-4, rel=1e-3)


def test_wave_speed_c2_common_practice() -> None:
    """A C2 string of speaking length 1.544 m has c about 202 m/s, and a wave needs about
    6.7 ms to run 1.35 m (common practice); c = sqrt(T/mu) = 2 L f0."""
    f1 = equal_tempered_hz(36)
    f0, mu, tension, b = derive_strings(f1, 1.544, 1.3e-3, 0.040)
    c = np.sqrt(tension / mu)
    assert float(c) == pytest.approx(float(2 * 1.544 * f0), rel=1e-12)
    assert float(c) == pytest.approx(202.0, abs=0.5)
    assert float(1.35 / c * 1e3) == pytest.approx(6.7, abs=0.05)


def test_tension_formula_and_tuning(demo) -> None:
    s = demo.scale
    length = s.values["speaking_length_m"]
    # T = 4 mu L^2 f0^2 (flexible string, Fletcher 1964) and c = 2 L f0.
    np.testing.assert_allclose(s.tension_n, 4 * s.linear_mass_kg_per_m * length**2 * s.f0_hz**2, rtol=1e-12)
    np.testing.assert_allclose(s.wave_speed_m_s, np.sqrt(s.tension_n / s.linear_mass_kg_per_m), rtol=1e-12)
    # The sounding first partial is the tuning target: ET from A4 plus the stretch.
    np.testing.assert_allclose(s.f0_hz * pinned_ratios(s.b, 1), tuned_hz(KEYS, s.values["stretch_cents"]), rtol=1e-12)
    assert s.f1_hz[69 - 21] == 440.0  # the demo puts no stretch on A4


def test_clamped_scale_tunes_the_first_partial(demo) -> None:
    data = demo.to_dict()
    data["instrument"]["end_condition"] = "clamped"
    s = parse_preset(data).scale
    np.testing.assert_allclose(s.f0_hz * clamped_ratios(s.b, 1), s.f1_hz, rtol=1e-12)
    # Clamping shortens the effective length, so less tension is needed for the same pitch.
    assert np.all(s.tension_n < demo.scale.tension_n)


def test_plain_wire_mass() -> None:
    d = 1.0e-3
    _, mu, _, _ = derive_strings(261.6, 0.64, d, 0.0)
    assert float(mu) == pytest.approx(STEEL_DENSITY_KG_M3 * np.pi * d**2 / 4, rel=1e-14)


def test_winding_mass_counts_turns() -> None:
    # Geometry, counted directly: 1/w turns per metre of wire diameter w = (D - d)/2,
    # each of centre-line length pi (d + w) and cross-section pi w^2 / 4.
    d, outer = 1.5e-3, 5.0e-3
    w = (outer - d) / 2
    direct = COPPER_DENSITY_KG_M3 * (np.pi * w**2 / 4) * np.pi * (d + w) / w
    assert float(winding_mass_kg_per_m(d, outer)) == pytest.approx(direct, rel=1e-12)


def test_wound_string_b_uses_core_only() -> None:
    # Fletcher 1964 / Conklin 1996: the core gives stiffness, the winding only mass; at
    # fixed f0 and L, B is proportional to 1 / mu_total.
    f1, length, d = 55.0, 1.3, 1.4e-3
    _, mu_plain, t_plain, b_plain = derive_strings(f1, length, d, 0.0)
    _, mu_wound, t_wound, b_wound = derive_strings(f1, length, d, 0.06)
    assert float(b_wound * mu_wound) == pytest.approx(float(b_plain * mu_plain), rel=1e-3)
    assert t_wound > t_plain


def test_too_stiff_string_is_rejected() -> None:
    with pytest.raises(TooStiffError, match="too stiff"):
        derive_strings(30.0, 0.05, 2.0e-3, 0.0)


def test_strike_point_nulls() -> None:
    # Ideal point strike at beta = 1/8 does not excite partials 8, 16, 24 (common
    # practice; physics.md check value 0 within 1e-12).
    w = strike_weights(np.arange(1, 33), 1 / 8)
    np.testing.assert_allclose(w[[7, 15, 23, 31]], 0.0, atol=1e-12)
    others = np.delete(np.abs(w), [7, 15, 23, 31])
    assert others.min() > 0.38  # sin(pi/8)


def test_demo_b_in_published_ranges(demo) -> None:
    """B of the demo grand against the literature.

    Schuck & Young (1943, JASA 15, 1-11): inharmonicity is least in the two octaves
    below middle C (keys 36..60) and rises toward both ends. Typical values (physics.md
    section 2, from memory): 5e-5..2e-4 near the bass/tenor minimum, 3e-4..1e-3 in the
    middle (C4..A4), >= 1e-2 in the top octave. Chaigne & Askenfelt (1994) C4:
    eps = 3.82e-5, i.e. B = eps pi^2 = 3.77e-4.
    """
    b = demo.scale.b
    at = lambda k: b[k - 21]  # noqa: E731
    k_min = int(KEYS[np.argmin(b)])
    # Least in the lower tenor, A#2..G#3: the first plain strings above the break (the
    # tenor is taken as the trichords below C4, common practice).
    assert 46 <= k_min <= 56
    assert 5e-5 <= b.min() <= 2e-4
    assert np.all((b[60 - 21:69 - 21 + 1] >= 3e-4) & (b[60 - 21:69 - 21 + 1] <= 1e-3))
    assert np.all(b[96 - 21:] >= 1e-2)
    assert at(60) == pytest.approx(3.82e-5 * np.pi**2, rel=0.15)
    # Rising toward both ends: from the minimum down to A0 through the break, and up to C8.
    assert np.all(np.diff(b[: k_min - 21 + 1]) < 0)
    assert np.all(np.diff(b[k_min - 21:]) > 0)
    assert at(21) > 1.5 * b.min() and at(108) > 50 * b.min()


def test_demo_scale_layout(demo) -> None:
    """The issue's design brief: bass wound up to the break, trichords from the tenor up,
    strike ratio near 1/8 in the middle, lighter hammers toward the treble; hammer mass
    about 10-12 g in the bass and 4 g at C8 (physics.md section 3, from memory)."""
    s = demo.scale
    v = s.values
    wound = s.wound
    last = demo.instrument["last_wound_key"]
    assert np.all(wound[: last - 20]) and not np.any(wound[last - 20:])
    assert np.all(v["strings"][60 - 21:] == 3) and v["strings"][0] == 1
    assert v["strike_ratio"][60 - 21] == pytest.approx(1 / 8, abs=0.01)
    assert np.all(np.diff(v["hammer_mass_g"]) <= 0)
    assert 10 <= v["hammer_mass_g"][0] <= 12 and v["hammer_mass_g"][-1] == pytest.approx(4.0, abs=0.5)
    # Tensions in the usual range of piano strings (Conklin 1996, Part III, from memory).
    assert np.all((s.tension_n > 400) & (s.tension_n < 2000))
    # Speaking length of C4 near Chaigne & Askenfelt's 0.62 m.
    assert v["speaking_length_m"][60 - 21] == pytest.approx(0.62, rel=0.1)


def test_demo_decay_times(demo) -> None:
    """T60 of the fundamental against typical values (physics.md section 4, from memory):
    20-40 s low bass, 10-20 s C4, 3-5 s C6, under 1 s at the top."""
    t60 = {k: float(demo.scale.modes(k).t60_s[0]) for k in (21, 60, 84, 108)}
    assert 20 <= t60[21] <= 40 and 10 <= t60[60] <= 20 and 3 <= t60[84] <= 5 and t60[108] < 1


def test_overrides_change_one_key(demo) -> None:
    data = demo.to_dict()
    data["override"] = {"64": {"strike_ratio": 0.14}}
    s = parse_preset(data).scale
    diff = np.flatnonzero(s.values["strike_ratio"] != demo.scale.values["strike_ratio"])
    assert diff.tolist() == [64 - 21] and s.value("strike_ratio", 64) == 0.14
    assert "[override.64]" in preset_to_toml(parse_preset(data))


def test_core_diameter_for_b_inverts_fletcher() -> None:
    # Plain pinned wire: B f0^2 = pi^2 E I / (4 mu L^4) with I/mu = d^2 / (16 rho) (Fletcher 1964),
    # so d^2 = 64 rho L^4 B f1^2 / (pi^2 E (1 + B)) in closed form.
    b, f1, length = 4.2e-4, 261.63, 0.655
    d = core_diameter_for_b(b, f1, length)
    closed = np.sqrt(64 * STEEL_DENSITY_KG_M3 * length**4 * b * f1**2 / (np.pi**2 * STEEL_YOUNGS_MODULUS_PA * (1 + b)))
    assert d == pytest.approx(closed, rel=1e-9)
    # Wound strings (winding by diameter or by mass), either end condition: derive_strings gives b back.
    for kw in ({"winding_diameter_m": 3.0e-3}, {"added_mass_kg_per_m": 0.02}):
        for end in ("pinned", "clamped"):
            d = core_diameter_for_b(1.5e-4, 55.0, 1.6, end=end, **kw)
            wind = (winding_mass_kg_per_m(np.asarray(d), np.asarray(kw["winding_diameter_m"]))
                    if "winding_diameter_m" in kw else kw["added_mass_kg_per_m"])
            assert derive_strings(55.0, 1.6, d, wind, end=end)[3] == pytest.approx(1.5e-4, rel=1e-9)
    with pytest.raises(ParameterError, match="outside 0.3..2.5 mm"):
        core_diameter_for_b(0.5, f1, length)
