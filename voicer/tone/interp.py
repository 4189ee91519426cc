"""Monotone piecewise-cubic (PCHIP) interpolation of anchor values and velocity layers.

This is the Fritsch-Carlson scheme with the derivative rules of Fritsch & Butland
(1984, SIAM J. Sci. Stat. Comput. 5, 300) that ``scipy.interpolate.PchipInterpolator``
uses; tests check it against scipy to round-off. It lives here because importing
``scipy.interpolate`` costs about half a second, paid by every command that loads a
preset, for three dozen anchor values.
"""

from __future__ import annotations

__all__ = ["pchip"]

import numpy as np
from numpy.typing import ArrayLike, NDArray


def _end_slope(h0: float, h1: float, m0: NDArray[np.float64], m1: NDArray[np.float64]) -> NDArray[np.float64]:
    """One-sided three-point slope at an end, limited to keep the curve monotone."""
    d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
    d = np.where(np.sign(d) != np.sign(m0), 0.0, d)
    overshoot = (np.sign(m0) != np.sign(m1)) & (np.abs(d) > 3.0 * np.abs(m0))
    return np.where(overshoot, 3.0 * m0, d)


def pchip(x: ArrayLike, y: ArrayLike, at: ArrayLike) -> NDArray[np.float64]:
    """Evaluate the monotone cubic through ``(x, y)`` at ``at``.

    Parameters
    ----------
    x : array_like of float, strictly increasing, len >= 2
        Anchor positions.
    y : array_like of float, shape (len(x), ...)
        Anchor values; trailing dimensions are interpolated independently.
    at : array_like of float within [x[0], x[-1]]
        Where to evaluate (values outside are extrapolated by the end cubics).

    Returns
    -------
    ndarray, shape ``at.shape + y.shape[1:]``
    """
    xs, ys = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    tail = ys.shape[1:]
    ys = ys.reshape(len(xs), -1)
    h = np.diff(xs)[:, None]
    m = np.diff(ys, axis=0) / h
    d = np.empty_like(ys)
    if len(xs) == 2:
        d[:] = m[0]
    else:
        w1, w2 = 2.0 * h[1:] + h[:-1], h[1:] + 2.0 * h[:-1]
        same = (m[:-1] * m[1:]) > 0
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # m == 0 or tiny: slope 0
            harmonic = (w1 + w2) / (w1 / m[:-1] + w2 / m[1:])
        d[1:-1] = np.where(same, harmonic, 0.0)
        d[0] = _end_slope(h[0, 0], h[1, 0], m[0], m[1])
        d[-1] = _end_slope(h[-1, 0], h[-2, 0], m[-1], m[-2])
    t_at = np.asarray(at, dtype=float)
    k = np.clip(np.searchsorted(xs, t_at, side="right") - 1, 0, len(xs) - 2).reshape(-1)
    hk = h[k]
    t = ((t_at.reshape(-1) - xs[k]) / hk[:, 0])[:, None]
    t2, t3 = t * t, t * t * t
    out = ((2 * t3 - 3 * t2 + 1) * ys[k] + (t3 - 2 * t2 + t) * hk * d[k]
           + (-2 * t3 + 3 * t2) * ys[k + 1] + (t3 - t2) * hk * d[k + 1])
    return out.reshape(t_at.shape + tail)
