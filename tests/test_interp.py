"""PCHIP against scipy.interpolate.PchipInterpolator (the reference implementation)."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st
from scipy.interpolate import PchipInterpolator

from voicer.tone.interp import pchip


# Values on a 1e-3 grid, like anchor data; near-subnormal slopes overflow inside scipy itself.
@given(st.lists(st.integers(-10**6, 10**6).map(lambda i: i / 1000), min_size=2, max_size=12),
       st.integers(0, 2**32 - 1))
def test_matches_scipy(values, seed) -> None:
    rng = np.random.default_rng(seed)
    x = np.cumsum(rng.uniform(0.5, 12.0, len(values)))
    y = np.asarray(values)
    at = np.linspace(x[0], x[-1], 301)
    ours, ref = pchip(x, y, at), PchipInterpolator(x, y)(at)
    np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-9 * (1 + np.abs(y).max()))


def test_flat_and_monotone_data(rng) -> None:
    x = np.array([21.0, 33.0, 45.0, 60.0, 108.0])
    at = np.arange(21, 109)
    np.testing.assert_allclose(pchip(x, np.full(5, 2.5), at), 2.5, rtol=1e-15)
    y = np.sort(rng.uniform(0, 1, 5))
    out = pchip(x, y, at)
    assert np.all(np.diff(out) >= -1e-15)  # monotone data stay monotone (Fritsch & Carlson 1980)
    np.testing.assert_allclose(out[(x - 21).astype(int)], y, rtol=1e-14)
