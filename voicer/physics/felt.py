"""Hammer felt force laws and the rigid-anvil contact they imply.

Laws (selectable per preset with ``[instrument] felt_law``):

* ``"power"``: ``F = K c^p`` for compression ``c > 0`` (Hall 1986, JASA 80; Boutillon
  1988, JASA 83, 746, who fitted p between about 2 and 5).
* ``"stulov"``: the hereditary law of Stulov (1995, JASA 97, 2577):
  ``F = K [c^p - (eps / tau0) integral_0^t c^p(s) exp((s - t) / tau0) ds]``. The integral
  is carried as a relaxing state ``z`` with ``dz/dt = (c^p - z) / tau0``, so
  ``F = K (c^p - eps z)``. Felt cannot pull: the force is clipped at zero.

The stiffness is given in the preset as ``felt_force_1mm_n``, the force at 1 mm
compression, so ``K = F1 / (1 mm)^p``; a hammer striking S strings shares its felt among
them, each string taking ``K / S``.
"""

from __future__ import annotations

__all__ = [
    "FELT_LAWS",
    "MM",
    "felt_k",
    "anvil_max_compression_m",
    "anvil_contact_s",
    "felt_force",
    "relax_weights",
    "relax_state",
]

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray

#: Force laws known to the contact simulation.
FELT_LAWS: tuple[str, ...] = ("power", "stulov")
#: One millimetre in metres (the reference compression of ``felt_force_1mm_n``).
MM = 1e-3


def felt_k(force_1mm_n: ArrayLike, exponent: ArrayLike) -> NDArray[np.float64]:
    """``K`` in N/m^p of a felt that pushes ``force_1mm_n`` at 1 mm compression."""
    return np.asarray(force_1mm_n, dtype=float) / MM ** np.asarray(exponent, dtype=float)


def anvil_max_compression_m(mass_kg: ArrayLike, k: ArrayLike, p: ArrayLike, speed_m_s: ArrayLike) -> NDArray[np.float64]:
    """Largest compression of a power-law felt hitting a rigid anvil (energy balance).

    ``M v^2 / 2 = K c^(p+1) / (p+1)``.
    """
    m, kk, pp, v = (np.asarray(a, dtype=float) for a in (mass_kg, k, p, speed_m_s))
    return ((pp + 1.0) * m * v**2 / (2.0 * kk)) ** (1.0 / (pp + 1.0))


def _shape_integral(p: float) -> float:
    """integral_0^1 du / sqrt(1 - u^(p+1)) = sqrt(pi) Gamma(1 + a) / Gamma(1/2 + a), a = 1/(p+1)."""
    a = 1.0 / (p + 1.0)
    return math.sqrt(math.pi) * math.exp(math.lgamma(1.0 + a) - math.lgamma(0.5 + a))


def anvil_contact_s(mass_kg: ArrayLike, k: ArrayLike, p: ArrayLike, speed_m_s: ArrayLike) -> NDArray[np.float64]:
    """Contact duration of a hammer on a rigid anvil with a lossless power-law felt.

    ``T = (2 c_max / v) integral_0^1 du / sqrt(1 - u^(p+1))``; for p = 1 this is half the
    period of the mass on the felt spring, ``pi sqrt(M / K)``. It is a lower bound for a
    real string, which yields and lengthens the contact; the simulation uses it to choose
    its time step.
    """
    p_arr = np.asarray(p, dtype=float)
    shape = np.vectorize(_shape_integral, otypes=[float])(p_arr)
    v = np.asarray(speed_m_s, dtype=float)
    return 2.0 * anvil_max_compression_m(mass_kg, k, p_arr, v) / v * shape


def felt_force(c_pow_p: NDArray[np.float64], k: NDArray[np.float64], z: NDArray[np.float64] | None = None,
               hysteresis: NDArray[np.float64] | None = None) -> NDArray[np.float64]:
    """Felt force from ``c^p`` (zero where not in contact), and for the Stulov law its state.

    Parameters
    ----------
    c_pow_p : ndarray
        ``max(c, 0) ** p``.
    k : ndarray
        Stiffness ``K`` (share of this string).
    z, hysteresis : ndarray, optional
        Relaxing state and Stulov's ``eps`` (both or neither).
    """
    if z is None:
        return k * c_pow_p
    force = k * (c_pow_p - hysteresis * z)
    return np.where(c_pow_p > 0, np.maximum(force, 0.0), 0.0)


def relax_weights(decay: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Weights of one step of Stulov's state, for ``decay = exp(-dt / tau0)`` in (0, 1).

    Integrating ``dz/dt = (c^p - z) / tau0`` exactly for ``c^p`` linear over the step gives
    ``z' = z decay + w0 before + w1 after`` with ``r = dt / tau0``,
    ``w1 = 1 - (1 - decay) / r`` and ``w0 = 1 - decay - w1``.
    """
    r = -np.log(decay)
    w1 = 1.0 - (1.0 - decay) / r
    return (1.0 - decay) - w1, w1


def relax_state(z: NDArray[np.float64], decay: NDArray[np.float64], weights: tuple[NDArray[np.float64], NDArray[np.float64]],
                before: NDArray[np.float64], after: NDArray[np.float64]) -> NDArray[np.float64]:
    """Advance Stulov's state one step; ``before`` and ``after`` are ``c^p`` at the step ends."""
    w0, w1 = weights
    return z * decay + before * w0 + after * w1
