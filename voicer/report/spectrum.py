"""Simple measures of a partial spectrum."""

from __future__ import annotations

__all__ = ["levels_db", "spectral_centroid_hz"]

import numpy as np
from numpy.typing import ArrayLike, NDArray

#: Levels are in dB re 1 N of bridge force; this floor stands in for an exact null.
FLOOR_DB = -300.0


def levels_db(amplitude_n: ArrayLike) -> NDArray[np.float64]:
    """``20 log10 |A|`` in dB re 1 N, floored at -300 dB for exact nulls."""
    mag = np.abs(np.asarray(amplitude_n))
    with np.errstate(divide="ignore"):
        return np.maximum(20.0 * np.log10(mag), FLOOR_DB)


def spectral_centroid_hz(freq_hz: ArrayLike, amplitude: ArrayLike) -> float:
    """Power-weighted mean frequency ``sum f |A|^2 / sum |A|^2`` of a partial spectrum."""
    power = np.abs(np.asarray(amplitude)) ** 2
    return float(np.sum(np.asarray(freq_hz) * power) / np.sum(power))
