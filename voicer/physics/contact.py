"""Batched hammer-string contact: the hot kernel of the table builder.

Many cases run at once as numpy arrays. A *hammer case* is one blow (a key at one
hammer speed); its hammer, a rigid mass ``M`` with initial speed ``v0``, strikes the S
strings of the unison, each a *row*: a modal string whose modes n have angular frequency
``omega_n``, decay rate ``sigma_n``, modal mass ``m = mu L / 2`` and coupling
``g_n = sin(n pi beta) sinc(n w / 2L)`` (the mode shape averaged over a hammer of width w
at the strike ratio beta). The felt compression of row s is
``c_s = y - sum_n g_n q_n + offset_s`` (hammer position minus the string displacement
averaged over the hammer width; ``offset_s`` raises a string that meets the hammer early,
a mating fault), the felt force ``F_s`` follows :mod:`voicer.physics.felt`, and is spread
over the hammer width with the same ``g_n``.

The modes above those simulated still yield under the force; being far above the
pulse's frequencies they do so quasi-statically, so their sum is carried as a residual
compliance ``C`` (static flexibility, a standard correction of truncated modal models):
``c_s = ... - C_s F_s``, solved with the felt law by Newton's method at every step.

Time stepping is Strang splitting (kick-drift-kick, merged as leapfrog): the free string
is advanced exactly (each mode as ``eta <- eta exp(lambda dt)``, ``lambda = -sigma + i
omega_d``, with ``q = 2 Re(eta)``), the hammer moves freely, and the felt force acts as
impulses. Without losses and hysteresis the scheme is symplectic (energy error bounded,
second order in dt); with them each part is still integrated exactly.

A case has *released* when no string is in contact, the hammer moves away, and it is
farther than the largest displacement the strings can still reach at the hammer
(``sum |2 eta g|``), so no later contact is possible; re-contacts before that (in the
bass, where the reflection from the near end returns during contact) are simulated.
"""

from __future__ import annotations

__all__ = ["ContactProblem", "ContactResult", "simulate_contacts", "DEFAULT_MAX_TIME_S"]

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..errors import VoicerError
from .felt import felt_force, relax_state, relax_weights

#: A blow that has not released after this long is an error, not a hang.
DEFAULT_MAX_TIME_S = 0.05
_CHECK_EVERY = 8  # steps between release checks (and compaction of finished cases)
_NEWTON_STEPS = 2  # C k_eff < 1: from c0, two steps leave an error below 1e-10 dB in the partials


@dataclass(frozen=True)
class ContactProblem:
    """Inputs of a batch of contacts; H hammer cases, R string rows, N modes (padded).

    Attributes
    ----------
    mass_kg, speed_m_s, dt_s : ndarray (H,)
        Hammer mass, initial speed and time step of each case.
    labels : tuple of str (H,)
        How to name a case in an error message ("key 40 at 2.31 m/s").
    hammer : ndarray of int (R,)
        Case of each row.
    k, p : ndarray (R,)
        Felt law ``F = k c^p`` of the row's share of the felt.
    hysteresis, relax_decay : ndarray (R,)
        Stulov's ``eps`` and ``exp(-dt / tau0)``; ``eps = 0`` is the power law.
    offset_m : ndarray (R,)
        How much nearer the hammer the string sits (mating).
    omega, sigma : ndarray (R, N)
        Undamped angular frequency and decay rate of each mode (padding: any value).
    coupling : ndarray (R, N)
        ``g_n``; zero for padding modes, which then never move.
    modal_mass_kg : ndarray (R,)
        ``mu L / 2``.
    residual_m_per_n : ndarray (R,)
        Static compliance of the modes left out, ``sum g_n^2 / (m omega_n^2)``.
    """

    mass_kg: NDArray[np.float64]
    speed_m_s: NDArray[np.float64]
    dt_s: NDArray[np.float64]
    labels: tuple[str, ...]
    hammer: NDArray[np.int64]
    k: NDArray[np.float64]
    p: NDArray[np.float64]
    hysteresis: NDArray[np.float64]
    relax_decay: NDArray[np.float64]
    offset_m: NDArray[np.float64]
    omega: NDArray[np.float64]
    sigma: NDArray[np.float64]
    coupling: NDArray[np.float64]
    modal_mass_kg: NDArray[np.float64]
    residual_m_per_n: NDArray[np.float64]


@dataclass(frozen=True)
class ContactResult:
    """Outputs of :func:`simulate_contacts`.

    Attributes
    ----------
    eta0 : ndarray complex (R, N)
        Free vibration after the blow, referred back to the first touch ``t = 0``:
        ``q_n(t) = 2 Re(eta0_n exp(lambda_n t))`` once the hammer has left.
    lam : ndarray complex (R, N)
        ``lambda_n = -sigma_n + i omega_d``.
    contact_s : ndarray (H,)
        Time from the first touch to the end of the last contact.
    peak_force_n : ndarray (H,)
        Largest total felt force.
    rebound_m_s : ndarray (H,)
        Hammer speed away from the strings after release.
    contacts : ndarray of int (H,)
        Number of separate contacts (more than one: re-contact).
    released_s : ndarray (H,)
        When the release was established.
    force_n : list of ndarray or None
        Total felt force at every step of each case (``record=True``), step ``dt_s``.
    """

    eta0: NDArray[np.complex128]
    lam: NDArray[np.complex128]
    contact_s: NDArray[np.float64]
    peak_force_n: NDArray[np.float64]
    rebound_m_s: NDArray[np.float64]
    contacts: NDArray[np.int64]
    released_s: NDArray[np.float64]
    force_n: list[NDArray[np.float64]] | None


def _yield_residual(c0: NDArray[np.float64], compliance: NDArray[np.float64], k_a: NDArray[np.float64],
                    f_b: NDArray[np.float64] | float, p: NDArray[np.float64]) -> NDArray[np.float64]:
    """Compression ``c`` with ``c + C (k_a c^p - f_b) = c0`` where the felt pushes, else ``c0``.

    The left side is convex and increasing in c, so Newton's method started at ``c0``
    (at or above the root) converges monotonically from above.
    """
    pushing = (c0 > 0) & (k_a * np.maximum(c0, 0.0) ** p > f_b)
    c = c0.copy()
    for _ in range(_NEWTON_STEPS):
        cpos = np.maximum(c, 1e-300)
        cpm1 = cpos ** (p - 1.0)
        h = c + compliance * (k_a * cpm1 * cpos - f_b) - c0
        c = np.where(pushing, c - h / (1.0 + compliance * k_a * p * cpm1), c0)
    return c


def simulate_contacts(problem: ContactProblem, *, max_time_s: float = DEFAULT_MAX_TIME_S,
                      record: bool = False) -> ContactResult:
    """Integrate every blow of the batch until it has released.

    Raises
    ------
    VoicerError
        If a case has not released after ``max_time_s``, naming it by its label.
    """
    pb = problem
    n_cases, (n_rows, n_modes) = len(pb.mass_kg), pb.omega.shape
    omega_d = np.sqrt(np.maximum(pb.omega**2 - pb.sigma**2, 0.0))
    omega_d = np.where(omega_d > 0, omega_d, pb.omega)  # overdamped padding: keep finite
    lam = -pb.sigma + 1j * omega_d
    dt_row = pb.dt_s[pb.hammer]
    # Per unit force, a kick of dt adds dq' = g dt / m, i.e. d eta = g dt / (m 2 i omega_d).
    kick_all = pb.coupling * (dt_row / pb.modal_mass_kg)[:, None] / (2j * omega_d)
    rot_all = np.exp(lam * dt_row[:, None])
    g2_all = 2.0 * pb.coupling

    eta_out = np.zeros((n_rows, n_modes), dtype=complex)
    contact_s = np.zeros(n_cases)
    peak = np.zeros(n_cases)
    rebound = np.zeros(n_cases)
    contacts = np.zeros(n_cases, dtype=np.int64)
    released = np.zeros(n_cases)
    history: list[list[float]] | None = [[] for _ in range(n_cases)] if record else None
    hysteretic = bool(np.any(pb.hysteresis > 0))

    # Working set of the blows still in flight, compacted as blows finish: per-row arrays
    # in `r`, per-case arrays in `h`; r["local"] maps a row to its case's position in h.
    w0, w1 = relax_weights(pb.relax_decay)
    r = {"row": np.arange(n_rows), "local": pb.hammer.copy(), "eta": np.zeros((n_rows, n_modes), dtype=complex),
         "rot": rot_all, "kick": kick_all, "g2": g2_all, "absg2": np.abs(g2_all), "k": pb.k, "p": pb.p,
         "eps": pb.hysteresis, "decay": pb.relax_decay, "w0": w0, "w1": w1, "off": pb.offset_m,
         "res": pb.residual_m_per_n, "cp": np.zeros(n_rows), "z": np.zeros(n_rows),
         "tmp": np.empty((n_rows, n_modes), dtype=complex)}
    reach = np.full(n_cases, -np.inf)
    np.maximum.at(reach, pb.hammer, pb.offset_m)
    h = {"case": np.arange(n_cases), "mass": pb.mass_kg.copy(), "dt": pb.dt_s.copy(),
         "y": -reach,  # the nearest string just touches at t = 0
         "v": pb.speed_m_s.copy(), "touching": np.zeros(n_cases, dtype=bool),
         "contacts": np.zeros(n_cases, dtype=np.int64), "last": np.zeros(n_cases, dtype=np.int64),
         "peak": np.zeros(n_cases)}
    step = 0
    while len(h["case"]):
        step += 1
        eta, local = r["eta"], r["local"]
        eta *= r["rot"]
        h["y"] += h["v"] * h["dt"]
        c = h["y"][local] - np.einsum("ij,ij->i", eta.real, r["g2"]) + r["off"]
        if c.max() > 0:
            cp = r["cp"]
            if hysteretic:
                # F = k (c^p - eps z'), z' linear in c^p: F = k_a c^p - f_b.
                k_a = r["k"] * (1.0 - r["eps"] * r["w1"])
                f_b = r["k"] * r["eps"] * (r["z"] * r["decay"] + cp * r["w0"])
            else:
                k_a, f_b = r["k"], 0.0
            c = _yield_residual(c, r["res"], k_a, f_b, r["p"])
            cp_new = np.where(c > 0, np.maximum(c, 0.0) ** r["p"], 0.0)
            if hysteretic:
                r["z"] = relax_state(r["z"], r["decay"], (r["w0"], r["w1"]), cp, cp_new)
                force = felt_force(cp_new, r["k"], r["z"], r["eps"])
            else:
                force = felt_force(cp_new, r["k"])
            r["cp"] = cp_new
            total = np.bincount(local, weights=force, minlength=len(h["case"]))
            h["v"] -= total * h["dt"] / h["mass"]
            np.multiply(r["kick"], force[:, None], out=r["tmp"])
            eta += r["tmp"]
            touching = total > 0
            h["contacts"] += touching & ~h["touching"]
            h["last"][touching] = step
            np.maximum(h["peak"], total, out=h["peak"])
        else:
            if hysteretic:
                r["z"] = relax_state(r["z"], r["decay"], (r["w0"], r["w1"]), r["cp"], 0.0)
            r["cp"][:] = 0.0
            total = np.zeros(len(h["case"]))
            touching = total > 0
        h["touching"] = touching
        if history is not None:
            for i, case in enumerate(h["case"]):
                history[case].append(float(total[i]))

        if step % _CHECK_EVERY:
            continue
        # Farthest a string can still come toward the hammer: offset + sum |2 eta g|.
        can_reach = np.full(len(h["case"]), -np.inf)
        np.maximum.at(can_reach, local, r["off"] + np.einsum("ij,ij->i", np.abs(eta), r["absg2"]))
        done = ~touching & (h["v"] < 0) & (h["y"] + can_reach < 0)
        t_now = step * h["dt"]
        late = ~done & (t_now > max_time_s)
        if np.any(late):
            label = pb.labels[int(h["case"][np.flatnonzero(late)[0]])]
            raise VoicerError(f"the hammer did not leave the strings within {max_time_s * 1e3:g} ms for {label}; "
                              "check the felt and hammer parameters of this key")
        if not np.any(done):
            continue
        finished = h["case"][done]
        rebound[finished] = -h["v"][done]
        released[finished] = t_now[done]
        contact_s[finished] = h["last"][done] * h["dt"][done]
        contacts[finished] = h["contacts"][done]
        peak[finished] = h["peak"][done]
        row_done = done[local]
        rows_out = r["row"][row_done]
        # Refer the free vibration back to the first touch.
        eta_out[rows_out] = eta[row_done] * np.exp(-lam[rows_out] * t_now[local[row_done]][:, None])
        keep, keep_rows = ~done, ~row_done
        new_pos = np.cumsum(keep) - 1
        r = {name: a[keep_rows] for name, a in r.items()}
        r["local"] = new_pos[r["local"]]
        h = {name: a[keep] for name, a in h.items()}

    force_n = [np.asarray(h) for h in history] if history is not None else None
    return ContactResult(eta0=eta_out, lam=lam, contact_s=contact_s, peak_force_n=peak, rebound_m_s=rebound,
                         contacts=contacts, released_s=released, force_n=force_n)
