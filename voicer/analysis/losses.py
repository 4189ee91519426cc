"""Loss parameters b1, b3 from measured partial decays.

The string model's amplitude decay rate is ``sigma = b1 + b3 omega^2`` (Chaigne &
Askenfelt 1994, JASA 95, 1112: their b1 and b3 terms, see
:func:`voicer.physics.strings.loss_rates`). A measured T60 gives ``sigma = ln(1000) / T60``;
the rates are linear in (1, omega^2), so b1 and b3 follow from weighted least squares, with
their covariance. Partials whose decay was fitted poorly carry little weight; rates are
weighted by their relative uncertainty (a T60 known to 5 % gives sigma to 5 %).
"""

from __future__ import annotations

__all__ = ["LossFit", "fit_losses"]

from dataclasses import dataclass
import numpy as np
from numpy.typing import ArrayLike

from ..physics.constants import T60_LN

#: Relative uncertainty assumed for a T60 given without one: real decays scatter by
#: about this much around the b1 + b3 omega^2 trend (common practice: unison coupling and
#: the soundboard add partial-to-partial detail the two-parameter law does not describe).
DEFAULT_T60_SCATTER = 0.15


@dataclass(frozen=True)
class LossFit:
    """Fitted ``sigma = b1 + b3 omega^2``.

    Attributes
    ----------
    b1_per_s, b3_s : float
        The parameters, clipped at 0 (a negative loss has no meaning; the flag says so).
    b1_uncertainty, b3_uncertainty : float
        One standard deviation from the fit's covariance, scaled by the reduced chi-square
        when the scatter is larger than the stated uncertainties.
    partials : int
        Decays used.
    residual_rms : float
        Rms relative misfit of the rates.
    quality : str
        ``good`` (8 or more decays spanning a factor 4 in frequency, misfit below 30 %),
        ``fair`` (3 or more decays), ``poor`` (fewer, or a parameter clipped at zero).
    """

    b1_per_s: float
    b3_s: float
    b1_uncertainty: float
    b3_uncertainty: float
    partials: int
    residual_rms: float
    quality: str


def fit_losses(freq_hz: ArrayLike, t60_s: ArrayLike, *, t60_uncertainty_s: ArrayLike | None = None,
               min_t60_s: float = 0.02) -> LossFit:
    """Fit b1 and b3 to measured T60s.

    Parameters
    ----------
    freq_hz : array_like of float > 0
        Partial frequencies.
    t60_s : array_like of float
        Their measured T60s; non-finite or below ``min_t60_s`` are left out.
    t60_uncertainty_s : array_like of float, optional
        One standard deviation of each T60 (default: DEFAULT_T60_SCATTER of the T60).
    min_t60_s : float
        Shorter decays are not string decays (a thump, a damped string).

    Raises
    ------
    ValueError
        With fewer than two usable decays.
    """
    f = np.asarray(freq_hz, dtype=float)
    t60 = np.asarray(t60_s, dtype=float)
    rel = (np.full_like(t60, DEFAULT_T60_SCATTER) if t60_uncertainty_s is None
           else np.asarray(t60_uncertainty_s, dtype=float) / np.where(t60 > 0, t60, 1.0))
    ok = np.isfinite(f) & np.isfinite(t60) & (t60 >= min_t60_s) & (f > 0) & np.isfinite(rel) & (rel > 0)
    if np.count_nonzero(ok) < 2:
        raise ValueError(f"{np.count_nonzero(ok)} usable decay(s); b1 and b3 need at least two")
    f, t60, rel = f[ok], t60[ok], np.maximum(rel[ok], 0.01)  # 1 % floor: no decay is known better
    sigma = T60_LN / t60
    w = 1.0 / (rel * sigma)  # 1 / standard deviation of each rate
    omega2 = (2.0 * np.pi * f) ** 2
    design = np.column_stack([np.ones_like(omega2), omega2])
    # Scale the columns so the normal matrix is well conditioned (omega^2 reaches 1e9).
    scale = np.array([1.0, 1.0 / omega2.max()])
    a = design * scale * w[:, None]
    coef, *_ = np.linalg.lstsq(a, sigma * w, rcond=None)
    resid = a @ coef - sigma * w
    dof = max(len(sigma) - 2, 1)
    chi2 = float(resid @ resid) / dof
    cov = np.linalg.pinv(a.T @ a) * max(chi2, 1.0)
    b1, b3 = coef * scale
    db1, db3 = np.sqrt(np.diag(cov)) * scale
    clipped = b1 < 0 or b3 < 0
    rms = float(np.sqrt(np.mean(((design @ (coef * scale)) / sigma - 1.0) ** 2)))
    if clipped or len(sigma) < 3:
        quality = "poor"
    elif len(sigma) >= 8 and f.max() >= 4 * f.min() and rms < 0.3:
        quality = "good"
    else:
        quality = "fair"
    return LossFit(b1_per_s=max(float(b1), 0.0), b3_s=max(float(b3), 0.0), b1_uncertainty=float(db1),
                   b3_uncertainty=float(db3), partials=len(sigma), residual_rms=rms, quality=quality)
