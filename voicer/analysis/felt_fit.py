"""Felt stiffness (and exponent) of one hammer from measured partial levels.

The contact simulation predicts each partial's level for a felt (force at 1 mm ``F1``,
exponent ``p``) and a hammer speed. The fit matches those levels to the measured ones in
dB with scipy.optimize.least_squares, one hammer speed per strike and one recording gain
per take (the microphone's level is unknown).

What a recording can tell. On a rigid support a power-law blow is self-similar: its
spectrum's shape depends on the contact time only, T_c ~ (M/K)^(1/(p+1)) v^(-(p-1)/(p+1))
(physics.md, "constant-free hammer assertions" 1-2). So one strike of unknown speed and
unknown gain fixes the *combination* of felt and speed that sets the tone, not both: a
harder felt played softer sounds the same. The fit therefore takes a prior on each
strike's speed (from its dynamic marking through the preset's velocity map, or a broad
one) and a broad prior on the felt around the base preset; the uncertainties it reports
include that, and are small only where the data decide (a known gain, or several dynamics
of one key, which also fix p from how the spectrum changes with level). Since the tone is
set by the combination, the fitted preset plays like the recording at the assumed speed.

The levels are weighted by their scatter about the model as the fit shows it (never
below LEVEL_SCATTER_DB), so that detail no felt explains does not outweigh the priors.

For speed, the simulation is run once on a grid (felt x speed, all speeds of a felt in one
batch) and the fit moves on smooth splines of the grid's levels.
"""

from __future__ import annotations

__all__ = ["StrikeLevels", "FeltFit", "fit_felt", "LEVEL_SCATTER_DB"]

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from numpy.typing import NDArray
from scipy.interpolate import RectBivariateSpline
from scipy.optimize import least_squares

from ..tone.preset import Preset
from ..tone.tables import TableSettings, simulate_variants

#: Scatter of measured partial levels around any smooth model, dB (common practice: the
#: soundboard and the room add several dB of partial-to-partial detail; from memory).
LEVEL_SCATTER_DB = 2.0
#: Prior widths, as factors (one standard deviation in log).
SPEED_PRIOR_FACTOR = 1.5      # speed from a dynamic marking
BROAD_SPEED_PRIOR_FACTOR = 2.5
FELT_PRIOR_FACTOR = 4.0
#: Grid of the surrogate: felt around the base, speeds over the playing range.
FELT_SPAN = 8.0
FELT_POINTS = 11
SPEED_RANGE_M_S = (0.25, 10.0)
SPEED_POINTS = 16
EXPONENT_STEPS = (-0.6, -0.3, 0.0, 0.3, 0.6)
ZOOM, ZOOM_POINTS = 1.25, 5
#: Partials more than this below a strike's strongest are left out: a strike-point null or
#: the noise floor, not a level the felt sets.
DYNAMIC_RANGE_DB = 45.0


@dataclass(frozen=True)
class StrikeLevels:
    """The measured partial levels of one strike.

    Attributes
    ----------
    n : ndarray of int
        Partial numbers.
    level_db : ndarray
        Levels at the onset, dB re full scale of the recording.
    take : str
        Recordings sharing a take share one gain.
    speed_prior_m_s : float or None
        Expected hammer speed (from the dynamic marking), or None for a broad prior.
    """

    n: NDArray[np.int64]
    level_db: NDArray[np.float64]
    take: str = ""
    speed_prior_m_s: float | None = None


@dataclass(frozen=True)
class FeltFit:
    """Result of :func:`fit_felt` for one key.

    ``*_factor`` uncertainties are one standard deviation as a factor (value x/÷ factor).
    ``gain_db`` maps the model's bridge force (dB re 1 N) to the recording (dBFS), per take.
    """

    key: int
    force_1mm_n: float
    force_factor: float
    exponent: float
    exponent_uncertainty: float | None
    speeds_m_s: tuple[float, ...]
    speed_factors: tuple[float, ...]
    gain_db: dict[str, float]
    residual_db: float
    partials: int
    quality: str
    notes: tuple[str, ...] = field(default=())


def _grid(preset: Preset, key: int, force: NDArray[np.float64], speeds: NDArray[np.float64], exponent: float,
          n: NDArray[np.int64], settings: TableSettings) -> NDArray[np.float64]:
    """Levels (dB re 1 N) on the grid, (felt, speed, partial); partials missing from the
    model (beyond its band) come back as NaN columns."""
    out = np.full((len(force), len(speeds), len(n)), np.nan)
    variants = [(preset.with_key_values(key, {"felt_force_1mm_n": float(f1), "felt_exponent": float(exponent)}), key)
                for f1 in force]
    for i, table in enumerate(simulate_variants(variants, speeds, settings=settings)):
        amp = np.abs(table.amplitude_n.sum(axis=1))  # (speeds, partials)
        # A strike-point null is -inf in dB: floor each blow DYNAMIC_RANGE_DB below its
        # strongest partial, so that the splines stay smooth (such partials are not fitted).
        amp = np.maximum(amp, amp.max(axis=1, keepdims=True) * 10 ** (-DYNAMIC_RANGE_DB / 20))
        have = n <= amp.shape[1]
        out[i, :, have] = 20 * np.log10(amp[:, n[have] - 1]).T
    return out


def _start(rows: list[tuple[NDArray[np.int64], NDArray[np.float64]]], levels: NDArray[np.float64],
           logf: NDArray[np.float64], logv: NDArray[np.float64], logf0: float, priors: list[tuple[float, float]],
           calibration_db: float | None, scatter_db: float) -> NDArray[np.float64]:
    """The best grid node (felt, and a speed per strike) as the starting point: the misfit
    has several minima along the felt-speed trade-off, and a start from the prior alone
    can end in the wrong one."""
    total = ((logf - logf0) / np.log(FELT_PRIOR_FACTOR)) ** 2  # (felt,)
    best_v = []
    for (sel, meas), (mu, sd) in zip(rows, priors):
        diff = meas[None, None, :] - levels[:, :, sel]  # (felt, speed, partials)
        # Each strike with its own gain here (exact when uncalibrated with one strike a take).
        gain = calibration_db if calibration_db is not None else diff.mean(axis=2, keepdims=True)
        cost = np.sum((diff - gain) ** 2, axis=2) / scatter_db**2 + ((logv[None, :] - mu) / sd) ** 2
        j = np.argmin(cost, axis=1)
        best_v.append(j)
        total = total + cost[np.arange(len(logf)), j]
    i = int(np.argmin(total))
    return np.concatenate([[logf[i]], [logv[j[i]] for j in best_v]])


def _solve(strikes: Sequence[StrikeLevels], takes: list[str], logf: NDArray[np.float64], logv: NDArray[np.float64],
           levels: NDArray[np.float64], n_used: NDArray[np.int64], logf0: float, calibration_db: float | None,
           default_speed: float, scatter_db: float):
    splines = [RectBivariateSpline(logf, logv, levels[:, :, j], kx=3, ky=3) for j in range(len(n_used))]
    index = {int(k): j for j, k in enumerate(n_used)}
    rows = []
    for s in strikes:
        sel = [index[int(k)] for k in s.n if int(k) in index]
        meas = np.array([lv for k, lv in zip(s.n, s.level_db) if int(k) in index])
        rows.append((np.array(sel, dtype=int), meas))
    n_s, n_t = len(strikes), (0 if calibration_db is not None else len(takes))
    priors = []
    for s in strikes:
        if s.speed_prior_m_s is not None:
            priors.append((np.log(s.speed_prior_m_s), np.log(SPEED_PRIOR_FACTOR)))
        else:
            priors.append((np.log(default_speed), np.log(BROAD_SPEED_PRIOR_FACTOR)))
    take_of = [takes.index(s.take) for s in strikes]

    def model(x: NDArray[np.float64]) -> list[NDArray[np.float64]]:
        out = []
        for i, (sel, _) in enumerate(rows):
            pred = np.array([float(splines[j](x[0], x[1 + i])[0, 0]) for j in sel])
            gain = calibration_db if calibration_db is not None else x[1 + n_s + take_of[i]]
            out.append(pred + gain)
        return out

    def residuals(x: NDArray[np.float64]) -> NDArray[np.float64]:
        data = np.concatenate([(meas - pred) / scatter_db for (_, meas), pred in zip(rows, model(x))])
        prior = [(x[0] - logf0) / np.log(FELT_PRIOR_FACTOR)]
        prior += [(x[1 + i] - mu) / sd for i, (mu, sd) in enumerate(priors)]
        return np.concatenate([data, prior])

    x0 = np.concatenate([_start(rows, levels, logf, logv, logf0, priors, calibration_db, scatter_db), np.zeros(n_t)])
    if n_t:  # start each take's gain at its mean misfit
        pred = model(x0)
        for t in range(n_t):
            diffs = [meas - p for (_, meas), p, ti in zip(rows, pred, take_of) if ti == t]
            x0[1 + n_s + t] = float(np.mean(np.concatenate(diffs)))
    lo = np.concatenate([[logf[0]], np.full(n_s, logv[0]), np.full(n_t, -np.inf)])
    hi = np.concatenate([[logf[-1]], np.full(n_s, logv[-1]), np.full(n_t, np.inf)])
    x0 = np.clip(x0, lo + 1e-9, hi - 1e-9)
    sol = least_squares(residuals, x0, bounds=(lo, hi), x_scale="jac")
    n_data = sum(len(m) for _, m in rows)
    data_res = sol.fun[:n_data] * scatter_db
    return sol, n_data, data_res, lo, hi


def fit_felt(preset: Preset, key: int, strikes: Sequence[StrikeLevels], *, calibration_db: float | None = None,
             fit_exponent: bool | None = None, settings: TableSettings = TableSettings(),
             max_partials: int = 24) -> FeltFit:
    """Fit the felt of ``key`` to one or more strikes.

    Parameters
    ----------
    preset : Preset
        The instrument with everything but the felt already set for this key (strike
        ratio, string); its felt values are the starting point and the prior's centre.
    key : int
        MIDI key.
    strikes : sequence of StrikeLevels
        Measured levels; partials beyond ``max_partials`` are not used (high partials of
        a recording are dominated by the room and the noise).
    calibration_db : float, optional
        Known recording gain (dBFS of a 1 N bridge-force partial); otherwise one gain per take
        is fitted.
    fit_exponent : bool, optional
        Fit p too; default: when the strikes span more than 6 dB in level (several dynamics).
    settings : TableSettings
        Contact simulation settings (sample rate sets the band).

    Raises
    ------
    ValueError
        With no strike or fewer than 4 usable partials in all.
    """
    if not strikes:
        raise ValueError(f"key {key}: no strike to fit the felt to")
    i = preset.scale.index(key)
    f0 = float(preset.resolved["felt_force_1mm_n"][i])
    p0 = float(preset.resolved["felt_exponent"][i])
    kept = []
    for s in strikes:
        n, lv = np.asarray(s.n, dtype=np.int64), np.asarray(s.level_db, dtype=float)
        use = (n <= max_partials) & np.isfinite(lv)
        use &= lv >= np.max(lv[use], initial=-np.inf) - DYNAMIC_RANGE_DB + 5.0  # margin to the grid's floor
        kept.append(StrikeLevels(n=n[use], level_db=lv[use], take=s.take, speed_prior_m_s=s.speed_prior_m_s))
    strikes = kept
    n_all = np.unique(np.concatenate([s.n for s in strikes]))
    if sum(len(s.n) for s in strikes) < 4:
        raise ValueError(f"key {key}: {sum(len(s.n) for s in strikes)} partial level(s); the felt fit needs 4 or more")
    peaks = [float(np.max(s.level_db)) for s in strikes]
    if fit_exponent is None:
        fit_exponent = len(strikes) >= 2 and max(peaks) - min(peaks) > 6.0
    takes = sorted({s.take for s in strikes})
    vel = preset.instrument
    default_speed = float(np.sqrt(vel["speed_at_velocity_1_m_s"] * vel["speed_at_velocity_127_m_s"]))
    exponents = [p0 + d for d in EXPONENT_STEPS if 1.0 <= p0 + d <= 6.0] if fit_exponent else [p0]

    grids: dict[tuple, NDArray[np.float64]] = {}

    def solve_on(p: float, force: NDArray[np.float64], speeds: NDArray[np.float64], scatter_db: float) -> tuple:
        at = (p, tuple(force), tuple(speeds))
        if at not in grids:
            grids[at] = _grid(preset, key, force, speeds, p, n_all, settings)
        levels = grids[at]
        usable = ~np.isnan(levels).any(axis=(0, 1))
        n_used = n_all[usable]
        return (p, n_used, *_solve(strikes, takes, np.log(force), np.log(speeds), levels[:, :, usable], n_used,
                                   np.log(f0), calibration_db, default_speed, scatter_db))

    def fit_at(p: float, scatter_db: float) -> tuple:
        coarse = solve_on(p, f0 * np.geomspace(1 / FELT_SPAN, FELT_SPAN, FELT_POINTS),
                          np.geomspace(*SPEED_RANGE_M_S, SPEED_POINTS), scatter_db)
        # Then a fine grid around the result: the splines of the coarse grid are off by a
        # few per cent in the felt (measured on exact levels of the model itself).
        x = coarse[2].x
        step = np.geomspace(1 / ZOOM, ZOOM, ZOOM_POINTS)
        speeds = np.unique(np.round(np.log(np.exp(x[1:1 + len(strikes)])[:, None] * step), 3))
        fine = solve_on(p, np.exp(x[0]) * step, np.exp(speeds), scatter_db)
        fx, (flo, fhi) = fine[2].x[:1 + len(strikes)], (fine[5][:1 + len(strikes)], fine[6][:1 + len(strikes)])
        return coarse if np.any(np.isclose(fx, flo, atol=1e-6) | np.isclose(fx, fhi, atol=1e-6)) else fine

    # The levels scatter about the model by what the fit shows, never less than
    # LEVEL_SCATTER_DB: a real recording's soundboard, room and microphone leave several dB
    # that no felt explains, and weighting the data as if they did would let that detail,
    # not the priors, settle the felt-speed trade-off (speeds driven to the grid's ends).
    first_res = fit_at(p0, LEVEL_SCATTER_DB)[4]
    scatter = max(LEVEL_SCATTER_DB, float(np.sqrt(np.mean(first_res**2))))
    fits = [fit_at(p, scatter) for p in exponents]
    costs = np.array([2 * f[2].cost for f in fits])  # chi-square (least_squares' cost is half of it)
    best = int(np.argmin(costs))
    notes: list[str] = []
    p_unc: float | None = None
    if len(fits) >= 3:
        # Profile over p: a parabola through the best point and its neighbours, then the
        # fit again at its minimum.
        j = min(max(best, 1), len(fits) - 2)
        a, b, _ = np.polyfit(np.array(exponents[j - 1:j + 2]), costs[j - 1:j + 2], 2)
        if a > 0 and best not in (0, len(fits) - 1):
            p_unc = float(np.sqrt(1.0 / a))  # chi-square rises by 1 at one sigma
            fits[best] = fit_at(float(-b / (2 * a)), scatter)
        else:
            notes.append("felt exponent at the edge of its search range")
            p_unc = float(abs(exponents[1] - exponents[0]))
    p, n_used, sol, n_data, data_res, lo, hi = fits[best]
    jac = sol.jac
    dof = max(n_data - len(sol.x), 1)
    chi2 = float(np.sum(sol.fun[:n_data] ** 2)) / dof
    cov = np.linalg.pinv(jac.T @ jac) * max(chi2, 1.0)
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    n_s = len(strikes)
    at_edge = bool(np.any(np.isclose(sol.x, lo, atol=1e-6) | np.isclose(sol.x, hi, atol=1e-6)))
    if at_edge:
        notes.append("a fitted value sits at the edge of the simulated grid")
    rms = float(np.sqrt(np.mean(data_res**2)))
    force_factor = float(np.exp(sd[0]))
    if at_edge or rms > 6.0 or len(n_used) < 4:
        quality = "poor"
    elif rms <= 3.0 and len(n_used) >= 8 and force_factor < 1.5:
        quality = "good"
    else:
        quality = "fair"
    if calibration_db is None and not fit_exponent:
        notes.append("felt and speed traded off (unknown gain, one dynamic): the felt is relative to the "
                     "assumed hammer speed")
    gains = ({t: float(calibration_db) for t in takes} if calibration_db is not None
             else {t: float(sol.x[1 + n_s + k]) for k, t in enumerate(takes)})
    return FeltFit(key=key, force_1mm_n=float(np.exp(sol.x[0])), force_factor=force_factor, exponent=float(p),
                   exponent_uncertainty=p_unc, speeds_m_s=tuple(float(np.exp(v)) for v in sol.x[1:1 + n_s]),
                   speed_factors=tuple(float(np.exp(s)) for s in sd[1:1 + n_s]), gain_db=gains, residual_db=rms,
                   partials=len(n_used), quality=quality, notes=tuple(notes))
