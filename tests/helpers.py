"""Building single-string contact problems for reference checks (not part of voicer)."""

from __future__ import annotations

import numpy as np

from voicer.physics.contact import ContactResult, simulate_contacts
from voicer.physics.strike import StepSettings, build_problem, coupling_weights
from voicer.physics.strings import StringModes, string_modes

# Chaigne & Askenfelt (1994, JASA 95, 1112), Table I, C4 (from memory; physics.md section 3):
CA_C4 = dict(length_m=0.62, string_mass_kg=3.93e-3, tension_n=670.0, eps=3.82e-5, b1=0.5, b3=6.25e-9,
             hammer_kg=2.97e-3, p=2.5, k=4.5e9, beta=0.12)


def ca_modes(*, lossless: bool = False, max_partials: int = 256, sample_rate_hz: float = 48_000.0) -> tuple[StringModes, float]:
    c = CA_C4
    mu = c["string_mass_kg"] / c["length_m"]
    f0 = np.sqrt(c["tension_n"] / mu) / (2 * c["length_m"])
    modes = string_modes(f0, c["eps"] * np.pi**2, loss_b1_per_s=0.0 if lossless else c["b1"],
                         loss_b3_s=0.0 if lossless else c["b3"], max_partials=max_partials,
                         sample_rate_hz=sample_rate_hz)
    return modes, mu


def single_string(speeds, *, modes: StringModes, mu: float, length_m: float, beta: float, width_m: float,
                  hammer_kg: float, k: float, p: float, hysteresis: float = 0.0, relaxation_s: float = 0.0,
                  modal_mass_scale: float = 1.0, steps: StepSettings = StepSettings(), record: bool = False,
                  max_time_s: float = 0.05):
    """One string, several blows; returns (problem, result)."""
    speeds = np.atleast_1d(np.asarray(speeds, dtype=float))
    h = len(speeds)
    g = coupling_weights(modes.b, modes.n, beta, width_m / length_m)
    problem = build_problem(
        labels=tuple(f"test blow at {v:g} m/s" for v in speeds), mass_kg=np.full(h, hammer_kg), speed_m_s=speeds,
        felt_k=np.full(h, k), felt_p=np.full(h, p), hysteresis=np.full(h, hysteresis),
        relaxation_s=np.full(h, relaxation_s), hammer=np.arange(h), share=np.ones(h), offset_m=np.zeros(h),
        omega=np.tile(modes.omega, (h, 1)), sigma=np.tile(modes.sigma_per_s, (h, 1)), coupling=np.tile(g, (h, 1)),
        modal_mass_kg=np.full(h, mu * length_m / 2 * modal_mass_scale), steps=steps)
    result: ContactResult = simulate_contacts(problem, record=record, max_time_s=max_time_s)
    return problem, result


def ca_blows(speeds, **overrides):
    """Chaigne & Askenfelt's C4 string and hammer; keyword arguments replace parameters."""
    c = dict(CA_C4)
    lossless = overrides.pop("lossless", False)
    modes, mu = ca_modes(lossless=lossless)
    args = dict(modes=modes, mu=mu, length_m=c["length_m"], beta=c["beta"], width_m=0.01,
                hammer_kg=c["hammer_kg"], k=c["k"], p=c["p"])
    args.update(overrides)
    return single_string(speeds, **args)


def string_energy(result: ContactResult, problem, row: int, modes_omega) -> float:
    """Energy of a lossless modal string after release: sum 2 m omega^2 |eta|^2."""
    eta = result.eta0[row] * np.exp(result.lam[row] * result.released_s[problem.hammer[row]])
    return float(np.sum(2.0 * problem.modal_mass_kg[row] * modes_omega**2 * np.abs(eta) ** 2))
