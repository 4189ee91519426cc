"""Property tests (hypothesis) of the stiff-string and scale physics."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from voicer.physics.scale import derive_strings
from voicer.physics.strings import loss_rates, partial_ratios

b_values = st.floats(min_value=1e-7, max_value=0.08)
ends = st.sampled_from(["pinned", "clamped"])
n = np.arange(1, 41)


@given(b=b_values, end=ends)
def test_partials_increase_and_are_sharp(b: float, end: str) -> None:
    r = partial_ratios(b, n, end=end)
    assert np.all(np.diff(r) > 0)
    assert np.all(r > n)  # sharp of harmonic for B > 0
    assert np.all(np.diff(r / n) > 0)  # and increasingly so up the series


@given(b=b_values, end=ends, factor=st.floats(1.01, 3.0))
def test_more_stiffness_raises_every_partial(b: float, end: str, factor: float) -> None:
    assert np.all(partial_ratios(b * factor, n, end=end) > partial_ratios(b, n, end=end))


@given(f1=st.floats(100.0, 2000.0), size=st.floats(0.7, 1.5), d=st.floats(0.8e-3, 1.1e-3),
       grow=st.floats(1.01, 1.25))
def test_tension_and_b_follow_length_and_diameter(f1, size, d, grow) -> None:
    """At a fixed pitch T = 4 mu L^2 f0^2 grows with L and d; B = pi^3 E d^4 / (64 T L^2)
    falls with L (as 1/L^4) and grows with d (as d^2) (Fletcher 1964).

    Lengths are drawn around a plain-wire scale's (L ~ 167 m Hz / f1, e.g. 0.64 m at C4),
    so that every string drawn can be tuned to its pitch."""
    length = size * 167.0 / f1
    _, _, t, b = derive_strings(f1, length, d, 0.0)
    _, _, t_long, b_long = derive_strings(f1, length * grow, d, 0.0)
    _, _, t_thick, b_thick = derive_strings(f1, length, d * grow, 0.0)
    assert t_long > t and b_long < b
    assert t_thick > t and b_thick > b


@given(f1=st.floats(27.0, 120.0), extra=st.floats(1e-3, 0.2))
def test_winding_raises_tension_and_lowers_b(f1, extra) -> None:
    _, _, t, b = derive_strings(f1, 1.2, 1.3e-3, 0.01)
    _, _, t_w, b_w = derive_strings(f1, 1.2, 1.3e-3, 0.01 + extra)
    assert t_w > t and b_w < b


@given(b1=st.floats(0.0, 10.0), b3=st.floats(1e-12, 1e-7))
def test_losses_grow_with_frequency(b1, b3) -> None:
    sigma = loss_rates(np.linspace(20.0, 20000.0, 50), b1, b3)
    assert np.all(np.diff(sigma) > 0) and sigma[0] >= b1
