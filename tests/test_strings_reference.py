"""Stiff-string partials against an independent eigen-solver and published formulas.

Reference: the string equation T u'' - E I u'''' = mu u_tt, i.e. eps u'''' - u'' = pi^2 r^2 u
with eps = B / pi^2 (Fletcher 1964, JASA 36, 203-209), discretised here by central
finite differences and solved with scipy.linalg (eig_banded, solve_banded). Nothing of voicer's own
solver is used for the reference.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.linalg import eig_banded, solve_banded

from voicer.physics.strings import (
    FLETCHER_CLAMPED_MAX_B,
    bridge_force_factors,
    clamped_ratios,
    fletcher_clamped_ratios,
    mode_shapes,
    partial_ratios,
    pinned_ratios,
)
from voicer.physics.tuning import cents

N_PARTIALS = 30
GRIDS = (1500, 3000, 6000)  # intervals; h halves each time
B_VALUES = (1e-4, 5e-4, 3e-3)  # the "about 1e-4, 5e-4 and 3e-3"


def fd_band(b: float, end: str, intervals: int) -> np.ndarray:
    """Lower band (3 x m) of eps D4 - D2 on [0, 1], central differences.

    Ghost points: pinned u_{-1} = -u_1 (u'' = 0), clamped u_{-1} = +u_1 (u' = 0).
    """
    eps = b / np.pi**2
    h = 1.0 / intervals
    m = intervals - 1  # interior unknowns
    band = np.zeros((3, m))
    band[0] = 6.0 * eps / h**4 + 2.0 / h**2
    band[1, :-1] = -4.0 * eps / h**4 - 1.0 / h**2
    band[2, :-2] = eps / h**4
    ghost = -1.0 if end == "pinned" else 1.0
    band[0, 0] += ghost * eps / h**4
    band[0, -1] += ghost * eps / h**4
    return band


def fd_energy(v: np.ndarray, b: float, end: str, intervals: int) -> float:
    """v^T (eps D4 - D2) v as a sum of squares (no cancellation, unlike A @ v).

    eps * sum_j w_j (D2 v)_j^2 + sum_j (D1 v)_j^2, where the end nodes carry the ghost
    point: (D2 v)_0 = 0 for pinned ends, 2 v_1 / h^2 with weight 1/2 for clamped ends.
    """
    eps = b / np.pi**2
    h = 1.0 / intervals
    u = np.concatenate(([0.0], v, [0.0]))
    d1 = np.diff(u) / h
    d2 = (u[:-2] - 2.0 * u[1:-1] + u[2:]) / h**2
    bend = np.sum(d2**2)
    if end == "clamped":
        bend += 0.5 * ((2.0 * v[0] / h**2) ** 2 + (2.0 * v[-1] / h**2) ** 2)
    return eps * bend + np.sum(d1**2)


def fd_eigen(b: float, end: str, intervals: int, count: int = N_PARTIALS) -> tuple[np.ndarray, np.ndarray]:
    """f_n / f0 and mode shapes (m x count) of the finite-difference string.

    Eigenvalues from scipy.linalg.eig_banded; eigenvectors by inverse iteration with
    scipy.linalg.solve_banded; each eigenvalue then refined as the Rayleigh quotient in
    sum-of-squares form, since the matrix entries (eps / h^4 ~ 1e12) would otherwise
    cost the low partials their accuracy to round-off.
    """
    band = fd_band(b, end, intervals)
    w = eig_banded(band, lower=True, eigvals_only=True, select="i", select_range=(0, count - 1))
    m = band.shape[1]
    full = np.zeros((5, m))  # solve_banded layout, (l, u) = (2, 2)
    full[2], full[1, 1:], full[0, 2:] = band[0], band[1, :-1], band[2, :-2]
    full[3, :-1], full[4, :-2] = band[1, :-1], band[2, :-2]
    start = np.random.default_rng(1).standard_normal(m)
    lam, vecs = np.empty(count), np.empty((m, count))
    for i, wi in enumerate(w):
        shifted = full.copy()
        shifted[2] -= wi * (1.0 - 1e-9)
        v = start
        for _ in range(3):
            v = solve_banded((2, 2), shifted, v)
            v /= np.linalg.norm(v)
        vecs[:, i] = v
        lam[i] = fd_energy(v, b, end, intervals) / np.dot(v, v)
    return np.sqrt(lam) / np.pi, vecs


def richardson(b: float, end: str) -> tuple[np.ndarray, np.ndarray]:
    """Grid-converged ratios (two Richardson steps, h^2 then h^4) and the observed order."""
    r1, r2, r4 = (fd_eigen(b, end, m)[0] for m in GRIDS)
    order = np.log2(np.abs(r1 - r2) / np.abs(r2 - r4))
    a = (4.0 * r2 - r1) / 3.0
    c = (4.0 * r4 - r2) / 3.0
    return (16.0 * c - a) / 15.0, order


@pytest.mark.parametrize("end", ["pinned", "clamped"])
@pytest.mark.parametrize("b", B_VALUES)
def test_partials_match_eigen_solver(b: float, end: str) -> None:
    ref, order = richardson(b, end)
    # Convergence shown: the finite-difference error falls as h^2 (second-order stencil).
    np.testing.assert_allclose(order, 2.0, atol=0.05)
    model = partial_ratios(b, np.arange(1, N_PARTIALS + 1), end=end)
    dev = cents(model, ref)
    # The bound: first 30 partials within 0.05 cent after grid convergence.
    assert np.max(np.abs(dev)) < 0.05, dev
    if end == "pinned":
        # Fletcher's pinned formula n sqrt(1 + B n^2) is the exact solution.
        n = np.arange(1, N_PARTIALS + 1)
        np.testing.assert_allclose(model, n * np.sqrt(1 + b * n**2), rtol=1e-12)


def test_clamped_check_values() -> None:
    """physics.md check values ([calc]: exact transcendental roots; reproduced above by FD)."""
    b = np.array([1e-4, 4e-4, 2e-3])
    np.testing.assert_allclose(clamped_ratios(b, 1), [1.006457, 1.013100, 1.030341], atol=2e-6)
    np.testing.assert_allclose(clamped_ratios(b, 30), [31.52343, 35.43602, 51.39457], rtol=2e-5)


def test_fletcher_clamped_correction_range() -> None:
    """Fletcher (1964)'s clamped-end factor: ~0.2 cent to n = 30 for B <= 4e-4, several
    cents at B = 2e-3 (physics.md section 1), so the model uses exact roots instead."""
    n = np.arange(1, N_PARTIALS + 1)
    for b in (1e-4, FLETCHER_CLAMPED_MAX_B):
        assert np.max(np.abs(cents(fletcher_clamped_ratios(b, n), clamped_ratios(b, n)))) < 0.25
    drift = cents(fletcher_clamped_ratios(2e-3, n), clamped_ratios(2e-3, n))
    assert np.max(np.abs(drift)) > 5.0
    # The model's clamped partials are the exact ones, not Fletcher's factor.
    np.testing.assert_array_equal(partial_ratios(2e-3, n, end="clamped"), clamped_ratios(2e-3, n))


def test_pinned_formula_low_on_clamped_strings() -> None:
    """physics.md: applied to clamped ends, the pinned formula is low by about 2 sqrt(B)/pi."""
    for b, low in ((1e-4, 0.0064), (4e-4, 0.0127), (2e-3, 0.0285)):
        ratio = pinned_ratios(b, 1) / clamped_ratios(b, 1) - 1
        assert ratio == pytest.approx(-low, abs=0.0005)


@pytest.mark.parametrize("end", ["pinned", "clamped"])
def test_mode_shapes_match_eigenvectors(end: str) -> None:
    """Mode shapes against the finite-difference eigenvectors (scipy.linalg.eig_banded)."""
    b, intervals = 3e-3, 3000
    _, vecs = fd_eigen(b, end, intervals, count=12)
    x = np.arange(1, intervals) / intervals
    shapes = mode_shapes(b, np.arange(1, 13), x, end=end)
    for i in range(12):
        corr = abs(np.dot(shapes[i], vecs[:, i])) / (np.linalg.norm(shapes[i]) * np.linalg.norm(vecs[:, i]))
        assert corr > 1 - 1e-6
    # Normalised like sin(n pi x): integral of u^2 = 1/2, and mutually orthogonal.
    xf = np.linspace(0.0, 1.0, 100_001)
    u = mode_shapes(b, np.arange(1, 13), xf, end=end)
    gram = u @ u.T * (xf[1] - xf[0])  # trapezoid rule: the shapes vanish at both ends
    np.testing.assert_allclose(gram, 0.5 * np.eye(12), atol=1e-6)
    # Same sign as sin(n pi x) near the front end.
    assert np.all(np.sign(u[:, 2000]) == np.sign(np.sin(np.arange(1, 13) * np.pi * xf[2000])))


def test_clamped_shape_end_conditions() -> None:
    b = 1e-3
    x = np.array([0.0, 1e-7, 1.0 - 1e-7, 1.0])
    u = mode_shapes(b, np.arange(1, 31), x, end="clamped")
    np.testing.assert_allclose(u[:, [0, 3]], 0.0, atol=1e-12)
    slope = u[:, 1] / 1e-7  # u'(0) ~ u(h)/h must vanish (clamped) compared with n pi for sin
    assert np.max(np.abs(slope) / (np.pi * np.arange(1, 31))) < 1e-3


def test_bridge_force_factors() -> None:
    """Force on the bridge per unit modal amplitude, T u_x - E I u_xxx at x = L, in T/L.

    Pinned: (-1)^n n pi (1 + B n^2) from u = sin(n pi x). Clamped: the shear of the exact
    shapes, checked by a fourth-order finite-difference third derivative of mode_shapes
    near the end, and tending to the pinned value as B -> 0."""
    n = np.arange(1, 11)
    b = 3e-3
    np.testing.assert_allclose(bridge_force_factors(b, n), (-1.0) ** n * n * np.pi * (1 + b * n**2), rtol=1e-14)
    h = 2e-5
    offsets = -h * np.arange(7)  # seven points ending at x = 1
    u = mode_shapes(b, n, 1.0 + offsets, end="clamped")
    # One-sided third derivative, error O(h^4): weights from the Taylor conditions
    # sum_j w_j d_j^k / k! = [k == 3], k = 0..6.
    taylor = np.array([offsets**k / math.factorial(k) for k in range(7)])
    w = np.linalg.solve(taylor, np.eye(7)[3])
    d3 = u @ w
    np.testing.assert_allclose(-(b / np.pi**2) * d3, bridge_force_factors(b, n, end="clamped"), rtol=2e-3)
    small = bridge_force_factors(1e-8, n, end="clamped") / bridge_force_factors(1e-8, n)
    np.testing.assert_allclose(small, 1.0, atol=1e-3)
