"""Equal temperament and stretch against ISO 16 and the stiff-string octave."""

from __future__ import annotations

import numpy as np
import pytest

from voicer.errors import ParameterError
from voicer.physics.strings import pinned_ratios
from voicer.physics.tuning import KEYS, cents, equal_tempered_hz, key_name, tuned_hz


def test_a4_is_440_exactly() -> None:
    # ISO 16:1975: A4 = 440 Hz.
    assert equal_tempered_hz(69) == 440.0


def test_equal_temperament_check_values() -> None:
    # ISO 16 reference with 12-TET: C4 261.6256 Hz, A0 27.5 Hz, C8 4186.009 Hz
    # (physics.md check values, tolerance 1e-4 Hz; C8 given to 3 decimals there).
    np.testing.assert_allclose(equal_tempered_hz([60, 21]), [261.6256, 27.5], atol=1e-4)
    assert equal_tempered_hz(108) == pytest.approx(4186.009, abs=1e-3)
    # C2 = 65.406 Hz (ISO 16 with 12-TET; also common practice).
    assert equal_tempered_hz(36) == pytest.approx(65.406, abs=5e-4)


def test_semitone_and_reference() -> None:
    f = equal_tempered_hz(KEYS)
    np.testing.assert_allclose(f[1:] / f[:-1], 2 ** (1 / 12), rtol=1e-14)
    assert equal_tempered_hz(69, a4_hz=442.0) == 442.0
    with pytest.raises(ParameterError, match="a4_hz=0 must be > 0"):
        equal_tempered_hz(69, a4_hz=0)


def test_stretch_in_cents() -> None:
    assert tuned_hz(69, 1200.0) == pytest.approx(880.0, rel=1e-14)
    assert float(cents(tuned_hz(60, -12.5), equal_tempered_hz(60))) == pytest.approx(-12.5, abs=1e-12)


def test_octave_widening_from_inharmonicity() -> None:
    """Octave tuned to match partials, equal B on both notes (physics.md section 7):
    wider by 1200 log2 sqrt((1+4B)/(1+B)) for 2:1 and sqrt((1+16B)/(1+4B)) for 4:2;
    at B = 4e-4 that is 1.038 and 4.138 cents."""
    b = 4e-4
    r = pinned_ratios(b, [1, 2, 4])
    two_one = cents(r[1] / r[0], 2.0)  # upper f1 = lower f2
    four_two = cents(r[2] / r[1], 2.0)  # upper f2 = lower f4
    assert float(two_one) == pytest.approx(1.038, abs=1e-3)
    assert float(four_two) == pytest.approx(4.138, abs=1e-3)


def test_key_names() -> None:
    assert [key_name(k) for k in (21, 60, 69, 108)] == ["A0", "C4", "A4", "C8"]
