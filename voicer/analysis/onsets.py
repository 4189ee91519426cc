"""Segmentation of a take: onsets, the pitch and key of each strike, its dynamics.

Onsets are peaks of the spectral flux (the half-wave rectified rise of a compressed
log-magnitude spectrum, summed over quarter-tone bands; Bello et al. 2005, "A tutorial on
onset detection in music signals", IEEE TSAP 13; band layout after Boeck, Krebs & Schedl
2012, ISMIR), picked above a moving median, then moved to the attack with ever shorter
windows.

The pitch of a strike is the first partial of the stiff-string series
``f_n = n f0 sqrt(1 + B n^2)`` (Fletcher 1964, JASA 36) that best explains the partials
which rose at the onset: an inharmonic comb over (f1, B) after Galembo & Askenfelt (1999,
IEEE TSAP 7), scored both ways (predicted partials missing, partials found unexplained:
the two-way mismatch of Maher & Beauchamp 1994, JASA 95), then refined on the measured
low partials. Partials already sounding before the onset (earlier notes, mains hum) are
not taken for the new note's.
"""

from __future__ import annotations

__all__ = ["Strike", "Take", "find_onsets", "estimate_pitch", "segment"]

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray

from ..errors import ParameterError, RecordingError
from ..physics.tuning import A4_KEY, HIGHEST_KEY, LOWEST_KEY
from .audio import MIN_DURATION_S, Recording

# --- onset detection -------------------------------------------------------------------
_FRAME_S = 0.093       # coarse analysis window (4096 samples at 44.1 kHz): resolves partials
_HOP_S = 0.010         # coarse hop: 100 frames per second
_BANDS_PER_OCTAVE = 24  # quarter-tone bands: partials of neighbouring keys fall apart
_BAND_LOW_HZ = 27.0
_BEAT_S = 0.2           # longest beat period of partials sharing a band (5 Hz apart)
_FALL_S = 0.04          # a damper's fall is this quick (natural decays are slower)
_FLOOR_S = 0.1          # smoothing of the band levels for their floor
_RANGE_DB = 50.0        # ... which is at most this far below the loudest band
_RANGE_S = 1.0          # ... within this time
_RISE_MIN = 0.1         # a band counts from this rise of log10(1 + M / floor) on (2 dB)
_MEDIAN_S = 0.5         # moving median of the flux: the adaptive threshold's base
_THRESHOLD = 1.0        # ... and the rise above it: e.g. 5 partials each up by 8 dB
_MEDIUM_S = 0.023      # attack refinement windows: first 1024 samples at 44.1 kHz,
_FINE_S = 0.005        # then 256
_REFINE_SIDE_S = 0.02  # levels before and after the searched region are taken over this
_ATTACK_FRACTION = 0.2  # the attack is where the new energy first climbs this far up
_STAYS_UP = 0.8         # ... and stays up this fraction of the time after
_CHUNK_FRAMES = 2048   # frames per FFT batch (bounds memory on long takes)

# --- pitch ------------------------------------------------------------------------------
_PITCH_WINDOW_S = 0.5    # analysis window after (and before) the onset: resolves A0's partials
_BEFORE_SPREAD_HZ = 4.0  # half-width of the mainlobe of that window
_RISE_DB = 4.0           # a partial counts where it rose this much above what was there
_SPECTRUM_RANGE_DB = 60.0  # the floor is at most this far below the strongest peak
_LEAK_MARGIN_DB = 10.0   # a peak this close above a stronger one's Hann leakage is leakage
_LEAK_REACH = 25.0       # ... looked for up to this many 1 / T (where it is 90 dB down)
_CLUSTER_T = 4.0         # one partial per +-this many 1 / T (two strings of a unison)
_HUM_HARMONICS = 20      # mains harmonics checked (50 or 60 Hz up to 1 or 1.2 kHz)
_HUM_STEADY_DB = 1.0     # a mains line keeps its level over the window
_CELL_CENTS = 5.0        # log-frequency grid of the comb
_GRID_LOW_HZ = 20.0
_F1_LOW_HZ = 25.0        # A0 a semitone flat is 26 Hz
_F1_HIGH_HZ = 4800.0     # C8 a semitone sharp and stretched
_HIT_DB = 12.0           # a partial stands this far above the floor (noise: 1e-5 per bin)
_CAP_DB = 40.0           # no single partial outweighs the series
_CLEAR_DB = 20.0         # a first partial this prominent is measured, not inferred
_MISS_DB = 10.0          # cost of a predicted partial missing
_UNEXPLAINED_RANGE_DB = 30.0  # ... counted from this far below the strongest peak on
_UNEXPLAINED = 0.5       # cost per dB of a partial within a series' range it does not explain
_TOL_CENTS = 15.0        # a partial is found this close to its prediction (or 1.5 bins)
_COARSE_PARTIALS = 12    # partials of the comb, at most
_STRETCH_LIMIT = 0.09    # ... and B n^2 at most this (see _comb_layout)
_LONE_PARTIAL_HZ = 2000.0  # above this a single partial may make a note
_REFINE_PARTIALS = 12
_FOLLOW_CENTS = 20.0     # search around a predicted partial when following the series
_OUTLIER_CENTS = 10.0    # a partial further off the fitted series is dropped
_LEVEL_WINDOW_S = 0.020  # short-time RMS for the strike level
_LEVEL_SPAN_S = 0.100


@lru_cache(maxsize=16)
def _hann(n: int) -> NDArray[np.float64]:
    """Symmetric Hann window of n points without its zero end points (every sample weighs)."""
    return np.hanning(n + 2)[1:-1]


def _frames_stft(x: NDArray[np.float64], n_fft: int, hop: int, window: NDArray[np.float64],
                 start: int, count: int) -> NDArray[np.float64]:
    """|rfft| of ``count`` frames of ``x`` (already padded) from frame ``start``."""
    view = sliding_window_view(x, n_fft)[start * hop : (start + count - 1) * hop + 1 : hop]
    return np.abs(np.fft.rfft(view * window, axis=1))


@lru_cache(maxsize=8)
def _band_layout(n_fft: int, sample_rate: int) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """First bin of each band, and the bins used (>= _BAND_LOW_HZ, < 16 kHz)."""
    f = np.fft.rfftfreq(n_fft, 1.0 / sample_rate)
    used = np.flatnonzero((f >= _BAND_LOW_HZ) & (f < min(16000.0, 0.5 * sample_rate)))
    band = np.floor(_BANDS_PER_OCTAVE * np.log2(f[used] / _BAND_LOW_HZ)).astype(np.int64)
    starts = np.flatnonzero(np.r_[True, band[1:] != band[:-1]])
    return starts, used


def _flux(samples: NDArray[np.float64], sample_rate: int) -> tuple[NDArray[np.float64], int, int]:
    """Spectral flux per coarse frame (frame k centred on sample k * hop); n_fft, hop."""
    n_fft = 1 << round(math.log2(_FRAME_S * sample_rate))
    hop = max(1, round(_HOP_S * sample_rate))
    n_frames = (len(samples) - 1) // hop + 1
    # zero padding, the recording faded in over half a window: a step at the start would
    # splatter steady tones (hum) and noise into the bands around them, an onset. (At the
    # end, frames reaching past it are not used: an onset there is too late to analyse.)
    fade = max(1, min(len(samples), n_fft // 2))
    ramp = np.sin(0.5 * np.pi * (np.arange(fade) + 0.5) / fade) ** 2
    x = np.concatenate([np.zeros(n_fft // 2), samples, np.zeros(n_fft)]).astype(np.float32)
    x[n_fft // 2 : n_fft // 2 + fade] *= ramp
    window = _hann(n_fft).astype(np.float32)
    starts, used = _band_layout(n_fft, sample_rate)
    bands = np.empty((n_frames, len(starts)), dtype=np.float32)
    for s in range(0, n_frames, _CHUNK_FRAMES):
        c = min(_CHUNK_FRAMES, n_frames - s)
        power = _frames_stft(x, n_fft, hop, window, s, c) ** 2
        bands[s : s + c] = np.sqrt(np.add.reduceat(power[:, used], starts, axis=1))
    # Compression log(1 + M / floor). The floor of a band is its quietest 0.1 s mean over
    # the frames inside the recording (minimum statistics, Martin 2001, IEEE TSAP 9), but
    # never more than _RANGE_DB below the loudest band within _RANGE_S: a noiseless
    # recording (a rendered note, a clean sample) has no floor of its own, and changes far
    # below the note (a unison's slow beats in its faint upper partials, rounding noise)
    # would otherwise count as much as a strike. Noise and steady tones (hum) sit near
    # log(2) and barely move; a partial rising 12 dB above what sounded before moves by
    # ~0.6 wherever it stands above the floor.
    inner = bands[min(n_frames - 1, n_fft // 2 // hop) : max(1, n_frames - n_fft // 2 // hop)]
    smooth = max(1, min(len(inner), round(_FLOOR_S / _HOP_S)))
    sums = np.cumsum(np.concatenate([np.zeros((1, bands.shape[1])), inner]), axis=0)
    noise = ((sums[smooth:] - sums[:-smooth]) / smooth).min(axis=0)
    loudest = _running_max(bands.max(axis=1).astype(np.float64), max(1, round(_RANGE_S / _HOP_S)))
    floor = np.maximum(noise[None, :], (10.0 ** (-_RANGE_DB / 20.0) * loudest + 1e-30)[:, None])
    floor = floor.astype(np.float32)

    def level(m: NDArray[np.float32]) -> NDArray[np.float32]:
        """Compressed level of magnitudes m per frame, against that frame's floor."""
        return np.log10(1.0 + m / floor)

    # The rise of each band is taken over its largest level in the previous _BEAT_S, not
    # the previous frame: partials sharing a band (a bass note's, closer than the window
    # resolves; two notes' a few Hz apart, whose beating ends when a damper stops one)
    # beat, which is not an onset. Less _RISE_MIN, so that noise adds nothing. Both
    # levels are taken against the same (this frame's) floor.
    # Before the recording the level is the band's usual quiet level (its 20th percentile):
    # a note struck at the very start is an onset, noise at the start is not.
    lag = max(1, math.ceil(_BEAT_S / _HOP_S))
    lead = np.repeat(np.percentile(bands, 20, axis=0)[None, :], lag, axis=0).astype(np.float32)
    padded = np.concatenate([lead, bands[:-1]])
    recent = sliding_window_view(padded, lag, axis=0).max(axis=2)
    now = level(bands)
    rise = np.maximum(now - level(recent) - _RISE_MIN, 0.0).sum(axis=1, dtype=np.float64)
    # A damper stopping a note lowers many bands within tens of ms, and where its partials
    # shared a band with another note's, the band can rise as their interference ends: a
    # frame whose bands fell more within _FALL_S than they rose (over +-30 ms) is no onset.
    short = max(1, math.ceil(_FALL_S / _HOP_S))
    lowest = sliding_window_view(np.concatenate([bands[:1].repeat(short, axis=0), bands[:-1]]), short,
                                 axis=0).min(axis=2)
    fall = np.maximum(level(lowest) - now - _RISE_MIN, 0.0).sum(axis=1, dtype=np.float64)
    near = max(1, round(0.03 / _HOP_S))
    fall = sliding_window_view(np.pad(fall, near, mode="edge"), 2 * near + 1).max(axis=1)
    flux = np.where(rise > fall, rise, 0.0)
    flux[max(0, (len(samples) - n_fft // 2) // hop + 1) :] = 0.0
    return flux, n_fft, hop


def _moving_median(x: NDArray[np.float64], half: int) -> NDArray[np.float64]:
    # (reflected, also where x is shorter than the window: copies of its ends would
    # outvote a short note's one onset)
    padded = np.pad(x, half, mode="reflect" if len(x) > 1 else "edge")
    return np.median(sliding_window_view(padded, 2 * half + 1), axis=1)


def _pick_peaks(flux: NDArray[np.float64], hop_s: float, min_gap_s: float) -> NDArray[np.int64]:
    """Frames of flux peaks: local maxima standing _THRESHOLD above the moving median,
    then the strongest first, none within ``min_gap_s`` of a stronger one."""
    base = _moving_median(flux, max(1, round(_MEDIAN_S / hop_s)))
    excess = flux - base
    near = max(1, round(0.03 / hop_s))
    padded = np.pad(flux, near, mode="constant", constant_values=-np.inf)
    is_max = flux >= sliding_window_view(padded, 2 * near + 1).max(axis=1)
    candidates = np.flatnonzero(is_max & (excess >= _THRESHOLD))
    gap = max(1, round(min_gap_s / hop_s))
    kept: list[int] = []
    for k in candidates[np.argsort(-excess[candidates], kind="stable")]:
        if all(abs(k - j) >= gap for j in kept):
            kept.append(int(k))
    return np.array(sorted(kept), dtype=np.int64)


def _attack_offset(fraction: float) -> float:
    """Where a step sits in a Hann window (in window lengths past its centre) when the
    window holds ``fraction`` of its energy past the step."""
    h2 = _hann(4096) ** 2
    past = np.cumsum(h2[::-1])[::-1] / h2.sum()
    return float(np.argmin(np.abs(past - fraction)) - 2048) / 4096


_ATTACK_OFFSET = _attack_offset(_ATTACK_FRACTION)


def _crossing(samples: NDArray[np.float64], sample_rate: int, lo: int, hi: int, window_s: float) -> float | None:
    """Sample index of the attack within [lo, hi) (zeros before the recording), or None
    where this window sees no rise.

    Windows of ``window_s`` are weighted towards the frequencies that gained at least
    6 dB from before the region to after it (the new note's, not those of notes already
    ringing); the attack is where that energy first climbs a fifth of the way from its
    level before to its level after, corrected for where a step then sits in the window.
    The first crossing, not the steepest rise, so that the pulses of a bass note's
    unresolved partials after the attack do not count.
    """
    w = 1 << round(math.log2(window_s * sample_rate))
    hop = max(1, w // 16)
    side = round(_REFINE_SIDE_S * sample_rate)
    a, b = lo - w - side, hi + w + side
    pad_a, pad_b = max(0, -a), max(0, b - len(samples))
    x = np.concatenate([np.zeros(pad_a), samples[max(0, a) : min(len(samples), b)], np.zeros(pad_b)])
    n_frames = (len(x) - w) // hop + 1
    centres = a + w // 2 + hop * np.arange(n_frames)
    pre = centres + w // 2 <= lo          # windows wholly before the region
    post = centres - w // 2 >= hi         # ... and wholly after it
    offset = _ATTACK_OFFSET * w
    inside = (centres + offset >= lo) & (centres + offset < hi)
    if not (pre.any() and post.any() and inside.any()):
        return None
    mag = _frames_stft(x, w, hop, _hann(w), 0, n_frames)
    gain = np.log((mag[post].mean(axis=0) + 1e-12) / (mag[pre].mean(axis=0) + 1e-12))
    gain[: int(np.ceil(_BAND_LOW_HZ * w / sample_rate))] = 0.0
    weight = np.maximum(gain - math.log(2.0), 0.0)
    if np.count_nonzero(weight) < 2:
        return None
    energy = (mag**2) @ weight
    e_pre, e_post = float(np.median(energy[pre])), float(np.median(energy[post]))
    if not e_post > 2.0 * e_pre:
        return None
    level = e_pre + _ATTACK_FRACTION * (e_post - e_pre)
    idx = np.flatnonzero(inside & (energy >= level))
    if len(idx) == 0:
        return None
    i = int(idx[0])
    # a rise, not a fluctuation: low where the region starts, up from the crossing on
    if i == int(np.argmax(inside)) or np.mean(energy[i:][inside[i:]] >= level) < _STAYS_UP:
        return None
    t = float(centres[i])
    if i > 0 and energy[i] > energy[i - 1]:  # between the two frames, linearly
        t -= hop * (energy[i] - level) / (energy[i] - energy[i - 1])
    return t + offset


def _refine(samples: NDArray[np.float64], sample_rate: int, lo: int, hi: int) -> float | None:
    """Time (s) of the attack within samples [lo, hi), in three steps: the window of the
    detection (which separates a soft note's partials from those of a loud one still
    ringing), then ~23 and ~5 ms windows within an eighth of the previous window of its
    estimate, each kept where it sees the rise. None where the window of the detection
    sees no lasting rise: the flux peak was no strike but a note stopping short (a damper
    on a loud note, the end of a rendering), whose splatter across the bands dies with it."""
    t = (lo + hi) / 2
    span = (lo, hi)
    for window_s in (_FRAME_S, _MEDIUM_S, _FINE_S):
        found = _crossing(samples, sample_rate, span[0], span[1], window_s)
        if found is not None:
            t = found
        elif window_s == _FRAME_S:
            return None
        eighth = round(window_s * sample_rate / 8)
        span = (round(t) - eighth, round(t) + eighth)
    return max(0.0, t / sample_rate)


def find_onsets(samples: ArrayLike, sample_rate: int, *, min_gap_s: float = 0.08) -> NDArray[np.float64]:
    """Times of the strikes in a recording.

    Parameters
    ----------
    samples : array_like of float, shape (n,)
        Mono audio.
    sample_rate : int > 0
    min_gap_s : float > 0
        Two onsets closer than this are one (the stronger is kept).

    Returns
    -------
    ndarray of float64
        Onset times in seconds, ascending, each at the attack (within ~1 ms).
    """
    x = np.asarray(samples, dtype=np.float64)
    if len(x) == 0:
        return np.empty(0)
    flux, n_fft, hop = _flux(x, sample_rate)
    peaks = _pick_peaks(flux, hop / sample_rate, min_gap_s)
    times = []
    for i, k in enumerate(peaks):
        lo = k * hop - n_fft // 2 - hop
        hi = k * hop + n_fft // 2 + hop
        # keep the search between the neighbouring detections
        if i > 0:
            lo = max(lo, (peaks[i - 1] + k) * hop // 2)
        if i + 1 < len(peaks):
            hi = min(hi, (peaks[i + 1] + k) * hop // 2)
        # (before the start is zero: a note struck at once is found at 0)
        t = _refine(x, sample_rate, lo, min(len(x), hi))
        if t is not None:
            times.append(t)
    return np.array(times, dtype=np.float64)


# --- pitch ------------------------------------------------------------------------------

def _spectrum_db(x: NDArray[np.float64], n_fft: int) -> NDArray[np.float64]:
    """Hann-windowed magnitude in dB, scaled so that a sinusoid reads its amplitude."""
    w = _hann(len(x))
    mag = np.abs(np.fft.rfft(x * w, n_fft)) * (2.0 / w.sum())
    return 20.0 * np.log10(mag + 1e-15)


def _running_max(x: NDArray[np.float64], half: int) -> NDArray[np.float64]:
    """Maximum over x[i - half : i + half + 1] (edges: over what exists), by doubling
    windows: O(n log half)."""
    length = 2 * half + 1
    padded = np.pad(x, (half, half + length), mode="constant", constant_values=-np.inf)
    span, m = 1, padded
    while 2 * span <= length:
        m = np.maximum(m[:-span], m[span:])
        span *= 2
    return np.maximum(m[: len(x)], m[length - span : length - span + len(x)])


def _floor_db(db: NDArray[np.float64], block: int) -> NDArray[np.float64]:
    """Noise floor: median per block of bins, interpolated between block centres."""
    n = len(db) // block * block
    med = np.median(db[:n].reshape(-1, block), axis=1)
    centres = (np.arange(len(med)) + 0.5) * block
    return np.interp(np.arange(len(db)), centres, med)


@lru_cache(maxsize=8)
def _grid(n_fft: int, sample_rate: int) -> tuple[NDArray[np.float64], NDArray[np.int64], NDArray[np.int64]]:
    """Log-frequency cells (centre Hz) and, as interleaved ``np.maximum.reduceat``
    indices, the bins searched for a partial predicted in each (+-_TOL_CENTS, at least
    +-1.5 bins) and the bins each cell covers (at least one)."""
    df = sample_rate / n_fft
    count = int(1200.0 / _CELL_CENTS * math.log2(0.45 * sample_rate / _GRID_LOW_HZ))
    f = _GRID_LOW_HZ * np.exp2(np.arange(count) * _CELL_CENTS / 1200.0)

    def ranges(lo_hz: NDArray[np.float64], hi_hz: NDArray[np.float64]) -> NDArray[np.int64]:
        lo = np.clip(np.floor(lo_hz / df).astype(np.int64), 0, n_fft // 2)
        hi = np.clip(np.ceil(hi_hz / df).astype(np.int64) + 1, lo + 1, n_fft // 2 + 1)
        return np.stack([lo, hi], axis=1).ravel()

    tol = np.exp2(_TOL_CENTS / 1200.0)
    edge = np.exp2(0.5 * _CELL_CENTS / 1200.0)
    return (f, ranges(np.minimum(f / tol, f - 1.5 * df), np.maximum(f * tol, f + 1.5 * df)),
            ranges(f / edge, f * edge))


def _b_values(ratio: float) -> NDArray[np.float64]:
    return np.r_[0.0, 1e-5 * ratio ** np.arange(int(math.log(4e-2 / 1e-5, ratio)) + 1)]


#: Inharmonicity grid of the comb: steps of sqrt(2) keep the low partials of every
#: register within the search tolerance of a grid point.
_B_GRID = _b_values(math.sqrt(2.0))


def _b_limit(f1: NDArray[np.float64] | float) -> NDArray[np.float64]:
    """Largest plausible inharmonicity for a first partial f1: 2e-3 in the bass and tenor,
    rising to 4e-2 at C8 (from memory: Young 1952 and Conklin 1996 give ~1e-4 in the
    tenor and ~1e-2 at the top)."""
    return np.maximum(2e-3, 4e-2 * np.asarray(f1) / 4186.0)


def _stretch(b: NDArray[np.float64], n: NDArray[np.float64]) -> NDArray[np.float64]:
    """f_n / f_1 of the stiff string, ``n sqrt((1 + B n^2) / (1 + B))`` (Fletcher 1964)."""
    return n * np.sqrt((1.0 + b * n**2) / (1.0 + b))


@dataclass(frozen=True)
class _Spectrum:
    """One analysis window: dB per bin and prominence (dB above the noise floor, capped;
    zero where the bin did not rise above what sounded before, or is mains hum); on the
    log grid, the prominence of a partial found within
    the search tolerance of each cell (zero if none), a running count of cells holding a
    partial (``busy[c]`` = cells before c), and the summed prominence of the partials
    below the start and below the end of each cell's search range, and the cells where
    an earlier sound or hum could hide a partial; all padded past the top."""

    db: NDArray[np.float64]
    prominence: NDArray[np.float64]
    df: float
    cells_hz: NDArray[np.float64]
    evidence: NDArray[np.float64]
    busy: NDArray[np.int32]
    mass_from: NDArray[np.float64]
    mass_to: NDArray[np.float64]
    hidden: NDArray[np.bool_]


def _analyse(seg: NDArray[np.float64], sample_rate: int, before: NDArray[np.float64] | None) -> _Spectrum:
    n_fft = 1 << int(math.ceil(math.log2(2 * len(seg))))
    df = sample_rate / n_fft
    db = _spectrum_db(seg, n_fft)
    # the noise floor, but within _SPECTRUM_RANGE_DB of the strongest peak: a noiseless
    # spectrum (a rendered note, a clean sample) would otherwise make everything stand out
    floor = np.maximum(_floor_db(db, max(64, round(200.0 / df))), float(db.max()) - _SPECTRUM_RANGE_DB)
    prominence = np.clip(db - floor, 0.0, _CAP_DB)
    hidden_bins = _mains_lines(seg, n_fft, df, db)
    if before is not None and len(before) >= round(0.05 * sample_rate):
        # What was sounding before the onset (earlier notes, hum) is not this note's: a
        # bin counts only where it rose _RISE_DB above it (a partial of this note adds to
        # one of an earlier note at the same frequency: a re-struck key, an octave). Peaks
        # before are widened by _BEFORE_SPREAD_HZ: a note damped during the window decays
        # faster, and its broader peak would otherwise stand out on the skirts.
        prior = _running_max(_spectrum_db(before[-len(seg):], n_fft), max(1, round(_BEFORE_SPREAD_HZ / df)))
        rose = db >= prior + _RISE_DB
        prominence[~rose] = 0.0
        # where an earlier sound stands, a partial of this note may be hidden: there a
        # missing partial is unknown, not absent
        hidden_bins |= ~rose & (prior >= floor + _HIT_DB)
    prominence[hidden_bins] = 0.0
    # Partials: peak bins standing _HIT_DB out (noise maxima stay below: ~1e-5 per bin)
    # that are neither the leakage of a stronger peak nor a weaker member of its cluster.
    is_peak = np.r_[False, (db[1:-1] >= db[:-2]) & (db[1:-1] > db[2:]), False]
    candidates = np.flatnonzero(is_peak & (prominence >= _HIT_DB))
    masked = _leaked(candidates, db, df, len(seg) / sample_rate)
    peak = np.zeros(len(db))
    peak[candidates[~masked]] = prominence[candidates[~masked]]
    cells_hz, searched, covered = _grid(n_fft, sample_rate)
    evidence = np.maximum.reduceat(peak, searched)[::2]
    held = np.maximum.reduceat(prominence, covered)[::2] >= _HIT_DB
    hidden = np.maximum.reduceat(hidden_bins, covered)[::2]
    # What a series leaves unexplained counts from _UNEXPLAINED_RANGE_DB below the
    # strongest peak on (amplitude-weighted, as in the two-way mismatch): noise peaks of
    # the knock and the weak members of clusters around a few strong treble partials
    # are no partials another series should account for.
    loud = np.clip(db - max(float(db.max()) - _UNEXPLAINED_RANGE_DB, -np.inf), 0.0, None)
    mass = np.r_[0.0, np.cumsum(np.minimum(peak, loud))]
    pad = _COMB_REACH
    busy = np.r_[0, np.cumsum(held), np.full(pad, int(held.sum()))].astype(np.int32)
    return _Spectrum(db, prominence, df, cells_hz, np.r_[evidence, np.zeros(pad)], busy,
                     np.r_[mass[searched[0::2]], np.full(pad, mass[-1])],
                     np.r_[mass[searched[1::2]], np.full(pad, mass[-1])],
                     np.r_[hidden, np.zeros(pad, dtype=bool)])


def _hann_leakage_db(u: NDArray[np.float64]) -> NDArray[np.float64]:
    """Envelope of the Hann window's sidelobes at u = frequency offset times window
    length (u >= 2, past the mainlobe), dB re its peak: |W(u)| = |sinc(u)| / |1 - u^2|
    (Harris 1978, Proc. IEEE 66), whose envelope is 1 / (pi u (u^2 - 1)): -31.5 dB at
    the first sidelobe (u = 2.5), then 18 dB per octave."""
    return -20.0 * np.log10(np.pi * u * (u**2 - 1.0))


def _leaked(peaks: NDArray[np.int64], db: NDArray[np.float64], df: float, length_s: float) -> NDArray[np.bool_]:
    """Which of the peak bins ``peaks`` (ascending) are no partial of their own: within
    _CLUSTER_T / T or _TOL_CENTS of a stronger peak (the unresolved strings of a unison
    and their beating make a cluster of peaks, one partial), or below the Hann leakage of
    a stronger peak plus _LEAK_MARGIN_DB (the sidelobes of a partial decaying within the
    window stand a little above those of a steady sine). T is the window's length."""
    if len(peaks) < 2:
        return np.zeros(len(peaks), dtype=bool)
    f = peaks * df
    reach = np.maximum(_LEAK_REACH / length_s, f * (2.0 ** (_TOL_CENTS / 1200.0) - 1.0))
    lo = np.searchsorted(f, f - reach)
    hi = np.searchsorted(f, f + reach, side="right")
    q = np.repeat(np.arange(len(f)), hi - lo)                      # each peak ...
    p = np.arange(len(q)) - np.repeat(np.cumsum(hi - lo) - (hi - lo), hi - lo) + np.repeat(lo, hi - lo)
    stronger = db[peaks[p]] > db[peaks[q]]                          # ... against its neighbours
    q, p = q[stronger], p[stronger]
    delta = np.abs(f[p] - f[q])
    cluster = np.maximum(_CLUSTER_T / length_s, f[q] * (2.0 ** (_TOL_CENTS / 1200.0) - 1.0))
    u = np.maximum(delta * length_s, 2.0 + 1e-9)
    hit = (delta < cluster) | (db[peaks[q]] < db[peaks[p]] + _hann_leakage_db(u) + _LEAK_MARGIN_DB)
    masked = np.zeros(len(f), dtype=bool)
    masked[q[hit]] = True
    return masked


def _mains_lines(seg: NDArray[np.float64], n_fft: int, df: float, db: NDArray[np.float64]) -> NDArray[np.bool_]:
    """Bins of mains hum: peaks at a harmonic of 50 or 60 Hz (within 0.5 %, EN 50160
    allows 1 %) whose level is the same (within _HUM_STEADY_DB) in both halves of the
    window. A piano partial there decays; where it decays too slowly to tell (the bass),
    the note has dozens of other partials."""
    drop = np.zeros(len(db), dtype=bool)
    half = len(seg) // 2
    if half < 0.1 * df * n_fft:  # halves under 0.1 s cannot tell a decay
        return drop
    first, second = _spectrum_db(seg[:half], n_fft), _spectrum_db(seg[half : 2 * half], n_fft)
    spread = max(1, round(_BEFORE_SPREAD_HZ / df))
    for mains in (50.0, 60.0):
        for f in mains * np.arange(1, _HUM_HARMONICS + 1):
            lo, hi = int((f * 0.995) / df) - 1, int((f * 1.005) / df) + 2
            if hi >= len(db):
                break
            i = lo + int(np.argmax(db[lo:hi]))
            if abs(first[i] - second[i]) < _HUM_STEADY_DB and db[i] >= db[i - 1] and db[i] >= db[i + 1]:
                drop[max(0, i - spread) : i + spread + 1] = True
    return drop


@dataclass(frozen=True)
class _CombLayout:
    """Per (B, partial n = 1 ... N + 1) of the comb, all independent of f1 on a log grid:
    the cell offset of partial n from the first; the cells below it and (plus one) above
    it to +-1.25 local spacings; the weight of its evidence (zero past the partials used);
    whether it counts when missing; and per B the index of the last partial used."""

    off: NDArray[np.int32]
    below: NDArray[np.int32]
    above: NDArray[np.int32]
    weight: NDArray[np.float64]
    counts: NDArray[np.bool_]
    last: NDArray[np.int64]


def _comb_layout(n_max: int) -> _CombLayout:
    n = np.arange(1, n_max + 3, dtype=np.float64)
    stretch = _stretch(_B_GRID[:, None], n[None, :])                            # (B, N + 2)
    spacing = 1.25 * np.diff(np.c_[np.zeros(len(_B_GRID)), stretch], axis=1)[:, : n_max + 1]
    stretch = stretch[:, : n_max + 1]
    per_octave = 1200.0 / _CELL_CENTS
    off = np.rint(per_octave * np.log2(stretch)).astype(np.int64)
    below = np.ceil(-per_octave * np.log2(np.maximum(1.0 - spacing / stretch, 1e-3))).astype(np.int64)
    above = np.ceil(per_octave * np.log2(1.0 + spacing / stretch)).astype(np.int64)
    # Partials used: as many as the grid of B predicts within the search tolerance,
    # B n^2 <= _STRETCH_LIMIT (a step of sqrt(2) in B is +-19 %, 0.19 * 866 cents *
    # B n^2 / (1 + B n^2) <= 15 cents). The range in Hz then hardly depends on B: the
    # octave below (B / 4) uses twice the partials over the same band, the octave above
    # half, so series compare over the same band.
    with np.errstate(divide="ignore"):
        used = np.floor(np.sqrt(_STRETCH_LIMIT / _B_GRID))
    used = np.clip(np.nan_to_num(used, posinf=n_max), 2, n_max).astype(np.int64)
    index = np.arange(n_max + 1)[None, :]
    # the partial after the last used only pays when missing, so that a series cannot end
    # on a peak for free; the slight weight against high partial numbers settles ties (no
    # evidence either way) for the higher series, which the octave check revisits
    weight = np.where(index < used[:, None], 1.0 - 2e-3 * index, 0.0)
    # int32 indices: the gathers below run several times faster than with int64
    return _CombLayout(off.astype(np.int32), np.minimum(off, below).astype(np.int32),
                       (above + 1).astype(np.int32), weight, index <= used[:, None], used - 1)


_COMB = _comb_layout(_COARSE_PARTIALS)
_COMB_REACH = int((_COMB.off + _COMB.above).max()) + 1


def _comb(sp: _Spectrum, j: NDArray[np.int64]) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Best score over B of each first-partial cell ``j``, and that B's index.

    A partial found scores its prominence; one missing below the highest found, or where
    its neighbourhood (+-1.25 local spacings) holds a partial, costs _MISS_DB; one missing
    in an empty region above costs nothing; a partial within the series' range that it
    does not explain costs _UNEXPLAINED times its prominence. A series whose every other
    member is missing (the octave below) so pays for each; one that skips the odd partials
    (the octave above, or a high series picking single partials out of a dense bass
    spectrum) pays for those.
    """
    lay = _COMB
    cell = j.astype(np.int32)[:, None, None] + lay.off[None, :, :]              # (J, B, N + 1)
    active = sp.busy[cell + lay.above] > sp.busy[cell - lay.below]
    found = sp.evidence[cell]
    used = lay.weight > 0
    hit = (found > 0) & used
    # a piano tone has its low partials: one missing below the highest found counts too
    n_last = hit.shape[2] - np.argmax(hit[:, :, ::-1], axis=2)                  # (J, B)
    below_last = np.arange(hit.shape[2])[None, None, :] < (n_last - 1)[:, :, None]
    missing = ~hit & (active | below_last) & lay.counts & ~sp.hidden[cell]
    # the other way round (two-way mismatch, Maher & Beauchamp 1994, JASA 95): partials
    # within the series' range that it does not explain count against it
    top = np.take_along_axis(cell, np.broadcast_to(lay.last[None, :, None], (len(j), len(lay.last), 1)), axis=2)
    within = sp.mass_to[top[:, :, 0]] - sp.mass_from[cell[:, :, 0]]
    unexplained = np.maximum(within - np.where(used, found, 0.0).sum(axis=2), 0.0)
    score = (np.einsum("jbn,bn->jb", found, lay.weight) - _MISS_DB * missing.sum(axis=2)
             - _UNEXPLAINED * unexplained)
    score = np.where(_B_GRID[None, :] <= _b_limit(sp.cells_hz[j])[:, None], score, -np.inf)
    best = np.argmax(score, axis=1)
    return score[np.arange(len(j)), best], best


def _peaks_near(sp: _Spectrum, predicted: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """For each predicted frequency, the peak within +-_FOLLOW_CENTS (at least 2 bins),
    located by a parabola through three dB values, and its prominence; NaN and 0 where
    no peak stands _HIT_DB out."""
    freq = np.full(len(predicted), np.nan)
    prom = np.zeros(len(predicted))
    tol = 2.0 ** (_FOLLOW_CENTS / 1200.0)
    db, df = sp.db, sp.df
    for k, fp in enumerate(predicted):
        lo = max(1, int(min(fp / tol, fp - 2 * df) / df))
        hi = min(len(db) - 1, int(max(fp * tol, fp + 2 * df) / df) + 1)
        if hi <= lo:
            break
        i = lo + int(np.argmax(db[lo:hi]))
        if sp.prominence[i] < _HIT_DB or not (db[i] >= db[i - 1] and db[i] >= db[i + 1]):
            continue
        y0, y1, y2 = db[i - 1], db[i], db[i + 1]
        den = y0 - 2 * y1 + y2
        freq[k] = (i + (0.5 * (y0 - y2) / den if den < 0 else 0.0)) * df
        prom[k] = sp.prominence[i]
    return freq, prom


def _fit_series(n: NDArray[np.float64], f: NDArray[np.float64], w: NDArray[np.float64],
                b: float) -> tuple[float, float, NDArray[np.bool_]]:
    """Fit ``(f_n / n)^2 = f0^2 (1 + B n^2)`` (weighted least squares in n^2; B kept at
    ``b`` with fewer than three partials or where the fit leaves the plausible range),
    dropping the worst partial while it is more than _OUTLIER_CENTS off. Returns f0, B
    and the partials kept."""
    keep = np.ones(len(n), dtype=bool)
    while True:
        kn, y, kw = n[keep], (f[keep] / n[keep]) ** 2, w[keep]
        f0, bb = math.sqrt(float(np.sum(kw * y / (1.0 + b * kn**2)) / np.sum(kw))), b
        if len(kn) >= 3:
            design = np.stack([np.ones_like(kn), kn**2], axis=1) * kw[:, None]
            (a, c), *_ = np.linalg.lstsq(design, y * kw, rcond=None)
            if a > 0 and 0.0 <= c / a <= float(_b_limit(math.sqrt(a))):
                f0, bb = math.sqrt(a), c / a
        off = np.abs(1200.0 * np.log2(f / (f0 * n * np.sqrt(1.0 + bb * n**2))))
        off[~keep] = 0.0
        worst = int(np.argmax(off))
        if off[worst] <= _OUTLIER_CENTS or keep.sum() <= 2:
            return f0, bb, keep
        keep[worst] = False


def _follow(sp: _Spectrum, f1: float, b: float) -> tuple[float, float, NDArray[np.float64]]:
    """Refine a comb estimate on the low partials: find each near its prediction, fit the
    stiff-string series with outliers rejected (a partial merged with hum, or with an
    earlier note's), predict again from the fit, three times. Returns f1 (measured
    where the first partial is clear and on the series, else from the fit), B and the
    partial numbers found."""
    n = np.arange(1, _REFINE_PARTIALS + 1, dtype=np.float64)
    f0, bb = f1 / math.sqrt(1.0 + b), b
    kept = np.zeros(0)
    for _ in range(3):
        freq, prom = _peaks_near(sp, f0 * n * np.sqrt(1.0 + bb * n**2))
        ok = np.isfinite(freq)
        if not ok.any():
            break
        f0, bb, keep = _fit_series(n[ok], freq[ok], 10.0 ** (prom[ok] / 20.0), bb)
        kept, kept_f, kept_p = n[ok][keep], freq[ok][keep], prom[ok][keep]
    if len(kept) == 0:
        return f1, b, kept
    f1 = f0 * math.sqrt(1.0 + bb)
    if kept[0] == 1.0 and kept_p[0] >= _CLEAR_DB:
        f1 = float(kept_f[0])  # the first partial itself, where it stands clear
    return f1, bb, kept


def _hit_fraction(sp: _Spectrum, f1: float, b: float, numbers: NDArray[np.float64]) -> float:
    """Fraction of the partials ``numbers`` of the series (f1, b) that are found, of those
    that could be seen (not where an earlier sound or hum could hide them)."""
    f_n = f1 * _stretch(b, numbers)
    cell = np.rint(1200.0 / _CELL_CENTS * np.log2(f_n / sp.cells_hz[0])).astype(np.int64)
    cell = cell[cell < len(sp.cells_hz)]
    found = sp.evidence[cell] > 0
    seen = found | ~sp.hidden[cell]
    return float(found.sum()) / float(seen.sum()) if seen.sum() >= 2 else 0.0


def _pitch_and_b(samples: NDArray[np.float64], sample_rate: int,
                 before: NDArray[np.float64] | None) -> tuple[float, float]:
    seg = samples[: min(len(samples), round(_PITCH_WINDOW_S * sample_rate))]
    sp = _analyse(seg, sample_rate, before)
    if sp.busy[-1] == 0:
        raise RecordingError("no partials stand out of the noise at this onset")
    j = np.arange(np.searchsorted(sp.cells_hz, _F1_LOW_HZ), np.searchsorted(sp.cells_hz, _F1_HIGH_HZ), 2)
    score, b_index = _comb(sp, j)
    best = int(np.argmax(score))
    f1, b, found = _follow(sp, float(sp.cells_hz[j[best]]), float(_B_GRID[b_index[best]]))
    # two partials make a series; in the top octaves the second may lie beyond the
    # band of the recording chain
    if len(found) < (1 if f1 >= _LONE_PARTIAL_HZ else 2):
        raise RecordingError("no series of partials found at this onset")
    # The comb may take the octave (or twelfth) above a note with a weak fundamental: if
    # the partials of the series a divisor lower, between the ones found, are there too,
    # that is the note.
    while len(found):
        for d in (2, 3):
            sub = np.arange(2, d * int(found.max()) + 1)
            sub = sub[sub % d != 0].astype(np.float64)
            if f1 / d >= _F1_LOW_HZ and len(sub) >= 2 and _hit_fraction(sp, f1 / d, b / d**2, sub) >= 0.5:
                f1, b, found = _follow(sp, f1 / d, b / d**2)
                break
        else:
            break
    return f1, b


def estimate_pitch(samples: ArrayLike, sample_rate: int, *, before: ArrayLike | None = None) -> float:
    """Coarse frequency of the first partial of one piano note.

    Parameters
    ----------
    samples : array_like of float
        Audio starting at the note's onset (the first 0.5 s are used).
    sample_rate : int > 0
    before : array_like of float, optional
        Audio just before the onset. Partials already sounding there (earlier notes still
        ringing, mains hum and its harmonics) are not taken for this note's.

    Returns
    -------
    float
        First-partial frequency in Hz (keys 21..108, up to a semitone off pitch); within a
        few cents for a clean note.

    Raises
    ------
    RecordingError
        No series of partials stands out (a knock, noise, silence). No file is named:
        the caller knows where the segment came from.
    """
    x = np.asarray(samples, dtype=np.float64)
    if len(x) < round(0.05 * sample_rate):
        raise RecordingError(f"{len(x) / sample_rate * 1e3:.0f} ms of audio is too short to find a pitch")
    prior = None if before is None else np.asarray(before, dtype=np.float64)
    return _pitch_and_b(x, sample_rate, prior)[0]


# --- segmentation -----------------------------------------------------------------------

@dataclass(frozen=True)
class Strike:
    """One struck note of a take.

    Attributes
    ----------
    onset_s, end_s : float
        Start (the attack) and end (the next onset, or the end of the recording), seconds.
    key : int
        MIDI key, from the pitch once the take's offset is removed (or as given).
    pitch_hz : float
        Coarse first-partial frequency.
    cents_from_key : float
        Pitch relative to the key's equal-tempered frequency at ``a4_hz`` (the take's
        offset included).
    level_db : float
        Strike dynamics: the peak 20 ms RMS level over the first 100 ms, dB re full scale
        (a full-scale sine reads -3.0 dB), less what earlier notes still sounded.
    """

    onset_s: float
    end_s: float
    key: int
    pitch_hz: float
    cents_from_key: float
    level_db: float


@dataclass(frozen=True)
class Take:
    """The strikes of a recording.

    Attributes
    ----------
    path : str
    sample_rate : int
    strikes : tuple of Strike
    pitch_offset_cents : float
        The instrument as a whole against equal temperament at ``a4_hz``: the median of
        the strikes' deviations from their keys.
    skipped : tuple of (float, str)
        Onsets that were not usable: (time in s, reason).
    """

    path: str
    sample_rate: int
    strikes: tuple[Strike, ...]
    pitch_offset_cents: float
    skipped: tuple[tuple[float, str], ...] = ()


def _level_db(x: NDArray[np.float64], sample_rate: int, a: int, b: int) -> float:
    """Strike level: the peak 20 ms mean power over the first 100 ms of x[a:b], less the
    mean power of the 20 ms before the onset (what earlier notes still add, taken as
    uncorrelated with the new one; at least 1 % of the peak is kept), in dB re full
    scale."""
    w = max(1, round(_LEVEL_WINDOW_S * sample_rate))
    span = x[a : min(b, a + max(w, round(_LEVEL_SPAN_S * sample_rate)))]
    w = min(w, len(span))
    energy = np.r_[0.0, np.cumsum(span**2)]
    peak = float(np.max(energy[w:] - energy[:-w])) / w
    prior = x[max(0, a - w) : a]
    ringing = float(np.mean(prior**2)) if len(prior) else 0.0
    return 10.0 * math.log10(max(peak - ringing, 0.01 * peak, 1e-24))


def _strike_pitch(x: NDArray[np.float64], sample_rate: int, onset_s: float, end_s: float) -> float:
    """First-partial frequency of the strike at ``onset_s`` (up to ``end_s``), with what
    sounded before it as the reference."""
    a, b = round(onset_s * sample_rate), round(end_s * sample_rate)
    before = x[max(0, a - round(_PITCH_WINDOW_S * sample_rate)) : a]
    return estimate_pitch(x[a:b], sample_rate, before=before if len(before) else None)


def _circular_median(cents: NDArray[np.float64]) -> float:
    """Median of deviations known modulo 100 cents, unwrapped around their circular mean."""
    angle = np.angle(np.mean(np.exp(2j * np.pi * cents / 100.0)))
    centre = 100.0 * angle / (2 * np.pi)
    unwrapped = centre + (cents - centre + 50.0) % 100.0 - 50.0
    return float(np.median(unwrapped))


def segment(recording: Recording, *, a4_hz: float = 440.0, key: int | None = None,
            offset_guess_cents: float = 0.0) -> Take:
    """Split a recording into strikes, each with its key, pitch and level.

    Parameters
    ----------
    recording : Recording
    a4_hz : float > 0
        Reference of equal temperament (ISO 16: 440 Hz).
    key : int, optional
        The key of every strike in the file, when the technician says so (a single-note
        file, or one key at several dynamics); the pitch then only gives the cents.
    offset_guess_cents : float
        Pitch alone knows the instrument's offset only modulo a semitone: a piano 60
        cents flat sounds like one 40 cents sharp, a key lower. The offset is taken within
        +-50 cents of this guess (the technician's, e.g. from a tuning device on A4),
        unless that puts a strike outside the compass.

    Returns
    -------
    Take

    Raises
    ------
    RecordingError
        No onset, or no usable strike (each reason is given).
    """
    if not a4_hz > 0:
        raise ParameterError(f"a4_hz={a4_hz} must be > 0")
    if key is not None and not LOWEST_KEY <= key <= HIGHEST_KEY:
        raise RecordingError(f"key {key} is outside the compass {LOWEST_KEY}..{HIGHEST_KEY}",
                             file=recording.path)
    x, sr = recording.samples, recording.sample_rate
    onsets = find_onsets(x, sr)
    if len(onsets) == 0:
        raise RecordingError("no strike found", file=recording.path)
    skipped: list[tuple[float, str]] = []
    # First the pitch of every onset up to the next one; an onset without one (a knock, a
    # damper falling on a loud note) is no strike and does not end the one before.
    pitch: dict[float, float] = {}
    for on, end in zip(onsets, np.r_[onsets[1:], recording.duration_s]):
        try:
            pitch[float(on)] = _strike_pitch(x, sr, on, end)
        except RecordingError as err:
            skipped.append((float(on), err.reason))
    starts = np.array(sorted(pitch))
    usable: list[tuple[float, float, float, float]] = []
    for i, on in enumerate(starts):
        end = float(starts[i + 1]) if i + 1 < len(starts) else recording.duration_s
        if end - on < MIN_DURATION_S:
            what = "the next strike" if i + 1 < len(starts) else "the end of the recording"
            skipped.append((float(on), f"only {end - on:.2f} s before {what}; {MIN_DURATION_S:g} s is needed"))
            continue
        f1 = pitch[float(on)]
        nxt = int(np.searchsorted(onsets, on)) + 1
        if nxt < len(onsets) and end > onsets[nxt] + 1e-9:
            try:  # its window grew: measure again
                f1 = _strike_pitch(x, sr, on, end)
            except RecordingError:
                pass
        usable.append((float(on), end, f1, _level_db(x, sr, round(on * sr), round(end * sr))))
    if not usable:
        detail = "; ".join(f"{t:.2f} s: {why}" for t, why in sorted(skipped))
        raise RecordingError(f"no usable strike ({detail})", file=recording.path)
    f1s = np.array([u[2] for u in usable])
    position = A4_KEY + 12.0 * np.log2(f1s / a4_hz)  # fractional key at a4_hz
    if key is not None:
        keys = np.full(len(usable), key)
        offset = float(np.median(100.0 * (position - key)))
    else:
        offset = _circular_median(100.0 * (position - np.rint(position)))
        offset += 100.0 * round((offset_guess_cents - offset) / 100.0)
        keys = np.rint(position - offset / 100.0).astype(int)
        for shift in (100.0, -100.0):
            if keys.min() >= LOWEST_KEY and keys.max() <= HIGHEST_KEY:
                break
            moved = np.rint(position - (offset + shift) / 100.0).astype(int)
            if moved.min() >= LOWEST_KEY and moved.max() <= HIGHEST_KEY:
                offset, keys = offset + shift, moved
    strikes = []
    for (on, end, f1, level), k, p in zip(usable, keys, position):
        if LOWEST_KEY <= k <= HIGHEST_KEY:
            strikes.append(Strike(onset_s=on, end_s=end, key=int(k), pitch_hz=f1,
                                  cents_from_key=float(100.0 * (p - k)), level_db=level))
        else:
            skipped.append((on, f"pitch {f1:.1f} Hz is outside the compass ({LOWEST_KEY}..{HIGHEST_KEY})"))
    if not strikes:
        raise RecordingError(f"no strike within the compass ({'; '.join(why for _, why in skipped)})",
                             file=recording.path)
    return Take(path=recording.path, sample_rate=sr, strikes=tuple(strikes), pitch_offset_cents=offset,
                skipped=tuple(sorted(skipped)))
