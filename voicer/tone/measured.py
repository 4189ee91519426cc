"""Measured partials of one recorded strike of a key, as a preset keeps them.

A fitted preset may carry, per key, the partials of the strike it was fitted to::

    [measured.60]
    speed_m_s = 2.4              # hammer speed the fit found for this strike
    n = [1, 2, 3]                # partial numbers (ascending, unique, >= 1)
    freq_hz = [262.1, 524.6, 787.9]
    level_db = [-3.1, -9.4, -12.0]       # prompt stage at the onset, dB re 1 N of bridge force
    t60_s = [9.5, 6.1, 4.0]              # prompt stage T60
    after_level_db = [-21.0, nan, nan]   # aftersound line at the onset; nan: one stage
    after_t60_s = [30.0, nan, nan]       # aftersound T60 (> t60_s) or nan

    [measured.60.fitted]         # the per-key preset values this strike corresponds to
    felt_force_1mm_n = 25.0

A partial decays in one stage, ``a e^{-s t}``, or in two (prompt sound and aftersound,
Weinreich 1977, JASA 62, 1474): ``a_p e^{-s_p t} + a_a e^{-s_a t}``. ``level_db`` is the
prompt stage's line in dB extrapolated to the onset, i.e. the whole partial there
(``a_p + a_a``); ``after_level_db`` is the aftersound line extrapolated back to the
onset (``a_a``), so it lies below ``level_db``. T60 is the time to fall 60 dB, so a stage's
amplitude decay rate is ``ln(1000) / T60``.

TOML has ``nan``, and tomli-w writes it back as ``nan``: "one stage" is stored as such.

This module checks one key's table (:func:`parse_measured_key`); the preset module reads
the ``[measured]`` table, its key numbers and the ``fitted`` values.
"""

from __future__ import annotations

__all__ = ["MEASURED_FIELDS", "MeasuredKey", "MeasuredEntries", "parse_measured_key"]

import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np
from numpy.typing import NDArray

from ..errors import ParameterError, PresetError
from ..physics.constants import T60_LN
from .params import Param

# Sanity bounds. A T60 above 1000 s is a tone that does not decay (mains hum, a whine of
# the recording chain), not a string; bridge forces of a piano lie far inside
# -200..+60 dB re 1 N (about 1e-10 N to 1000 N), so a value outside is a unit mistake.
_SPEED = Param("speed_m_s", "float", "m/s", "hammer speed the fit found for this strike", lo=0.05, hi=20.0)
_N = Param("n", "int", "", "partial number", lo=1, hi=100_000)
_FREQ = Param("freq_hz", "float", "Hz", "partial frequency", lo=0.0, lo_open=True, hi=1.0e6)
_LEVEL = Param("level_db", "float", "dB re 1 N", "prompt stage at the onset", lo=-200.0, hi=60.0)
_T60 = Param("t60_s", "float", "s", "prompt stage T60", lo=0.0, lo_open=True, hi=1000.0)
_AFTER_LEVEL = Param("after_level_db", "float", "dB re 1 N", "aftersound line at the onset (nan: one stage)",
                     lo=-200.0, hi=60.0)
_AFTER_T60 = Param("after_t60_s", "float", "s", "aftersound T60 (nan: one stage)", lo=0.0, lo_open=True, hi=1000.0)

_ARRAYS = (_N, _FREQ, _LEVEL, _T60, _AFTER_LEVEL, _AFTER_T60)
_ONE_STAGE_OK = (_AFTER_LEVEL.name, _AFTER_T60.name)  # may be nan, and may be left out (all one stage)

#: Fields of a ``[measured.K]`` table, in the order they are written (``fitted`` is its sub-table).
MEASURED_FIELDS: tuple[str, ...] = (_SPEED.name, *(p.name for p in _ARRAYS), "fitted")


@dataclass(frozen=True)
class MeasuredEntries:
    """A measured strike as oscillator-bank entries: one per stage of each partial.

    A one-stage partial gives one entry; a two-stage one gives two at the same frequency,
    the prompt entry (``a_p = 10^(level/20) - a_a``, prompt rate) and then the aftersound
    entry (``a_a = 10^(after_level/20)``, aftersound rate).

    Attributes
    ----------
    partial : ndarray of int (M,)
        Index of the entry's partial in the measured arrays.
    n : ndarray of int (M,)
        Its partial number.
    freq_hz, sigma_per_s, amplitude_n : ndarray (M,)
        Frequency, amplitude decay rate and (real, > 0) amplitude at the onset in newtons.
    """

    partial: NDArray[np.int64]
    n: NDArray[np.int64]
    freq_hz: NDArray[np.float64]
    sigma_per_s: NDArray[np.float64]
    amplitude_n: NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class MeasuredKey:
    """The validated ``[measured.K]`` table of one key (arrays read-only, one value per
    partial; nan in the ``after_*`` arrays marks a one-stage partial)."""

    key: int
    speed_m_s: float
    n: NDArray[np.int64]
    freq_hz: NDArray[np.float64]
    level_db: NDArray[np.float64]
    t60_s: NDArray[np.float64]
    after_level_db: NDArray[np.float64]
    after_t60_s: NDArray[np.float64]
    fitted: Mapping[str, Any]

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, MeasuredKey):
            return NotImplemented
        return (self.key == other.key and self.speed_m_s == other.speed_m_s and dict(self.fitted) == dict(other.fitted)
                and all(np.array_equal(getattr(self, p.name), getattr(other, p.name), equal_nan=True) for p in _ARRAYS))

    __hash__ = None  # type: ignore[assignment]  # holds arrays

    @property
    def two_stage(self) -> NDArray[np.bool_]:
        """Which partials decay in two stages."""
        return ~np.isnan(self.after_level_db)

    def stage_amplitudes(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Prompt and aftersound amplitudes at the onset in newtons (aftersound 0 for one stage)."""
        after = np.where(self.two_stage, 10.0 ** (np.nan_to_num(self.after_level_db) / 20.0), 0.0)
        return 10.0 ** (self.level_db / 20.0) - after, after

    def knee_s(self) -> NDArray[np.float64]:
        """Time where the two stages are equal, ``ln(a_p / a_a) / (s_p - s_a)`` (nan: one stage)."""
        prompt, after = self.stage_amplitudes()
        rate_p, rate_a = T60_LN / self.t60_s, T60_LN / self.after_t60_s
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.two_stage, np.log(prompt / after) / (rate_p - rate_a), np.nan)

    def entries(self) -> MeasuredEntries:
        """The bank entries of this strike (see :class:`MeasuredEntries`)."""
        prompt, after = self.stage_amplitudes()
        index = np.arange(len(self.n))
        two = self.two_stage
        # Each partial's prompt entry, followed by its aftersound entry where it has one.
        partial = np.repeat(index, np.where(two, 2, 1))
        is_after = np.zeros(len(partial), dtype=bool)
        is_after[np.flatnonzero(np.r_[False, partial[1:] == partial[:-1]])] = True
        rate = np.where(is_after, T60_LN / np.nan_to_num(self.after_t60_s, nan=1.0)[partial],
                        T60_LN / self.t60_s[partial])
        amp = np.where(is_after, after[partial], prompt[partial])
        return MeasuredEntries(partial=partial, n=self.n[partial].copy(), freq_hz=self.freq_hz[partial].copy(),
                               sigma_per_s=rate, amplitude_n=amp)

    def to_dict(self) -> dict[str, Any]:
        """Plain data as written to TOML (nan for one stage)."""
        out: dict[str, Any] = {_SPEED.name: self.speed_m_s}
        out[_N.name] = [int(v) for v in self.n]
        for p in _ARRAYS[1:]:
            out[p.name] = [float(v) for v in getattr(self, p.name)]
        out["fitted"] = dict(self.fitted)
        return out


def _error(source: str | None, key: int, name: str, message: str) -> PresetError:
    return PresetError(f"[measured.{key}] {message}", file=source, key=key, field=name)


def _check(param: Param, value: Any, source: str | None, key: int, where: str = "") -> Any:
    try:
        return param.check(value)
    except ParameterError as exc:
        raise _error(source, key, param.name, f"{where}{exc} ({param.help})") from None


def _array(param: Param, raw: Any, count: int | None, source: str | None, key: int,
           n: NDArray[np.int64] | None) -> NDArray[Any]:
    if not isinstance(raw, list):
        raise _error(source, key, param.name, f"must be an array of {param.help} values, got {type(raw).__name__} "
                     f"{raw!r}")
    if not raw:
        raise _error(source, key, param.name, "is empty; give at least one partial")
    if count is not None and len(raw) != count:
        raise _error(source, key, param.name, f"has {len(raw)} values but n has {count}; every array gives one "
                     "value per partial")
    values = []
    for i, value in enumerate(raw):
        where = f"partial n = {n[i]}: " if n is not None else f"entry {i + 1}: "
        one_stage = (param.name in _ONE_STAGE_OK and isinstance(value, float) and math.isnan(value))
        values.append(math.nan if one_stage else _check(param, value, source, key, where))
    out = np.array(values, dtype=np.int64 if param.kind == "int" else np.float64)
    out.setflags(write=False)
    return out


def parse_measured_key(key: int, table: Mapping[str, Any], fitted: Mapping[str, Any], *,
                       source: str | None = None) -> MeasuredKey:
    """Validate one key's ``[measured.K]`` table (without its ``fitted`` sub-table).

    Parameters
    ----------
    key : int
        MIDI key (already checked to lie in the compass).
    table : mapping
        The table's fields.
    fitted : mapping
        The key's ``fitted`` values, already checked against the per-key fields.
    source : str, optional
        File name used in error messages.

    Raises
    ------
    PresetError
        For the first problem, naming the file, the key and the field.
    """
    for name in table:
        if name not in MEASURED_FIELDS:
            raise _error(source, key, name, f"unknown field; allowed: {', '.join(MEASURED_FIELDS)}")
    for name in (_SPEED.name, _N.name, _FREQ.name, _LEVEL.name, _T60.name):
        if name not in table:
            raise _error(source, key, name, "is missing; a measured strike needs "
                         f"{', '.join(MEASURED_FIELDS[:5])}")
    speed = _check(_SPEED, table[_SPEED.name], source, key)
    n = _array(_N, table[_N.name], None, source, key, None)
    bad = np.flatnonzero(np.diff(n) <= 0)
    if bad.size:
        raise _error(source, key, _N.name, f"partial numbers must be ascending and unique: {int(n[bad[0]])} is "
                     f"followed by {int(n[bad[0] + 1])}")
    arrays: dict[str, NDArray[Any]] = {_N.name: n}
    for p in _ARRAYS[1:]:
        raw = table.get(p.name, [math.nan] * len(n) if p.name in _ONE_STAGE_OK else None)
        arrays[p.name] = _array(p, raw, len(n), source, key, n)
    freq = arrays[_FREQ.name]
    bad = np.flatnonzero(np.diff(freq) <= 0)
    if bad.size:
        i = int(bad[0])
        raise _error(source, key, _FREQ.name, f"partial n = {n[i + 1]}: {float(freq[i + 1])!r} Hz is not above partial "
                     f"n = {n[i]} ({float(freq[i])!r} Hz); frequencies rise with the partial number")
    level, t60 = arrays[_LEVEL.name], arrays[_T60.name]
    after_level, after_t60 = arrays[_AFTER_LEVEL.name], arrays[_AFTER_T60.name]
    for i in range(len(n)):
        where = f"partial n = {n[i]}: "
        if np.isnan(after_level[i]) != np.isnan(after_t60[i]):
            name = _AFTER_T60.name if np.isnan(after_t60[i]) else _AFTER_LEVEL.name
            raise _error(source, key, name, f"{where}after_level_db and after_t60_s must both be numbers (two "
                         "stages) or both nan (one stage)")
        if np.isnan(after_level[i]):
            continue
        if not after_level[i] < level[i]:
            raise _error(source, key, _AFTER_LEVEL.name,
                         f"{where}{float(after_level[i])!r} dB must be below level_db = {float(level[i])!r} dB: "
                         "level_db is the whole partial at the onset, prompt sound and aftersound together")
        if not after_t60[i] > t60[i]:
            raise _error(source, key, _AFTER_T60.name,
                         f"{where}{float(after_t60[i])!r} s must be above t60_s = {float(t60[i])!r} s of the same "
                         "partial (the aftersound decays more slowly than the prompt sound), or nan for one stage")
    return MeasuredKey(key=key, speed_m_s=speed, fitted=dict(fitted), **arrays)
