"""Setting up blows for the contact kernel: couplings, felt shares and the time step.

:func:`build_problem` turns per-blow hammer data and per-string modal data into a
:class:`~voicer.physics.contact.ContactProblem`, choosing each blow's time step as the
smallest of three limits:

* resolution of the pulse: the rigid-anvil contact time over ``steps_per_contact``
  (the real contact is longer, the string yields);
* stability of the felt spring against the hammer and the string under it:
  ``omega_c dt <= stability`` with ``omega_c^2 = k_eff (1/M + sum g_n^2 / m)`` and
  ``k_eff = p K c_max^(p-1)`` at the anvil's largest compression (an upper bound);
* no aliasing of the kicks into the highest mode: ``omega_max dt <= alias``.
"""

from __future__ import annotations

__all__ = ["StepSettings", "coupling_weights", "residual_compliance", "build_problem"]

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..errors import ParameterError
from .contact import ContactProblem
from .felt import anvil_contact_s, anvil_max_compression_m
from .strings import EndCondition, mode_shapes, partial_ratios

_WIDTH_NODES = 16  # Gauss-Legendre nodes for averaging clamped mode shapes over the hammer


@dataclass(frozen=True)
class StepSettings:
    """Time-step rules of the contact simulation (see the module docstring).

    Attributes
    ----------
    steps_per_contact : float > 0
        Steps per rigid-anvil contact time.
    stability : float > 0
        Largest ``omega_c dt`` (leapfrog is stable below 2).
    alias : float > 0
        Largest ``omega_max dt``.
    scale : float > 0
        Multiplies every step (0.5 halves them: convergence checks).
    """

    steps_per_contact: float = 120.0
    stability: float = 0.5
    alias: float = np.pi / 2
    scale: float = 1.0

    def __post_init__(self) -> None:
        for name in ("steps_per_contact", "stability", "alias", "scale"):
            if not getattr(self, name) > 0:
                raise ParameterError(f"{name}={getattr(self, name)} must be > 0")


def coupling_weights(b: float, n: NDArray[np.int64], strike_ratio: float, width_over_length: float,
                     *, end: EndCondition = "pinned") -> NDArray[np.float64]:
    """Mode shapes averaged over a uniform hammer of the given width at the strike point.

    Pinned: ``sin(n pi beta) sinc(n w / 2L)`` exactly (physics.md section 6). Clamped:
    the exact shapes averaged by Gauss-Legendre quadrature.
    """
    if not 0 < strike_ratio < 0.5:
        raise ParameterError(f"strike_ratio={strike_ratio} must lie in 0 < strike_ratio < 0.5")
    half = width_over_length / 2
    if not 0 < half < strike_ratio:
        raise ParameterError(f"hammer width {width_over_length:g} L must be > 0 and fit between the strike "
                             f"point {strike_ratio:g} L and the string end")
    n_f = np.asarray(n, dtype=float)
    if end == "pinned":
        return np.sin(n_f * np.pi * strike_ratio) * np.sinc(n_f * width_over_length / 2)
    nodes, weights = np.polynomial.legendre.leggauss(_WIDTH_NODES)
    x = strike_ratio + half * nodes
    return mode_shapes(b, n, x, end=end) @ weights / 2


def residual_compliance(b: float, f0_hz: float, first_left_out: int, strike_ratio: float, width_over_length: float,
                        modal_mass_kg: float, *, end: EndCondition = "pinned") -> float:
    """Static compliance ``sum g_n^2 / (m omega_n^2)`` of the modes from ``first_left_out`` up.

    The terms fall at least as ``n^-4`` (``g_n`` as 1/n beyond the hammer width,
    ``omega_n`` as n or faster), so the sum is taken over 16 times as many modes as are
    simulated, leaving a relative error below 1e-4.
    """
    n = np.arange(first_left_out, 16 * first_left_out + 1)
    g = coupling_weights(b, n, strike_ratio, width_over_length, end=end)
    omega = 2.0 * np.pi * f0_hz * partial_ratios(b, n, end=end)
    return float(np.sum(g**2 / omega**2) / modal_mass_kg)


def build_problem(
    *,
    labels: tuple[str, ...],
    mass_kg: NDArray[np.float64],
    speed_m_s: NDArray[np.float64],
    felt_k: NDArray[np.float64],
    felt_p: NDArray[np.float64],
    hysteresis: NDArray[np.float64],
    relaxation_s: NDArray[np.float64],
    hammer: NDArray[np.int64],
    share: NDArray[np.float64],
    offset_m: NDArray[np.float64],
    omega: NDArray[np.float64],
    sigma: NDArray[np.float64],
    coupling: NDArray[np.float64],
    modal_mass_kg: NDArray[np.float64],
    residual_m_per_n: NDArray[np.float64] | None = None,
    steps: StepSettings = StepSettings(),
) -> ContactProblem:
    """Assemble a batch; per blow (H): hammer and felt, per string row (R): modes.

    ``felt_k`` is the whole hammer's stiffness; row r takes ``share[r]`` of it (1/S for a
    unison of S strings). ``omega``, ``sigma`` and ``coupling`` are (R, N), padded with
    zero coupling. ``residual_m_per_n`` is each row's static compliance of the modes left
    out (:func:`residual_compliance`; default none).
    """
    anvil = anvil_contact_s(mass_kg, felt_k, felt_p, speed_m_s)
    c_max = anvil_max_compression_m(mass_kg, felt_k, felt_p, speed_m_s)
    k_eff = felt_p * felt_k * c_max ** (felt_p - 1.0)
    string_compliance = np.sum(coupling**2, axis=1) / modal_mass_kg  # 1/kg, per row
    worst_row = np.zeros(len(mass_kg))
    np.maximum.at(worst_row, hammer, share * string_compliance)
    omega_c = np.sqrt(k_eff * (1.0 / mass_kg + worst_row))
    omega_max = np.zeros(len(mass_kg))
    np.maximum.at(omega_max, hammer, np.max(np.where(coupling != 0, omega, 0.0), axis=1))
    dt = steps.scale * np.minimum.reduce([
        anvil / steps.steps_per_contact,
        steps.stability / omega_c,
        steps.alias / np.maximum(omega_max, 1e-30),
    ])
    # exp(-dt / tau0); rows without hysteresis get any value in (0, 1): their state is unused.
    tau = np.where(relaxation_s > 0, relaxation_s, dt)
    decay = np.exp(-dt / tau)[hammer]
    # Between kicks, a mode far above the pulse's band answers a slowly varying force with
    # only (theta/2) cot(theta/2) of its static deflection, theta = omega dt (the fixed
    # point of kick-and-rotate); the rest of its compliance joins the residual term.
    theta = np.minimum(omega * dt[hammer][:, None], np.pi / 2 * 1.0001)
    with np.errstate(invalid="ignore", divide="ignore"):
        kept = np.where(theta > 0, (theta / 2) / np.tan(theta / 2), 1.0)
    lag = np.sum(coupling**2 / np.where(omega > 0, omega, 1.0) ** 2 * (1.0 - kept), axis=1) / modal_mass_kg
    residual = (np.zeros(len(hammer)) if residual_m_per_n is None else np.asarray(residual_m_per_n, dtype=float))
    return ContactProblem(
        mass_kg=np.asarray(mass_kg, dtype=float), speed_m_s=np.asarray(speed_m_s, dtype=float), dt_s=dt,
        labels=labels, hammer=np.asarray(hammer, dtype=np.int64),
        k=share * felt_k[hammer], p=felt_p[hammer], hysteresis=hysteresis[hammer], relax_decay=decay,
        offset_m=np.asarray(offset_m, dtype=float), omega=omega, sigma=sigma, coupling=coupling,
        modal_mass_kg=np.asarray(modal_mass_kg, dtype=float),
        residual_m_per_n=residual + lag)
