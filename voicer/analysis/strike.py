"""Strike ratio from the pattern of weak partials.

A string struck at a fraction ``beta`` of its length from the end excites partial ``n`` in
proportion to the mode shape at the strike point, ``sin(n pi beta)`` (physics.md section 6;
Fletcher & Rossing, *The Physics of Musical Instruments*, ch. 12), times the spectrum of the
hammer's force pulse, times the hammer-width factor ``sinc(n pi w / 2L)`` for a uniform
hammer of width ``w``. Partials near ``n = k / beta`` are weak; where they lie gives ``beta``.

The force pulse is not independent of ``beta``: during the contact the string pushes back
on the hammer, and the wave reflected from the near end returns every ``2 beta L / c``. With
the felt as a spring ``K`` on a hammer of mass ``M`` (the linear hammer of Hall 1986, JASA
79, 141) and the string at the strike point as a fixed-end segment of length ``beta L``
beside a long one (the far-end reflection returns after the contact has ended), the
string's impedance is ``Z = Z0 (1 - i cot theta)``, ``theta = n pi beta``, and the force is
``F = M v0 / (1 - omega^2 M / K + i omega M / Z)`` (derived here). Above the felt
resonance (``omega^2 M / K >> 1``) that is

    F = -(K v0 / omega^2) / (1 + (a / n) sin(theta) exp(-i theta)),   a = K / (omega_1 Z0)

with the ``1 / omega^2`` going into the smooth part. The factor repeats with the notches:
the force is largest just before each notch and smaller after it, so the lobes step down
at every notch. On voicer's own contact model, ignoring it biased ``beta`` by up to 0.014
at C4; in the bass, where the felt is soft next to the heavy strings, ``a / n`` is small
and the plain model is exact. The model fitted to the levels is

    level_db(n) = smooth(n) + 20 log10(|sin(theta) sinc(n pi w / 2L)| + floor)
                  - 20 log10|1 + (a / n) sin(theta) exp(-i theta)|

* ``smooth`` is a polynomial in ``log n`` (the rest of the force spectrum, the string's and
  the bridge's response). It must follow a plateau and a roll-off without being able to
  imitate a notch: notches are one or two partials wide, while a cubic in ``log n`` has at
  most two turning points over the whole range. Degree 3 is used with 12 or more partials
  (degree 2 there left envelope misfit that biased ``beta`` by up to 0.007 in trials with a
  half-sine pulse spectrum); with fewer, each parameter costs too much of the few degrees
  of freedom: degree 2 for 8 to 11 partials, 1 for 6 and 7. Its coefficients are linear
  and solved exactly for each set of the other parameters (variable projection: Golub &
  Pereyra 1973, SIAM J. Numer. Anal. 10, 413).
* ``floor`` is fitted, in dB below the envelope, within ``FLOOR_RANGE_DB``: notches in a
  real piano are never infinitely deep (hammer width, non-uniform strings, the soundboard,
  and the noise floor of the analysis that measured the weak partials), and how deep they
  are is not known in advance. A fixed floor either claims notches deeper than measured
  (pulling ``beta`` to put the notch between partials) or shallower.
* ``a`` is fitted within ``[0, REACTION_MAX]`` (10 at C4 of the demo preset at mf). Free,
  it can also lend a wrong ``beta`` a pattern: in trials with smooth envelopes (``a = 0``
  by construction), fits with it always on missed by more than 0.005 about three times as
  often. So the fit is done with ``a = 0`` and with ``a`` free, and the free one is kept
  only when it lowers the chi-square by more than 4 (one more parameter at two standard
  deviations); where the two put ``beta`` in different places, the answer rests on the
  hammer model, and the uncertainty is widened to cover both.
* ``beta`` is found on a dense grid first: the cost is a comb of local minima (each notch
  can sit on either side of a partial), so a local search from one start would stop in
  the nearest one. The best grid minima are refined with
  :func:`scipy.optimize.least_squares`; their costs are compared to flag ambiguous fits.

The uncertainty is one standard deviation from the Jacobian of the projected residual
with respect to the free nonlinear parameters, scaled by the residual variance: with
variable projection this is the marginal variance of ``beta`` in the linearised full
problem (the Schur complement of the smooth coefficients).
"""

from __future__ import annotations

__all__ = ["StrikeFit", "fit_strike_ratio", "FLOOR_RANGE_DB", "REACTION_MAX", "MIN_PARTIALS"]

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import OptimizeResult, least_squares

from ..errors import ParameterError

#: Bounds of the fitted notch floor, in dB relative to the envelope. Above -6 dB there is
#: no pattern left to fit; below -60 dB no measured partial can tell the difference.
FLOOR_RANGE_DB = (-60.0, -6.0)
#: Upper bound of the reaction parameter ``a = K / (omega_1 Z0)``.
REACTION_MAX = 200.0
#: Fewer partials leave no degrees of freedom for the envelope and the pattern.
MIN_PARTIALS = 6

#: Grid step: the highest measured notch moves by at most this fraction of a partial.
_GRID_PARTIAL_STEP = 0.1
_FLOOR_GRID_DB = np.linspace(FLOOR_RANGE_DB[0], FLOOR_RANGE_DB[1], 6)
_REACTION_GRID = np.array([0.0, 2.0, 6.0, 20.0, 60.0])
#: At most this many grid minima are refined, and only those within this chi-square of the best.
_REFINED_MINIMA = 4
_REFINE_CHI2 = 25.0
#: The reaction is kept when it lowers the chi-square by more than this.
_REACTION_CHI2 = 4.0
#: A rival minimum closer than this in chi-square (2 standard deviations) is as good as the best.
_RIVAL_CHI2 = 4.0
#: Uncertainties (one sd) of "good" and "fair" fits: the issue asks for 0.005, met at 2 sd by "good".
_GOOD_SD = 0.0025
_FAIR_SD = 0.005
#: Rms misfit (dB) above which the envelope does not describe the levels well.
_FAIR_RESIDUAL_DB = 4.0
#: A fitted floor above this (dB) is a shallow pattern: its notch positions rest on few
#: partials and on the envelope's shape (in trials, most fits that missed by more than 0.005 had one).
_SHALLOW_FLOOR_DB = -15.0


@dataclass(frozen=True)
class StrikeFit:
    """A fitted strike ratio.

    Attributes
    ----------
    ratio : float
        Strike point as a fraction of the speaking length, in [lo, hi].
    uncertainty : float
        One standard deviation (Jacobian of the fit, scaled by the residual variance;
        at least half the distance to the other hammer model's answer).
    quality : str
        ``"good"``: a notch is seen inside the measured partials (two measured partials on
        each side of it within half a notch period), no other minimum is as good (within 2
        standard deviations), ``beta`` is away from the search edges, the uncertainty is at
        most 0.0025 (so the issue's 0.005 holds at two standard deviations), the floor is at
        least 15 dB down and the rms misfit at most 4 dB.
        ``"fair"``: a notch is seen and the minimum is unique, but the uncertainty is up to
        0.005, the notches are shallow or the misfit is larger.
        ``"poor"``: anything else: no notch seen in the measured range, a rival minimum,
        ``beta`` at or near a search edge, or an uncertainty above 0.005. A poor ratio is not
        a measurement; keep the preset's value.
    residual_db : float
        Rms misfit of the levels in dB (weighted, if weights were given).
    floor_db : float
        Fitted notch floor relative to the envelope.
    reaction : float
        Fitted string-reaction parameter ``a`` (0 when the plain model was kept; see the
        module docstring).
    partials : int
        Number of partials used.
    """

    ratio: float
    uncertainty: float
    quality: str
    residual_db: float
    floor_db: float
    reaction: float
    partials: int


def _degree(count: int) -> int:
    """Degree of the smooth envelope for ``count`` partials (see the module docstring)."""
    if count >= 12:
        return 3
    return 2 if count >= 8 else 1


def _envelope_basis(n: NDArray[np.float64]) -> NDArray[np.float64]:
    """Legendre polynomials in log n, mapped to [-1, 1] over the measured partials."""
    log_n = np.log(n)
    x = 2.0 * (log_n - log_n.min()) / max(float(np.ptp(log_n)), 1e-12) - 1.0
    return np.polynomial.legendre.legvander(x, _degree(len(n)))


def _coupling_db(n: NDArray[np.float64], theta: NDArray[np.float64], floor_db: NDArray[np.float64],
                 width_ratio: float) -> NDArray[np.float64]:
    """``20 log10(|sin(theta) sinc(n w / 2L)| + floor)``."""
    return 20.0 * np.log10(np.abs(np.sin(theta) * np.sinc(n * width_ratio / 2.0)) + 10.0 ** (floor_db / 20.0))


def _reaction_db(n: NDArray[np.float64], theta: NDArray[np.float64],
                 reaction: NDArray[np.float64]) -> NDArray[np.float64]:
    """``20 log10|1 + r sin(theta) exp(-i theta)|`` with ``r = a / n``, as
    ``10 log10(1 + r sin(2 theta) + r^2 sin(theta)^2)`` (always > 0: the minimum over theta
    is ``(sqrt(1 + r^2 / 4) - r / 2)^2``)."""
    r = reaction / n
    return 10.0 * np.log10(1.0 + r * np.sin(2.0 * theta) + (r * np.sin(theta)) ** 2)


def _notches_seen(n: NDArray[np.float64], beta: float) -> int:
    """Notches ``k / beta`` with at least two measured partials on each side within half a period.

    A notch is known from the dip *and* the recovery on its far side: with partials on one
    side only, a falling envelope and the slope of a lobe cannot be told apart.
    """
    half = 0.5 / beta
    seen = 0
    for notch in np.arange(1, int(n.max() * beta) + 1) / beta:
        below = np.count_nonzero((n < notch) & (n >= notch - half))
        above = np.count_nonzero((n > notch) & (n <= notch + half))
        seen += below >= 2 and above >= 2
    return seen


def _check(n: Sequence[int], level_db: Sequence[float], weights: Sequence[float] | None, lo: float, hi: float,
           width_ratio: float) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    n_arr = np.asarray(n)
    y = np.asarray(level_db, dtype=float)
    if n_arr.ndim != 1 or y.shape != n_arr.shape:
        raise ParameterError(f"n and level_db must be 1-D of the same length (got shapes {n_arr.shape} and {y.shape})")
    if len(n_arr) < MIN_PARTIALS:
        raise ParameterError(f"{len(n_arr)} partial(s) given; a strike ratio needs at least {MIN_PARTIALS}")
    if not np.all(np.isfinite(n_arr)) or not np.all(n_arr == np.round(n_arr)):
        raise ParameterError("partial numbers n must be whole numbers")
    n_f = n_arr.astype(float)
    if n_f.min() < 1 or len(np.unique(n_f)) != len(n_f):
        raise ParameterError("partial numbers n must be distinct and >= 1")
    if not np.all(np.isfinite(y)):
        raise ParameterError("level_db must be finite (leave unresolved partials out instead)")
    w = np.ones_like(y) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != y.shape or not np.all(np.isfinite(w)) or np.any(w <= 0):
        raise ParameterError("weights must be finite, > 0 and one per partial")
    if not 0.0 < lo < hi < 0.5:
        raise ParameterError(f"search range lo={lo:g}, hi={hi:g} must satisfy 0 < lo < hi < 0.5")
    if not 0.0 <= width_ratio < 2.0 * lo:
        raise ParameterError(f"width_ratio={width_ratio:g} must lie in 0 <= width_ratio < 2 lo = {2 * lo:g} "
                             "(the hammer must fit between the strike point and the string end)")
    order = np.argsort(n_f)
    return n_f[order], y[order], w[order]


def fit_strike_ratio(n: Sequence[int], level_db: Sequence[float], *, weights: Sequence[float] | None = None,
                     lo: float = 1 / 20, hi: float = 1 / 5, width_ratio: float = 0.0) -> StrikeFit:
    """Fit the strike ratio to measured partial levels.

    Parameters
    ----------
    n : sequence of int >= 1
        Partial numbers of the measured partials (unresolved partials simply left out).
    level_db : sequence of float
        Their levels in dB (any common reference), e.g. of the bridge force or the sound at
        the start of the note.
    weights : sequence of float > 0, optional
        Relative weights (e.g. inverse variances of the levels, up to a common factor);
        the scale of the uncertainty comes from the residuals.
    lo, hi : float, 0 < lo < hi < 0.5
        Search range of the strike ratio.
    width_ratio : float, 0 <= width_ratio < 2 lo
        Hammer width over speaking length, if known (0: no width factor; a narrow hammer's
        factor is smooth over the measured partials and the envelope absorbs it).

    Returns
    -------
    StrikeFit

    Raises
    ------
    ParameterError
        On fewer than MIN_PARTIALS partials, repeated or non-positive partial numbers,
        non-finite levels or weights, or a bad search range.
    """
    n_f, y, w = _check(n, level_db, weights, lo, hi, width_ratio)
    sw = np.sqrt(w / w.mean())
    q, _ = np.linalg.qr(_envelope_basis(n_f) * sw[:, None])

    def project(r: NDArray[np.float64]) -> NDArray[np.float64]:
        """Weighted residuals after the best smooth envelope (n on the last axis)."""
        r = sw * r
        return r - (r @ q) @ q.T

    # Dense grid in beta, geometric: a notch at n = k / beta moves by n partials per unit of
    # ln beta, so the step bounds how far the highest measured notch moves.
    step = _GRID_PARTIAL_STEP / n_f.max()
    grid = np.exp(np.arange(np.log(lo), np.log(hi), step))
    theta = np.pi * grid[:, None] * n_f                                                        # (G, N)
    coupling = _coupling_db(n_f, theta[:, None, :], _FLOOR_GRID_DB[None, :, None], width_ratio)  # (G, F, N)

    def search(reactions: NDArray[np.float64]) -> list[OptimizeResult]:
        """Grid over beta (coarse grids of floor and reaction), then refine the best minima.

        With a single reaction value 0 the reaction is held at 0 (parameters beta, floor).
        """
        load = _reaction_db(n_f, theta[:, None, :], reactions[None, :, None])                   # (G, A, N)
        cost = np.sum(project(y - coupling[:, :, None, :] + load[:, None, :, :]) ** 2, axis=-1)
        cost = cost.reshape(len(grid), -1)
        profile, combo = cost.min(axis=1), cost.argmin(axis=1)
        local = np.r_[True, profile[1:] <= profile[:-1]] & np.r_[profile[:-1] <= profile[1:], True]
        starts = np.flatnonzero(local)
        starts = starts[np.argsort(profile[starts])][:_REFINED_MINIMA]
        # Only minima that might end up as good as the best are worth refining.
        s2_grid = profile[starts[0]] / max(len(n_f) - q.shape[1] - 3, 1)
        starts = starts[profile[starts] - profile[starts[0]] < _REFINE_CHI2 * max(s2_grid, 1e-300)]
        free_reaction = len(reactions) > 1
        lower = np.array([lo, FLOOR_RANGE_DB[0], 0.0][:2 + free_reaction])
        upper = np.array([hi, FLOOR_RANGE_DB[1], REACTION_MAX][:2 + free_reaction])

        def fun(p: NDArray[np.float64]) -> NDArray[np.float64]:
            th = np.pi * p[0] * n_f
            load = _reaction_db(n_f, th, p[2]) if free_reaction else 0.0
            return project(y - _coupling_db(n_f, th, p[1], width_ratio) + load)

        fits = []
        for i in starts:
            fi, ai = np.unravel_index(combo[i], (len(_FLOOR_GRID_DB), len(reactions)))
            x0 = np.clip([grid[i], _FLOOR_GRID_DB[fi], reactions[ai]][:len(lower)], lower, upper)
            fits.append(least_squares(fun, x0, bounds=(lower, upper), x_scale=[grid[i] * step, 3.0, 3.0][:len(lower)]))
        return fits

    def summary(fits: list[OptimizeResult]) -> tuple[OptimizeResult, float, float, float]:
        """The best fit, its sum of squares, residual variance and one-sd uncertainty of beta."""
        best = min(fits, key=lambda f: f.cost)
        rss = 2.0 * float(best.cost)  # least_squares' cost is half the sum of squares
        # Parameters held at a bound are not free there: only the others enter the covariance.
        free = best.active_mask == 0
        free[0] = True
        s2 = rss / max(len(n_f) - q.shape[1] - int(np.count_nonzero(free)), 1)
        jac = best.jac[:, free]
        cov = np.linalg.pinv(jac.T @ jac) * s2
        return best, rss, s2, float(np.sqrt(cov[0, 0])) if cov[0, 0] > 0 else float("inf")

    # The string's reaction is kept where it explains the levels better than none. Free, it
    # can also lend a wrong beta a pattern; where the two models put beta in different
    # places, the answer rests on the hammer model, and the uncertainty covers both.
    plain, loaded = search(np.zeros(1)), search(_REACTION_GRID)
    best_p, rss_p, s2_p, sd_p = summary(plain)
    best_l, rss_l, s2_l, sd_l = summary(loaded)
    if rss_p - rss_l > _REACTION_CHI2 * s2_l:
        fits, best, rss, s2, sd = loaded, best_l, rss_l, s2_l, sd_l
    else:
        fits, best, rss, s2, sd = plain, best_p, rss_p, s2_p, sd_p
    sd = max(sd, abs(float(best_p.x[0] - best_l.x[0])) / 2.0)
    beta, floor_db = float(best.x[0]), float(best.x[1])
    reaction = float(best.x[2]) if len(best.x) > 2 else 0.0
    costs = np.array([2.0 * f.cost for f in fits])

    rivals = [fit for fit, c in zip(fits, costs)
              if abs(fit.x[0] - beta) > 3.0 * sd and (c - rss) / max(s2, 1e-300) < _RIVAL_CHI2]
    near_edge = best.active_mask[0] != 0 or beta - lo < 2.0 * sd or hi - beta < 2.0 * sd
    residual_db = float(np.sqrt(rss / len(n_f)))
    if _notches_seen(n_f, beta) == 0 or rivals or near_edge or not sd <= _FAIR_SD:
        quality = "poor"
    elif sd > _GOOD_SD or residual_db > _FAIR_RESIDUAL_DB or floor_db > _SHALLOW_FLOOR_DB:
        quality = "fair"
    else:
        quality = "good"
    return StrikeFit(ratio=beta, uncertainty=sd, quality=quality, residual_db=residual_db, floor_db=floor_db,
                     reaction=reaction, partials=len(n_f))
