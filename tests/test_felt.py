"""Felt laws and the hammer on a rigid anvil, against closed forms (physics.md section 3)."""

from __future__ import annotations

import numpy as np
import pytest
from helpers import ca_modes, single_string

from voicer.physics.felt import anvil_contact_s, felt_k, relax_state, relax_weights
from voicer.physics.strike import StepSettings


def test_anvil_contact_check_value() -> None:
    # physics.md check value ([calc], ODE to 1e-14): p 2.5, M 2.97 g, K 4.5e9, v 2 m/s
    # gives 0.7796 ms, tolerance 1e-3 relative.
    assert float(anvil_contact_s(2.97e-3, 4.5e9, 2.5, 2.0)) * 1e3 == pytest.approx(0.7796, rel=1e-3)


def test_linear_felt_is_half_a_spring_period() -> None:
    # p = 1: the mass on a spring, T = pi sqrt(M / K), independent of speed (physics.md, 1).
    t = anvil_contact_s(5e-3, 2e5, 1.0, np.array([0.5, 2.0, 5.0]))
    np.testing.assert_allclose(t, np.pi * np.sqrt(5e-3 / 2e5), rtol=1e-12)


def test_felt_force_at_one_millimetre() -> None:
    # Chaigne & Askenfelt's C4 felt, K = 4.5e9 N/m^2.5, pushes about 142 N at 1 mm.
    assert float(felt_k(4.5e9 * 1e-3**2.5, 2.5)) == pytest.approx(4.5e9, rel=1e-12)


def rigid(speeds, **kw):
    """The C&A hammer on a string a million times heavier: effectively an anvil."""
    modes, mu = ca_modes(lossless=True)
    return single_string(speeds, modes=modes, mu=mu, length_m=0.62, beta=0.12, width_m=0.01,
                         hammer_kg=2.97e-3, k=4.5e9, p=2.5, modal_mass_scale=1e6, **kw)


def test_simulated_anvil_matches_closed_form() -> None:
    speeds = np.array([0.5, 1.0, 2.0, 4.0])
    problem, result = rigid(speeds)
    expected = anvil_contact_s(2.97e-3, 4.5e9, 2.5, speeds)
    # Contact ends on the step after compression returns to zero: within one step.
    assert np.all(np.abs(result.contact_s - expected) <= 1.01 * problem.dt_s)
    np.testing.assert_allclose(result.rebound_m_s, speeds, rtol=1e-3)  # lossless: rebound = v (physics.md, 4)


def test_rigid_support_scaling_laws() -> None:
    """physics.md constant-free assertion 1: on a rigid support T_c ~ v^(-(p-1)/(p+1)) and
    F_max ~ v^(2p/(p+1))."""
    speeds = np.array([0.5, 1.0, 2.0, 4.0])
    _, r = rigid(speeds, steps=StepSettings(scale=0.25))
    p = 2.5
    slope_t = np.polyfit(np.log(speeds), np.log(r.contact_s), 1)[0]
    slope_f = np.polyfit(np.log(speeds), np.log(r.peak_force_n), 1)[0]
    assert slope_t == pytest.approx(-(p - 1) / (p + 1), abs=0.01)
    assert slope_f == pytest.approx(2 * p / (p + 1), abs=0.01)


def test_hysteresis_loses_energy_and_never_pulls() -> None:
    """Stulov (1995) felt: rebound slower than the blow, force never negative (physics.md, 4)."""
    _, elastic = rigid([2.0], record=True)
    _, lossy = rigid([2.0], hysteresis=0.3, relaxation_s=300e-6, record=True)
    assert lossy.rebound_m_s[0] < 0.95 * elastic.rebound_m_s[0]
    assert np.all(lossy.force_n[0] >= 0)


def test_relaxation_step_is_exact_for_linear_input() -> None:
    # dz/dt = (u - z) / tau with u linear over the step: compare with the closed form
    # integrated by scipy.integrate.solve_ivp (general-purpose reference).
    from scipy.integrate import solve_ivp

    tau, dt, z0, u0, u1 = 2e-4, 5e-5, 0.3, 1.0, 2.0
    sol = solve_ivp(lambda t, z: (u0 + (u1 - u0) * t / dt - z) / tau, (0, dt), [z0], rtol=1e-12, atol=1e-14)
    decay = np.array([np.exp(-dt / tau)])
    got = relax_state(np.array([z0]), decay, relax_weights(decay), np.array([u0]), np.array([u1]))
    assert got[0] == pytest.approx(sol.y[0, -1], rel=1e-9)


def test_hysteretic_anvil_blow_matches_direct_integration() -> None:
    # Stulov (1995, JASA 97, 2577) felt on a rigid anvil, integrated directly with scipy's
    # solve_ivp: M y'' = -K (y^p - eps z), z' = (y^p - z) / tau0 (y the compression; the
    # force clipped at zero, as felt cannot pull), from y = 0 at the hammer's speed, until
    # the felt stops pushing. The contact kernel (string 10^6 times heavier) must give the
    # same contact time and rebound speed; tolerance: its time step (contact ends on the
    # step after release) and 1 % on the rebound.
    from scipy.integrate import solve_ivp

    m, k, p, eps, tau = 2.97e-3, 4.5e9, 2.5, 0.3, 300e-6
    speeds = np.array([1.0, 3.0])
    problem, result = rigid(speeds, hysteresis=eps, relaxation_s=tau)
    for i, v in enumerate(speeds):
        def rhs(t, s):
            y, dy, z = s
            yp = max(y, 0.0) ** p
            force = max(k * (yp - eps * z), 0.0)
            return [dy, -force / m, (yp - z) / tau]

        def released(t, s):  # the felt stops pushing (it may still be compressed, relaxing)
            return k * (max(s[0], 0.0) ** p - eps * s[2]) if t > 1e-6 else 1.0
        released.terminal, released.direction = True, -1
        sol = solve_ivp(rhs, (0.0, 0.02), [0.0, v, 0.0], events=released, rtol=1e-10, atol=1e-14, max_step=1e-6)
        contact, rebound = sol.t_events[0][0], -sol.y_events[0][0][1]
        assert abs(result.contact_s[i] - contact) <= 1.01 * problem.dt_s[i], (v, result.contact_s[i], contact)
        assert result.rebound_m_s[i] == pytest.approx(rebound, rel=0.01)
        assert rebound < 0.95 * v  # the loop loses energy
