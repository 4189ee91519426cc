"""String modes of a key: band limit, losses and T60 against Chaigne & Askenfelt (1994)."""

from __future__ import annotations

import numpy as np
import pytest

from voicer.errors import ParameterError
from voicer.physics.constants import T60_LN
from voicer.physics.strings import NYQUIST_FRACTION, loss_rates, string_modes, t60_s

# Chaigne & Askenfelt (1994, JASA 95, 1112), Table I, C4 (from memory; physics.md):
# L 0.62 m, string mass 3.93 g, T 670 N, eps 3.82e-5 (B = eps pi^2), b1 0.5 1/s, b3 6.25e-9 s.
CA_L, CA_MASS, CA_T, CA_EPS, CA_B1, CA_B3 = 0.62, 3.93e-3, 670.0, 3.82e-5, 0.5, 6.25e-9


def ca_c4_modes(**kw):
    mu = CA_MASS / CA_L
    f0 = np.sqrt(CA_T / mu) / (2 * CA_L)
    return string_modes(f0, CA_EPS * np.pi**2, loss_b1_per_s=CA_B1, loss_b3_s=CA_B3, **kw)


def test_chaigne_askenfelt_c4_t60() -> None:
    # physics.md check values ([calc] from sigma = b1 + b3 omega^2): 13.36 s at n = 1,
    # 3.06 s at n = 10, tolerance 1 %.
    m = ca_c4_modes()
    assert m.t60_s[0] == pytest.approx(13.36, rel=0.01)
    assert m.t60_s[9] == pytest.approx(3.06, rel=0.01)
    assert m.f0_hz == pytest.approx(262.2, abs=0.1)  # C&A's string is tuned near C4


def test_band_limit_and_count() -> None:
    m = ca_c4_modes(sample_rate_hz=44_100.0)
    assert m.freq_hz[-1] < NYQUIST_FRACTION * 44_100.0
    beyond = m.f0_hz * (m.n[-1] + 1) * np.sqrt(1 + m.b * (m.n[-1] + 1) ** 2)
    assert beyond >= NYQUIST_FRACTION * 44_100.0  # nothing below the limit was left out
    assert len(ca_c4_modes(max_partials=12).n) == 12
    np.testing.assert_array_equal(m.n, np.arange(1, len(m.n) + 1))


def test_losses_and_t60() -> None:
    m = ca_c4_modes()
    np.testing.assert_allclose(m.sigma_per_s, CA_B1 + CA_B3 * (2 * np.pi * m.freq_hz) ** 2, rtol=1e-14)
    np.testing.assert_allclose(m.t60_s * m.sigma_per_s, T60_LN, rtol=1e-14)
    assert t60_s(0.0) == np.inf
    with pytest.raises(ParameterError, match="must be >= 0"):
        loss_rates([100.0], -1.0, 0.0)


def test_decay_rates_given_per_partial() -> None:
    given = np.linspace(0.3, 9.0, 40)
    m = string_modes(261.6, 3.7e-4, sigma_per_s=given, max_partials=30)
    np.testing.assert_array_equal(m.sigma_per_s, given[:30])
    with pytest.raises(ParameterError, match="must give a rate >= 0 for each of the 30 partials"):
        string_modes(261.6, 3.7e-4, sigma_per_s=given[:10], max_partials=30)


def test_key_modes_from_the_scale(demo) -> None:
    m = demo.scale.modes(21, sample_rate_hz=48_000.0)
    # Band-limited, not capped: every partial of Fletcher's f_n = n f0 sqrt(1 + B n^2) below
    # the limit, and no more (A0 has about 200 of them).
    n = np.arange(1, 1000)
    below = n[n * m.f0_hz * np.sqrt(1 + m.b * n**2) < NYQUIST_FRACTION * 48_000.0]
    assert 150 < len(m.n) < 256 and len(m.n) == below[-1]
    assert m.freq_hz[0] == pytest.approx(demo.scale.f1_hz[0], rel=1e-12)
    shapes = m.shapes([0.118])
    np.testing.assert_allclose(shapes[:, 0], np.sin(m.n * np.pi * 0.118), rtol=1e-12)
