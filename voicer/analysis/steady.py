"""Steady tones that are not the piano: mains hum and whines of the recording chain.

Real recordings carry tones that do not decay and sit at the same frequency in every note
of a take: hum at 50 or 60 Hz and its harmonics, a switching supply, a fan. Piano partials
do the opposite: each belongs to one note, and it decays. The test follows from that:

1. Long windows (up to ``MAX_WINDOW_S``, Hann, zero-padded twice) at the start and at the
   end of every segment between onsets, and over the quiet lead-in before the first one.
2. The element-wise minimum of all these spectra keeps only what is present in every
   window; its peaks at least ``min_snr_db`` above the local noise floor are candidates.
3. A candidate is a steady tone if, in every window, it is either found (a peak within a
   quarter of the window's resolution ``1 / T`` of the candidate, ``min_snr_db`` above that
   window's floor) or masked (a stronger neighbour covers that frequency, as a piano
   partial 2 Hz from a hum does in a short window), never absent; found in at least half of
   the windows and in the lead-in, if there is one; and if its level does not fall from
   the start to the end of the segments: in at least half of the segments where it was
   found at both ends and the fall rate is measured well enough to tell (see below), the
   fall is at most ``MAX_FALL_DB_PER_S`` (plus two standard deviations of the rate); where
   no single segment can tell (a weak tone in short notes), their rates are pooled.

The threshold: the slowest piano partials, the fundamentals of the low bass, have T60 of
20-40 s (physics.md section 4, from memory), i.e. fall by 1.5-3 dB/s (a bass partial with
T60 = 30 s falls 1 dB in 0.5 s). ``MAX_FALL_DB_PER_S = 0.5`` (T60 = 120 s) is three times
slower than the slowest of them. A fall rate counts only where its standard deviation
(from the levels' signal-to-noise ratios, ``8.69 / sqrt(2 SNR)`` dB per level) is at most
``DECIDING_SD_DB_PER_S``, so that the threshold with its allowance stays at or below
1 dB/s: a partial falling at 1.5 dB/s lies at least two standard deviations above it, even
in a file of one note with no lead-in, where the decay test is all there is. In a take of
several notes, or with a lead-in, a partial also fails for being absent from the other
windows. The price: a weak tone in short notes (e.g. 28 dB above the floor in 1.2 s notes)
is not measured well enough and is not reported.

Mains: a harmonic ``k`` of 50 or 60 Hz for ``k <= MAINS_MAX_HARMONIC`` with the fundamental
within ``MAINS_TOL_HZ``, so harmonic k within k times that (grids hold their frequency within about 0.2 Hz in normal
operation; common practice). Higher up, a whine on a multiple of 50 Hz is as likely a
coincidence: 15.7 kHz is the 314th harmonic of 50 Hz.
"""

from __future__ import annotations

__all__ = [
    "SteadyTone",
    "find_steady_tones",
    "MAX_WINDOW_S",
    "MIN_WINDOW_S",
    "MAX_FALL_DB_PER_S",
    "DECIDING_SD_DB_PER_S",
    "MAINS_HZ",
    "MAINS_MAX_HARMONIC",
    "MAINS_TOL_HZ",
]

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.fft import next_fast_len, rfft

from ..errors import ParameterError

#: Longest analysis window (resolution 0.5 Hz: a Hann window resolves tones 2 Hz apart).
MAX_WINDOW_S = 2.0
#: Segments too short for two windows of this length are not used.
MIN_WINDOW_S = 0.25
#: Left out after each onset (the hammer's knock) and before the first one.
ONSET_GUARD_S = 0.05
#: Largest fall of a steady tone, dB/s (see the module docstring).
MAX_FALL_DB_PER_S = 0.5
#: A segment's fall rate decides only if its standard deviation is at most this, dB/s.
DECIDING_SD_DB_PER_S = 0.25
#: Nominal mains frequencies, the highest harmonic flagged, and the tolerance of the fundamental.
MAINS_HZ = (50.0, 60.0)
MAINS_MAX_HARMONIC = 40
MAINS_TOL_HZ = 0.2

_LOWEST_HZ = 20.0
_TOP_FRACTION = 0.98  # of the Nyquist frequency
_FLOOR_BAND_HZ = 20.0  # the local noise floor is estimated over bands this wide
_QUARTILE_TO_MEAN_DB = -10.0 * np.log10(-np.log(0.75))
_FREQ_TOL = 0.25  # of the window's resolution 1 / T
_DB_PER_NEPER_AMPLITUDE = 20.0 / np.log(10.0)
_SIDELOBE_REACH = 8.0  # in 1 / T: Hann side lobes there are 55 dB down, below any tone's skirt that matters
_SIDELOBE_DB = 25.0  # below the first side lobe's 31.5 dB, allowing for the window-length mix


@dataclass(frozen=True)
class SteadyTone:
    """A tone present, not decaying, through the whole take.

    Attributes
    ----------
    freq_hz : float
        Frequency (median over the windows where it was found).
    level_db : float
        Level in dB re full scale of a unit sine (an amplitude of 1 is 0 dB), from the
        lead-in and the ends of the segments, where the piano is quietest.
    mains : bool
        A harmonic of 50 or 60 Hz (see the module docstring).
    """

    freq_hz: float
    level_db: float
    mains: bool


@dataclass(frozen=True)
class _Window:
    start: int
    length: int
    segment: int  # -1 for the lead-in
    at_end: bool
    centre_s: float


def _check(samples: ArrayLike, sample_rate: float, onsets_s: Sequence[float], min_snr_db: float
           ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    if not sample_rate > 0:
        raise ParameterError(f"sample_rate={sample_rate} must be > 0")
    x = np.asarray(samples, dtype=float)
    if x.ndim != 1 or x.size == 0:
        raise ParameterError(f"samples must be a non-empty 1-D array (mono; got shape {x.shape})")
    if not np.all(np.isfinite(x)):
        first = int(np.flatnonzero(~np.isfinite(x))[0])
        raise ParameterError(f"samples must be finite (first non-finite sample at {first / sample_rate:.3f} s)")
    onsets = np.asarray(onsets_s, dtype=float)
    duration = len(x) / sample_rate
    if onsets.ndim != 1 or onsets.size == 0:
        raise ParameterError("onsets_s must list at least one onset (seconds from the start)")
    if not np.all(np.isfinite(onsets)) or onsets[0] < 0 or onsets[-1] >= duration or np.any(np.diff(onsets) <= 0):
        raise ParameterError(f"onsets_s must be increasing and within 0 <= t < {duration:.3f} s (the recording)")
    if not min_snr_db > 0:
        raise ParameterError(f"min_snr_db={min_snr_db} must be > 0")
    return x, onsets


def _windows(onsets: NDArray[np.float64], total: int, sample_rate: float) -> list[_Window]:
    """The lead-in window, and a start and an end window for every segment long enough."""
    guard = int(round(ONSET_GUARD_S * sample_rate))
    longest, shortest = int(MAX_WINDOW_S * sample_rate), int(MIN_WINDOW_S * sample_rate)
    starts = np.round(onsets * sample_rate).astype(int)
    out = []
    lead = starts[0] - guard
    if lead >= shortest:
        length = min(lead, longest)
        out.append(_Window(lead - length, length, -1, True, (lead - length / 2) / sample_rate))
    ends = np.r_[starts[1:], total]
    for i, (a, b) in enumerate(zip(starts + guard, ends)):
        length = min((b - a) // 2, longest)
        if length < shortest:
            continue
        out.append(_Window(a, length, i, False, (a + length / 2) / sample_rate))
        out.append(_Window(b - length, length, i, True, (b - length / 2) / sample_rate))
    return out


def _spectrum_db(x: NDArray[np.float64], window: _Window, n_fft: int) -> NDArray[np.float32]:
    """Amplitude spectrum in dB re a unit sine (a sine of amplitude A at a bin gives 20 log10 A)."""
    frame = x[window.start:window.start + window.length]
    taper = np.hanning(window.length)
    mag = np.abs(rfft((frame - frame.mean()) * taper, n_fft)) * (2.0 / taper.sum())
    return (20.0 * np.log10(mag + 1e-15)).astype(np.float32)


def _floor_db(spec_db: NDArray[np.float32], band: int) -> NDArray[np.float64]:
    """Local noise floor (mean noise power, in dB) over bands of ``band`` bins, for every bin.

    From the lower quartile of each band rather than its median, so that the skirts of a
    strong partial filling part of the band do not raise it: noise power in a bin is
    exponentially distributed, so its lower quartile is ``-ln(3/4) = 0.288`` of the mean.
    """
    count = len(spec_db) // band
    quartiles = np.percentile(spec_db[:count * band].reshape(count, band), 25.0, axis=1)
    centres = (np.arange(count) + 0.5) * band
    return np.interp(np.arange(len(spec_db)), centres, quartiles) + _QUARTILE_TO_MEAN_DB


def _peak_near(spec_db: NDArray[np.float32], centre: int, radius: int) -> tuple[float, float] | None:
    """The highest local maximum within ``radius`` bins of ``centre``: (bin, level), parabolic."""
    lo, hi = max(centre - radius, 1), min(centre + radius, len(spec_db) - 2)
    if hi < lo:
        return None
    seg = spec_db[lo - 1:hi + 2].astype(float)
    inner = seg[1:-1]
    local = (inner > seg[:-2]) & (inner >= seg[2:])
    if not local.any():
        return None
    j = int(np.argmax(np.where(local, inner, -np.inf)))
    a, b, c = seg[j], seg[j + 1], seg[j + 2]
    denom = a - 2.0 * b + c
    p = 0.5 * (a - c) / denom if denom < 0 else 0.0
    return lo + j + p, b - 0.25 * (a - c) * p


def _mains(freq_hz: float) -> bool:
    for nominal in MAINS_HZ:
        k = int(round(freq_hz / nominal))
        if 1 <= k <= MAINS_MAX_HARMONIC and abs(freq_hz / k - nominal) <= MAINS_TOL_HZ:
            return True
    return False


def find_steady_tones(samples: ArrayLike, sample_rate: float, onsets_s: Sequence[float], *,
                      min_snr_db: float = 10.0) -> tuple[SteadyTone, ...]:
    """Steady tones of a take: present at one frequency in every note, and not decaying.

    Parameters
    ----------
    samples : array_like of float, 1-D
        The recording (mono, full scale 1).
    sample_rate : float > 0
        Samples per second.
    onsets_s : sequence of float
        Onsets of the struck notes, increasing, in seconds from the start (at least one).
    min_snr_db : float > 0
        A tone must stand this far above the local noise floor in every window it is found in.

    Returns
    -------
    tuple of SteadyTone
        Sorted by frequency; empty when there is none, or when no segment is long enough
        for two windows of MIN_WINDOW_S.

    Raises
    ------
    ParameterError
        If the samples are empty, not 1-D or not finite, or the onsets are missing, not
        increasing or outside the recording.
    """
    x, onsets = _check(samples, sample_rate, onsets_s, min_snr_db)
    windows = _windows(onsets, len(x), sample_rate)
    if not any(w.segment >= 0 for w in windows):
        return ()
    n_fft = next_fast_len(2 * max(w.length for w in windows))
    df = sample_rate / n_fft
    spectra = np.stack([_spectrum_db(x, w, n_fft) for w in windows])
    band = max(int(_FLOOR_BAND_HZ / df), 16)
    floors = np.stack([_floor_db(s, band) for s in spectra])
    lowest = np.min(spectra, axis=0)
    lowest_floor = _floor_db(lowest, band)

    first, last = int(np.ceil(_LOWEST_HZ / df)), int(_TOP_FRACTION * (len(lowest) - 1))
    mid = lowest[first:last]
    is_peak = (mid > lowest[first - 1:last - 1]) & (mid >= lowest[first + 1:last + 1])
    is_peak &= mid >= lowest_floor[first:last] + min_snr_db
    candidates = np.flatnonzero(is_peak) + first

    lead_in = [i for i, w in enumerate(windows) if w.segment < 0]
    segments = sorted({w.segment for w in windows if w.segment >= 0})
    found_tones: list[SteadyTone] = []
    for c in candidates:
        found: dict[int, tuple[float, float, float]] = {}  # window -> (freq, level, snr in dB)
        absent = False
        for i, w in enumerate(windows):
            resolution_bins = n_fft / w.length  # 1 / T in bins
            peak = _peak_near(spectra[i], int(c), max(int(_FREQ_TOL * resolution_bins), 1))
            if peak is not None and peak[1] >= floors[i][int(c)] + min_snr_db:
                found[i] = (peak[0] * df, peak[1], peak[1] - floors[i][int(c)])
            elif spectra[i][int(c)] < floors[i][int(c)] + min_snr_db:
                absent = True
                break
        if absent or 2 * len(found) < len(windows) or any(i not in found for i in lead_in):
            continue
        if not _steady(found, windows, segments):
            continue
        ends = [found[i][1] for i in found if windows[i].at_end]
        freq = float(np.median([f for f, _, _ in found.values()]))
        level = float(np.median(ends if ends else [lv for _, lv, _ in found.values()]))
        found_tones.append(SteadyTone(freq_hz=freq, level_db=level, mains=_mains(freq)))
    return tuple(_distinct(found_tones, min(w.length for w in windows) / sample_rate))


def _steady(found: dict[int, tuple[float, float, float]], windows: list[_Window], segments: list[int]) -> bool:
    """Does the level not fall, in at least half of the segments whose fall rate decides?

    Where no single segment decides (a weak tone in short notes), the segments' rates are
    pooled (weighted by their inverse variances) and the pool decides if it is precise
    enough; a segment with a decaying partial on the tone then counts against it.
    """
    rates, sds = [], []
    for s in segments:
        pair = [i for i, w in enumerate(windows) if w.segment == s]
        if len(pair) != 2 or not all(i in found for i in pair):
            continue
        start, end = (found[i] for i in pair)
        dt = windows[pair[1]].centre_s - windows[pair[0]].centre_s
        # Level error of a tone at a power SNR s above the noise: 8.69 / sqrt(2 s) dB.
        sd = np.hypot(*(_DB_PER_NEPER_AMPLITUDE / np.sqrt(2.0 * 10.0 ** (snr / 10.0)) for snr in (start[2], end[2])))
        rates.append((start[1] - end[1]) / dt)
        sds.append(sd / dt)
    rate, sd = np.array(rates), np.array(sds)
    deciding = sd <= DECIDING_SD_DB_PER_S
    if deciding.any():
        votes = rate[deciding] <= MAX_FALL_DB_PER_S + 2.0 * sd[deciding]
        return 2 * int(votes.sum()) >= len(votes)
    if not len(rate):
        return False
    weight = 1.0 / sd**2
    pooled, pooled_sd = float(np.sum(weight * rate) / weight.sum()), float(1.0 / np.sqrt(weight.sum()))
    return pooled_sd <= DECIDING_SD_DB_PER_S and pooled <= MAX_FALL_DB_PER_S + 2.0 * pooled_sd


def _distinct(tones: list[SteadyTone], shortest_s: float) -> list[SteadyTone]:
    """Tones that are not the main lobe or the side lobes of a stronger one.

    Hann: main lobe half-width 2 / T; side lobes from 2.5 / T on, the first 31.5 dB down and
    falling (Harris 1978, Proc. IEEE 66, 51). A window of one length everywhere leaves its
    side lobes in the minimum spectrum as peaks found in every window, so a tone within
    ``_SIDELOBE_REACH / T`` of one at least ``_SIDELOBE_DB`` stronger is taken for one.
    """
    out: list[SteadyTone] = []
    for tone in sorted(tones, key=lambda t: -t.level_db):
        if all(abs(tone.freq_hz - o.freq_hz) >= 2.0 / shortest_s
               and (abs(tone.freq_hz - o.freq_hz) >= _SIDELOBE_REACH / shortest_s
                    or o.level_db - tone.level_db < _SIDELOBE_DB) for o in out):
            out.append(tone)
    return sorted(out, key=lambda t: t.freq_hz)
