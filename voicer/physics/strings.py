"""Transverse modes of a stiff string: partial frequencies, mode shapes and losses.

The string obeys ``T u'' - E I u'''' = mu u_tt`` on ``0 <= x <= L``. In the variable
``xi = x / L`` with ``r = f / f0`` (``f0 = c / 2L`` the flexible-string fundamental) this is
``eps u'''' - u'' = pi^2 r^2 u`` with ``eps = B / pi^2``, ``B = pi^2 E I / (T L^2)``
(Fletcher 1964, JASA 36, 203-209).

* Pinned ends (``u = u'' = 0``): ``u_n = sin(n pi xi)`` and ``f_n = n f0 sqrt(1 + B n^2)``
  exactly.
* Clamped ends (``u = u' = 0``): the exact eigenvalues come from the transcendental end
  condition, solved here for every partial. Fletcher's closed-form correction
  ``(1 + 2 sqrt(B)/pi + 4 B / pi^2)`` is offered for comparison only: it holds to about
  0.2 cent up to partial 30 for ``B <= 4e-4`` but is off by several cents at
  ``B = 2e-3`` (checked in ``tests/test_strings_reference.py``), so the model never uses it.

Losses follow Chaigne & Askenfelt (1994, JASA 95, 1112): ``sigma_n = b1 + b3 omega_n^2``
(amplitude decay rate, 1/s), ``T60 = ln(1000) / sigma``.
"""

from __future__ import annotations

__all__ = [
    "EndCondition",
    "END_CONDITIONS",
    "FLETCHER_CLAMPED_MAX_B",
    "DEFAULT_MAX_PARTIALS",
    "DEFAULT_SAMPLE_RATE_HZ",
    "NYQUIST_FRACTION",
    "StringModes",
    "pinned_ratios",
    "clamped_ratios",
    "fletcher_clamped_ratios",
    "partial_ratios",
    "mode_shapes",
    "bridge_force_factors",
    "loss_rates",
    "t60_s",
    "strike_weights",
    "string_modes",
]

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import ParameterError
from .constants import T60_LN

EndCondition = Literal["pinned", "clamped"]
END_CONDITIONS: tuple[str, ...] = ("pinned", "clamped")

#: Largest B for which Fletcher's clamped-end factor stays within about 0.2 cent of the
#: exact clamped eigenvalues up to partial 30 (physics.md section 1; asserted in tests).
FLETCHER_CLAMPED_MAX_B = 4e-4

#: Default cap on the number of partials per key.
DEFAULT_MAX_PARTIALS = 256
#: Default audio sample rate.
DEFAULT_SAMPLE_RATE_HZ = 48_000.0
#: Partials are kept below this fraction of the sample rate (below Nyquist, with margin).
NYQUIST_FRACTION = 0.45

_BISECT_STEPS = 64  # halves a bracket of width pi to below float64 resolution


def _check_b(b: NDArray[np.float64]) -> None:
    if not np.all(np.isfinite(b)) or np.any(b < 0):
        raise ParameterError(f"inharmonicity b={b} must be finite and >= 0")


def pinned_ratios(b: ArrayLike, n: ArrayLike) -> NDArray[np.float64]:
    """Exact ``f_n / f0 = n sqrt(1 + B n^2)`` for a pinned stiff string.

    Parameters
    ----------
    b : array_like of float >= 0
        Inharmonicity coefficient(s); broadcast against ``n``.
    n : array_like of int >= 1
        Partial numbers.
    """
    b_arr = np.asarray(b, dtype=float)
    _check_b(b_arr)
    n_arr = np.asarray(n, dtype=float)
    return n_arr * np.sqrt(1.0 + b_arr * n_arr**2)


def fletcher_clamped_ratios(b: ArrayLike, n: ArrayLike) -> NDArray[np.float64]:
    """Fletcher's (1964) approximation for clamped ends; valid for ``B <= 4e-4`` only.

    ``f_n / f0 = n sqrt(1 + B n^2) (1 + 2 sqrt(B) / pi + 4 B / pi^2)``. Kept for
    comparison; :func:`clamped_ratios` gives the exact values used by the model.
    """
    b_arr = np.asarray(b, dtype=float)
    return pinned_ratios(b_arr, n) * (1.0 + 2.0 * np.sqrt(b_arr) / np.pi + 4.0 * b_arr / np.pi**2)


def _exp_tanh(y: NDArray[np.float64]) -> NDArray[np.float64]:
    """tanh(y) for y >= 0 written so that large y cannot overflow."""
    e = np.exp(-2.0 * y)
    return (1.0 - e) / (1.0 + e)


def _clamped_residual(k: NDArray[np.float64], eps: NDArray[np.float64], odd: NDArray[np.bool_]) -> NDArray[np.float64]:
    """End condition of the clamped stiff string, smooth in k (no poles).

    Symmetric modes (odd n): k sin(k/2) + kappa cos(k/2) tanh(kappa/2) = 0.
    Antisymmetric modes (even n): k cos(k/2) tanh(kappa/2) - kappa sin(k/2) = 0.
    """
    kappa = np.sqrt(k**2 + 1.0 / eps)
    t = _exp_tanh(kappa / 2.0)
    s, c = np.sin(k / 2.0), np.cos(k / 2.0)
    return np.where(odd, k * s + kappa * c * t, k * c * t - kappa * s)


def _clamped_wavenumbers(b: NDArray[np.float64], n: NDArray[np.float64]) -> NDArray[np.float64]:
    """Wavenumbers k_n (in units of 1/L) of the clamped stiff string, B > 0.

    The n-th root lies in (n pi, (n + 1/2) pi]: just above n pi for a nearly flexible
    string, (n + 1/2) pi for a clamped beam. Vectorised bisection on (n pi, (n+1) pi),
    where the residual changes sign exactly once.
    """
    eps = b / np.pi**2
    odd = (n.astype(np.int64) % 2) == 1
    lo = n * np.pi
    hi = (n + 1.0) * np.pi
    f_lo = _clamped_residual(lo, eps, odd)
    for _ in range(_BISECT_STEPS):
        mid = 0.5 * (lo + hi)
        f_mid = _clamped_residual(mid, eps, odd)
        same = np.sign(f_mid) == np.sign(f_lo)
        lo = np.where(same, mid, lo)
        f_lo = np.where(same, f_mid, f_lo)
        hi = np.where(same, hi, mid)
    return 0.5 * (lo + hi)


def clamped_ratios(b: ArrayLike, n: ArrayLike) -> NDArray[np.float64]:
    """Exact ``f_n / f0`` for a stiff string with clamped ends.

    Parameters
    ----------
    b : array_like of float >= 0
        Inharmonicity coefficient(s); broadcast against ``n``. ``B = 0`` gives ``n``.
    n : array_like of int >= 1
        Partial numbers.
    """
    b_arr, n_arr = np.broadcast_arrays(np.asarray(b, dtype=float), np.asarray(n, dtype=float))
    _check_b(b_arr)
    out = n_arr.copy()
    stiff = b_arr > 0
    if np.any(stiff):
        k = _clamped_wavenumbers(b_arr[stiff], n_arr[stiff])
        eps = b_arr[stiff] / np.pi**2
        out[stiff] = np.sqrt(k**2 + eps * k**4) / np.pi
    return out


def partial_ratios(b: ArrayLike, n: ArrayLike, *, end: EndCondition = "pinned") -> NDArray[np.float64]:
    """``f_n / f0`` for the chosen end condition (exact in both cases)."""
    if end == "pinned":
        return pinned_ratios(b, n)
    if end == "clamped":
        return clamped_ratios(b, n)
    raise ParameterError(f"end condition {end!r} must be one of {', '.join(END_CONDITIONS)}")


@dataclass(frozen=True)
class _ClampedBasis:
    """Wavenumbers, parities and normalisation of clamped modes (see mode_shapes)."""

    k: NDArray[np.float64]
    kappa: NDArray[np.float64]
    odd: NDArray[np.bool_]
    s: NDArray[np.float64]  # sin(k/2)
    c: NDArray[np.float64]  # cos(k/2)
    t: NDArray[np.float64]  # tanh(kappa/2)
    scale: NDArray[np.float64]  # sign and factor that normalise the shape like sin(n pi x)


def _clamped_basis(b: float, n_arr: NDArray[np.float64]) -> _ClampedBasis:
    _check_b(np.asarray(b, dtype=float))
    k = _clamped_wavenumbers(np.full(n_arr.shape, float(b)), n_arr)
    kappa = np.sqrt(k**2 + np.pi**2 / b)
    odd = (n_arr.astype(np.int64) % 2) == 1
    s, c = np.sin(k / 2.0), np.cos(k / 2.0)
    t = _exp_tanh(kappa / 2.0)
    # Closed-form integral of u^2 over the string; the cross terms vanish at an eigenvalue.
    e_y = np.exp(-kappa)
    sech2_half = 4.0 * e_y / (1.0 + e_y) ** 2  # 1/cosh^2(kappa/2)
    csch2_half = 4.0 * e_y / (1.0 - e_y) ** 2  # 1/sinh^2(kappa/2)
    norm = np.where(odd, 0.5 + np.sin(k) / (2.0 * k) + c**2 * (0.5 * sech2_half + t / kappa),
                    0.5 - np.sin(k) / (2.0 * k) + s**2 * (1.0 / (t * kappa) - 0.5 * csch2_half))
    # Match the sign of sin(n pi x): sin(n pi (a + 1/2)) = (-1)^((n-1)/2) cos(n pi a) for odd n,
    # (-1)^(n/2) sin(n pi a) for even n.
    ni = n_arr.astype(np.int64)
    sign = np.where(odd, (-1.0) ** ((ni - 1) // 2), (-1.0) ** (ni // 2))
    return _ClampedBasis(k=k, kappa=kappa, odd=odd, s=s, c=c, t=t, scale=sign * np.sqrt(0.5 / norm))


def mode_shapes(b: float, n: ArrayLike, x_over_l: ArrayLike, *, end: EndCondition = "pinned") -> NDArray[np.float64]:
    """Mode shapes ``u_n(x)``, shape ``(len(n), len(x))``.

    Normalised like ``sin(n pi x / L)``: ``integral_0^1 u_n^2 d(x/L) = 1/2`` and the same
    sign near the left end, so pinned and clamped modes are interchangeable in a modal
    model (modal mass ``mu L / 2``).

    Parameters
    ----------
    b : float >= 0
        Inharmonicity coefficient.
    n : array_like of int >= 1
        Partial numbers.
    x_over_l : array_like of float in [0, 1]
        Positions along the string as a fraction of the speaking length.
    end : {'pinned', 'clamped'}
        End condition.
    """
    n_arr = np.atleast_1d(np.asarray(n, dtype=float))[:, None]
    x = np.atleast_1d(np.asarray(x_over_l, dtype=float))[None, :]
    if np.any((x < 0) | (x > 1)):
        raise ParameterError("x_over_l must lie in 0..1")
    if end == "pinned" or b == 0:
        partial_ratios(b, 1, end=end)  # validates b and end
        return np.sin(n_arr * np.pi * x)
    if end != "clamped":
        raise ParameterError(f"end condition {end!r} must be one of {', '.join(END_CONDITIONS)}")
    cb = _clamped_basis(b, n_arr)
    a = x - 0.5  # centred coordinate: odd n are even functions of a, even n odd ones
    decay = np.exp(cb.kappa * (np.abs(a) - 0.5))  # cosh(kappa a)/cosh(kappa/2) without overflow
    e_a = np.exp(-2.0 * cb.kappa * np.abs(a))
    e_y = np.exp(-cb.kappa)
    cosh_ratio = decay * (1.0 + e_a) / (1.0 + e_y)
    sinh_ratio = np.sign(a) * decay * (1.0 - e_a) / (1.0 - e_y)
    u = np.where(cb.odd, np.cos(cb.k * a) - cb.c * cosh_ratio, np.sin(cb.k * a) - cb.s * sinh_ratio)
    return cb.scale * u


def bridge_force_factors(b: float, n: ArrayLike, *, end: EndCondition = "pinned") -> NDArray[np.float64]:
    """Force on the bridge per unit modal displacement, in units of ``T / L``.

    The string pulls on its end support with ``T u_x - E I u_xxx`` at ``x = L`` (tension
    times slope, plus the shear force of bending, which the flexible-string readout
    leaves out). With the shapes of :func:`mode_shapes`:

    * pinned: ``(-1)^n n pi (1 + B n^2)`` exactly;
    * clamped: the slope vanishes and only the shear remains, ``-(B / pi^2) u_xxx(1)``.

    Parameters
    ----------
    b : float >= 0
        Inharmonicity coefficient.
    n : array_like of int >= 1
        Partial numbers.
    end : {'pinned', 'clamped'}
        End condition.
    """
    n_arr = np.asarray(n, dtype=float)
    if end == "pinned" or b == 0:
        partial_ratios(b, 1, end=end)  # validates b and end
        return (-1.0) ** n_arr * n_arr * np.pi * (1.0 + b * n_arr**2)
    if end != "clamped":
        raise ParameterError(f"end condition {end!r} must be one of {', '.join(END_CONDITIONS)}")
    cb = _clamped_basis(b, n_arr)
    # Third derivative at a = 1/2 of the unnormalised shapes of mode_shapes().
    d3 = np.where(cb.odd, cb.k**3 * cb.s - cb.c * cb.kappa**3 * cb.t, -(cb.k**3) * cb.c - cb.s * cb.kappa**3 / cb.t)
    return -(b / np.pi**2) * cb.scale * d3


def loss_rates(freq_hz: ArrayLike, b1_per_s: float, b3_s: float) -> NDArray[np.float64]:
    """Amplitude decay rates ``sigma = b1 + b3 omega^2`` (Chaigne & Askenfelt 1994).

    Parameters
    ----------
    freq_hz : array_like of float
        Partial frequencies.
    b1_per_s : float >= 0
        Frequency-independent loss (air, internal friction), 1/s.
    b3_s : float >= 0
        Coefficient of the loss growing with frequency squared, s.
    """
    if b1_per_s < 0 or b3_s < 0:
        raise ParameterError(f"loss parameters b1={b1_per_s}, b3={b3_s} must be >= 0")
    omega = 2.0 * np.pi * np.asarray(freq_hz, dtype=float)
    return b1_per_s + b3_s * omega**2


def t60_s(sigma_per_s: ArrayLike) -> NDArray[np.float64]:
    """Time for a 60 dB fall, ``ln(1000) / sigma`` (infinite for a lossless mode)."""
    sigma = np.asarray(sigma_per_s, dtype=float)
    with np.errstate(divide="ignore"):
        return np.where(sigma > 0, T60_LN / np.where(sigma > 0, sigma, 1.0), np.inf)


def strike_weights(n: ArrayLike, strike_ratio: float) -> NDArray[np.float64]:
    """Excitation weight ``sin(n pi beta)`` of partial n for an ideal point strike.

    ``beta`` is the strike point as a fraction of the speaking length from the near
    (agraffe) end; partials with ``n beta`` an integer are not excited.
    """
    if not 0 < strike_ratio < 1:
        raise ParameterError(f"strike_ratio={strike_ratio} must lie in 0 < strike_ratio < 1")
    return np.sin(np.asarray(n, dtype=float) * np.pi * strike_ratio)


@dataclass(frozen=True)
class StringModes:
    """The partials of one string.

    Attributes
    ----------
    f0_hz : float
        Flexible-string fundamental ``c / 2L`` (the first partial sounds higher by
        ``ratio[0]``).
    b : float
        Inharmonicity coefficient.
    end : {'pinned', 'clamped'}
        End condition.
    n : ndarray of int
        Partial numbers 1..N.
    freq_hz : ndarray
        Partial frequencies.
    sigma_per_s : ndarray
        Amplitude decay rates.
    """

    f0_hz: float
    b: float
    end: EndCondition
    n: NDArray[np.int64]
    freq_hz: NDArray[np.float64]
    sigma_per_s: NDArray[np.float64]

    @property
    def omega(self) -> NDArray[np.float64]:
        """Angular frequencies, rad/s."""
        return 2.0 * np.pi * self.freq_hz

    @property
    def t60_s(self) -> NDArray[np.float64]:
        """60 dB decay time of each partial."""
        return t60_s(self.sigma_per_s)

    def shapes(self, x_over_l: ArrayLike) -> NDArray[np.float64]:
        """Mode shapes at the given positions, shape ``(N, len(x))``."""
        return mode_shapes(self.b, self.n, x_over_l, end=self.end)


def string_modes(
    f0_hz: float,
    b: float,
    *,
    end: EndCondition = "pinned",
    sample_rate_hz: float = DEFAULT_SAMPLE_RATE_HZ,
    max_partials: int = DEFAULT_MAX_PARTIALS,
    loss_b1_per_s: float = 0.0,
    loss_b3_s: float = 0.0,
    sigma_per_s: ArrayLike | None = None,
) -> StringModes:
    """Partials of a stiff string up to ``0.45 * sample_rate_hz`` and ``max_partials``.

    Parameters
    ----------
    f0_hz : float > 0
        Flexible-string fundamental ``c / 2L``.
    b : float >= 0
        Inharmonicity coefficient.
    end : {'pinned', 'clamped'}
        End condition.
    sample_rate_hz : float > 0
        Partials at or above ``NYQUIST_FRACTION * sample_rate_hz`` are left out.
    max_partials : int >= 1
        Cap on the number of partials.
    loss_b1_per_s, loss_b3_s : float >= 0
        Loss model ``sigma = b1 + b3 omega^2``; ignored when ``sigma_per_s`` is given.
    sigma_per_s : array_like, optional
        Decay rates given per partial (e.g. measured). Nothing is extrapolated: it must
        cover every partial kept, or a :class:`ParameterError` is raised.
    """
    if not f0_hz > 0:
        raise ParameterError(f"f0_hz={f0_hz} must be > 0")
    if not sample_rate_hz > 0:
        raise ParameterError(f"sample_rate_hz={sample_rate_hz} must be > 0")
    if max_partials < 1:
        raise ParameterError(f"max_partials={max_partials} must be >= 1")
    n_all = np.arange(1, max_partials + 1)
    freq = f0_hz * partial_ratios(b, n_all, end=end)
    keep = freq < NYQUIST_FRACTION * sample_rate_hz
    n, freq = n_all[keep], freq[keep]
    if sigma_per_s is None:
        sigma = loss_rates(freq, loss_b1_per_s, loss_b3_s)
    else:
        given = np.asarray(sigma_per_s, dtype=float)
        if given.ndim != 1 or len(given) < len(n) or np.any(given[: len(n)] < 0):
            raise ParameterError(
                f"sigma_per_s must give a rate >= 0 for each of the {len(n)} partials kept (got {given.shape})"
            )
        sigma = given[: len(n)].copy()
    return StringModes(f0_hz=float(f0_hz), b=float(b), end=end, n=n, freq_hz=freq, sigma_per_s=sigma)
