"""Tuning targets: equal temperament from a reference A4, plus a stretch in cents.

A4 = 440 Hz is the standard pitch of ISO 16:1975. MIDI key 69 is A4, 21 is A0 and 108
is C8, the compass of an 88-key piano.
"""

from __future__ import annotations

__all__ = [
    "A4_HZ",
    "A4_KEY",
    "LOWEST_KEY",
    "HIGHEST_KEY",
    "KEYS",
    "equal_tempered_hz",
    "tuned_hz",
    "cents",
    "key_name",
]

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import ParameterError

#: Standard tuning frequency (ISO 16:1975).
A4_HZ = 440.0
#: MIDI note number of A4.
A4_KEY = 69
#: MIDI note numbers of the lowest and highest keys of an 88-key piano (A0, C8).
LOWEST_KEY = 21
HIGHEST_KEY = 108
#: All keys of the compass, as an array.
KEYS: NDArray[np.int64] = np.arange(LOWEST_KEY, HIGHEST_KEY + 1)

_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")


def equal_tempered_hz(key: ArrayLike, *, a4_hz: float = A4_HZ) -> NDArray[np.float64]:
    """Twelve-tone equal-tempered frequency of a MIDI key.

    Parameters
    ----------
    key : array_like of int
        MIDI note numbers.
    a4_hz : float > 0
        Frequency of A4 (key 69).

    Returns
    -------
    ndarray
        ``a4_hz * 2 ** ((key - 69) / 12)``.
    """
    if not a4_hz > 0:
        raise ParameterError(f"a4_hz={a4_hz} must be > 0")
    k = np.asarray(key, dtype=float)
    return a4_hz * np.exp2((k - A4_KEY) / 12.0)


def tuned_hz(key: ArrayLike, stretch_cents: ArrayLike = 0.0, *, a4_hz: float = A4_HZ) -> NDArray[np.float64]:
    """Target frequency of each key's first partial: equal temperament plus stretch.

    Parameters
    ----------
    key : array_like of int
        MIDI note numbers.
    stretch_cents : array_like of float
        Deviation from equal temperament per key, in cents (positive = sharp).
    a4_hz : float > 0
        Reference A4.
    """
    return equal_tempered_hz(key, a4_hz=a4_hz) * np.exp2(np.asarray(stretch_cents, dtype=float) / 1200.0)


def cents(f: ArrayLike, f_ref: ArrayLike) -> NDArray[np.float64]:
    """Interval from ``f_ref`` to ``f`` in cents (1200 per octave)."""
    return 1200.0 * np.log2(np.asarray(f, dtype=float) / np.asarray(f_ref, dtype=float))


def key_name(key: int) -> str:
    """Scientific pitch name of a MIDI key, e.g. 60 -> 'C4', 21 -> 'A0'."""
    return f"{_NAMES[key % 12]}{key // 12 - 1}"
