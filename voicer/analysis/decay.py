"""Per-partial amplitude envelopes of a recorded note, and their decay.

Envelopes: each partial is mixed down to 0 Hz and low-passed (a Kaiser-window linear-phase
FIR, ``scipy.signal.firwin``) narrower than half the distance to its neighbours, then
sampled every ``hop_s``. Levels are in dB re a unit sine (a sine of amplitude 1 reads 0 dB).

Decay: the envelope in dB is fitted by one stage (a straight line), two stages (prompt and
aftersound, Weinreich 1977, JASA 62, 1474-1484, "Coupled piano strings") or a beating pair.
All three are the envelope of at most two components of the partial,

    P(t) = a1^2 e^(-2 s1 t) + a2^2 e^(-2 s2 t) + 2 c a1 a2 e^(-(s1 + s2) t) cos(2 pi d t + phi),
    level(t) = 10 log10 P(t)  (plus the mean effect of the track's noise, see _envelope),

where one stage is ``a2 = 0``; two stages have locked frequencies (``d = 0``, Weinreich's
regime of mistuning below the bridge coupling) and a coherence ``c`` (+1: in phase, the
brief's 20 log10(a1 e^(-s1 t) + a2 e^(-s2 t)); -1: opposed, a dip at the knee; free only
when the data ask); beats have ``c = 1``, equal rates ``s1 = s2`` and a beat rate ``d`` (his
regime beyond it). Points are weighted by the scatter the noise gives them.

A richer model is kept only when it is clearly better by the Bayesian information
criterion, with a margin of 10 ("very strong": Kass & Raftery 1995, "Bayes factors",
J. Am. Stat. Assoc. 90, 773-795; from memory) and with the number of samples replaced by
the effective number of independent ones: envelope samples are correlated by the low-pass
and by any misfit, and counting them all would make every wiggle of the noise look
significant. Uncertainties are counted the same way.
"""

from __future__ import annotations

__all__ = ["Envelopes", "DecayFit", "partial_envelopes", "fit_decay"]

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.fft
from numpy.typing import ArrayLike, NDArray
from scipy import ndimage, signal, special
from scipy.optimize import least_squares

from ..errors import ParameterError, RecordingError
from ..physics.strings import t60_s

#: 20 / ln 10: dB per neper of amplitude.
DB_PER_NEPER = 20.0 / math.log(10.0)
_DB10 = 10.0 / math.log(10.0)  # dB per unit of ln(power)
#: Levels of exact digital silence are floored here instead of -inf.
FLOOR_DB = -300.0

# --- envelopes -----------------------------------------------------------------------
#: Stop-band attenuation of the envelope low-pass, dB. A neighbour as loud as the partial
#: leaks in at -60 dB, below the 40 dB noise of a good recording (the issue's SNR).
STOPBAND_DB = 60.0
#: Pass-band edge as a fraction of the stop edge: at A0 (27.5 Hz spacing, stop edge
#: 13.75 Hz) the pass band is 5.5 Hz wide, enough for unison beats of a few Hz.
PASS_FRACTION = 0.4
#: Largest stop edge, as a fraction of the envelope's Nyquist rate ``1 / (2 hop)``.
STOP_CAP_FRACTION = 0.8
#: Tracks closer than this cannot be separated: they are one partial and its beat.
MIN_SPACING_HZ = 10.0
MAX_HOP_S = 0.02
#: Fewest envelope samples a note must give.
MIN_ENVELOPE_SAMPLES = 20

# --- decay fits ----------------------------------------------------------------------
#: The fit ends where the envelope last stands this far above the noise floor. Below it the
#: dB scatter of the noise grows (1.9 dB at 10 dB, 5.6 dB in noise alone) and is far from
#: Gaussian, a poor basis for least squares in dB.
NOISE_MARGIN_DB = 10.0
#: Running median before finding that end, so one noise spike does not extend the fit.
END_SMOOTHING_S = 0.2
#: Scatter (dB rms) of the envelope about any model here that no model describes (small
#: soundboard and room effects): it caps the weight of the loudest points.
MISFIT_FLOOR_DB = 0.3
#: The fit starts at the envelope's maximum within this time after ``start_s`` (the attack,
#: smeared by the low-pass).
ATTACK_SEARCH_S = 0.3
MIN_FIT_POINTS = 8
#: The fit is repeated on the window its model implies when that moves the end by more
#: than this fraction (and 2 samples).
REFIT_MOVE = 0.02
#: Cap on model evaluations per nonlinear fit; one that needs more is not converging to
#: anything sensible (two huge components cancelling, say) and is dropped.
MAX_EVALUATIONS = 40
#: BIC margin for a richer model (Kass & Raftery 1995: above 10 is "very strong").
BIC_MARGIN = 10.0
#: Effective samples a richer fit needs per parameter: a sinusoid fitted to a short bass
#: decay (6-13 independent samples) finds "beats" in the correlated noise (measured).
MIN_SAMPLES_PER_PARAMETER = 3.0
#: Two stages only when the aftersound decays at least this much more slowly than the prompt
#: and the knee lies inside the fit, at least KNEE_EDGE_FRACTION of it from either end.
STAGE_RATE_RATIO = 1.5
KNEE_EDGE_FRACTION = 0.05
#: The two lines that start a two-stage fit leave this fraction of the fit free either side
#: of the knee.
KNEE_GAP_FRACTION = 0.1
#: ... and the envelope at the knee stands at least this far above the noise: an aftersound
#: that close to the floor may be the floor itself (noise under-estimated, a steady tone).
KNEE_ABOVE_NOISE_DB = 20.0
#: No stage or beating component may start more than this above the envelope's peak: a fit
#: that cancels two huge components is no decay.
STAGE_ABOVE_PEAK_DB = 6.0
#: A free coherence starts at c = +-0.9; one this close to +-1 is taken as +-1. Stages in
#: opposite phase are tried where the envelope dips this far below the two lines that start
#: the fit.
TWO_STAGE_START_C = 0.9
DIP_DB = 3.0
COHERENCE_SCREEN = 0.5
COHERENCE_AT_BOUND = 1e-3
#: Beats: at least this many periods inside the fit, at most BEAT_MAX_HZ, and at least
#: MIN_BEAT_DEPTH_DB peak to peak.
MIN_BEAT_PERIODS = 1.5
BEAT_MAX_HZ = 12.0
MIN_BEAT_DEPTH_DB = 1.0
#: Quality (see DecayFit.quality).
GOOD_SPAN_DB, FAIR_SPAN_DB = 20.0, 6.0
GOOD_REL_UNCERTAINTY, FAIR_REL_UNCERTAINTY = 0.015, 0.1
#: A decay rate below this many standard errors is "not decaying" (T60 infinite).
DECAY_SIGNIFICANCE = 3.0


@dataclass(frozen=True)
class Envelopes:
    """Amplitude envelopes of the partials of one note.

    Attributes
    ----------
    t_s : ndarray, shape (T,)
        Times after the onset, every hop, from half the longest filter after the onset to as
        much before the end (0.22 s for partials 27.5 Hz apart, 0.04 s from 330 Hz spacing
        up at the default hop): only where the filter lies wholly inside the note. Levels
        at the onset come from extrapolating the decay (:func:`fit_decay`).
    level_db : ndarray, shape (N, T)
        Level of each partial, dB re a unit sine (a sine of amplitude 1 reads 0 dB).
    noise_db : ndarray, shape (N,)
        Noise floor of each track on the same scale: the mean noise power in bands of the
        same filter placed beside the partial (half way to its neighbours), from the median
        over time so that the attack and passing tones do not count.
    """

    t_s: NDArray[np.float64]
    level_db: NDArray[np.float64]
    noise_db: NDArray[np.float64]


def _spacing_hz(freqs: NDArray[np.float64], fs: float) -> NDArray[np.float64]:
    """Distance of each partial to the nearest thing its filter must reject: the other
    partials, 0 Hz (rumble) and the mirror images of every partial at fs - f."""
    others = np.abs(freqs[:, None] - freqs[None, :])
    np.fill_diagonal(others, np.inf)
    mirrors = np.abs(freqs[:, None] - (fs - freqs[None, :]))
    return np.minimum.reduce([others.min(axis=1), mirrors.min(axis=1), freqs])


def _lowpass(stop_hz: float, fs_env: float) -> NDArray[np.float64]:
    """Linear-phase low-pass (Kaiser window) with its stop band from ``stop_hz``."""
    pass_hz = PASS_FRACTION * stop_hz
    numtaps, beta = signal.kaiserord(STOPBAND_DB, (stop_hz - pass_hz) / (0.5 * fs_env))
    numtaps |= 1  # odd: symmetric about a sample, so mode="same" below has zero phase
    return signal.firwin(numtaps, 0.5 * (pass_hz + stop_hz), window=("kaiser", beta), fs=fs_env)


def _lowpasses(stop_hz: NDArray[np.float64], fs_env: float) -> list[NDArray[np.float64]]:
    """One low-pass per partial; partials with the same stop edge (all of the treble, capped)
    share one design."""
    designs: dict[float, NDArray[np.float64]] = {}
    for stop in map(float, stop_hz):
        if stop not in designs:
            designs[stop] = _lowpass(stop, fs_env)
    return [designs[float(stop)] for stop in stop_hz]


def _mix_down(seg: NDArray[np.float64], fs: float, hop_n: int, centres: NDArray[np.float64],
              pad: int) -> NDArray[np.complex128]:
    """Each track mixed to 0 Hz and sampled every ``hop_n`` samples, shape (tracks, W).

    Done without full-rate signals per track (40 partials and their probes of a 4 s note at
    48 kHz would be 23 M complex samples): mixing shifts the spectrum, so the W bins around a
    track of one zero-padded FFT of the note, transformed back at size W, are that track
    mixed down and sampled every hop, without aliasing (nothing beyond +-fs/(2 hop_n) is
    kept; the low-pass that follows stops well inside that). ``pad`` output samples of zeros
    (one filter length) keep the circular transforms from wrapping the end onto the start.
    A sine of amplitude A gives |result| = A / 2.
    """
    width = scipy.fft.next_fast_len(-(-len(seg) // hop_n) + pad)
    size = width * hop_n
    spec = scipy.fft.rfft(seg, n=size)
    centre_bin = np.rint(centres * size / fs).astype(np.int64)
    offsets = np.fft.fftfreq(width, 1.0 / width).astype(np.int64)  # FFT order
    bins = (centre_bin[:, None] + offsets[None, :]) % size
    mirrored = bins > size // 2  # negative frequencies of a real signal: conjugate bins
    picked = spec[np.where(mirrored, size - bins, bins)]
    base = scipy.fft.ifft(np.where(mirrored, picked.conj(), picked), axis=-1) / hop_n
    residual_hz = centres - centre_bin * fs / size  # the rest of the way to exactly 0 Hz
    return base * np.exp(-2j * np.pi * residual_hz[:, None] * (np.arange(width) * hop_n / fs)[None, :])


def _filter_tracks(base: NDArray[np.complex128], taps: list[NDArray[np.float64]], half: int) -> NDArray[np.complex128]:
    """Each track through its own zero-phase FIR (taps zero-padded to 2 half + 1, centred)."""
    bank = np.zeros((len(taps), 2 * half + 1))
    for row, h in enumerate(taps):
        pad = half - len(h) // 2
        bank[row, pad:pad + len(h)] = h
    return signal.fftconvolve(base, bank, mode="same", axes=-1)


def _check_inputs(x: NDArray[np.float64], fs: float, freqs: NDArray[np.float64], hop_s: float) -> None:
    if x.ndim != 1:
        raise ParameterError(f"samples must be one channel, shape (n,); got shape {x.shape} "
                             "(mix the channels down first)")
    if not (math.isfinite(fs) and fs > 0):
        raise ParameterError(f"sample_rate={fs} must be > 0")
    if not 0 < hop_s <= MAX_HOP_S:
        raise ParameterError(f"hop_s={hop_s} must lie in 0 < hop_s <= {MAX_HOP_S} s")
    if freqs.size == 0:
        raise ParameterError("freqs_hz must give at least one partial")
    if not np.all(np.isfinite(freqs) & (freqs > 0) & (freqs < fs / 2)):
        raise ParameterError(f"freqs_hz={freqs.tolist()} must lie in 0 < f < {fs / 2:g} Hz (half the sample rate)")


def partial_envelopes(
    samples: ArrayLike,
    sample_rate: float,
    freqs_hz: Sequence[float],
    *,
    onset_s: float,
    end_s: float | None = None,
    hop_s: float = 0.005,
) -> Envelopes:
    """Amplitude envelope of each partial of a note, from its onset to ``end_s``.

    Parameters
    ----------
    samples : array_like, shape (n,)
        The recording, one channel, full scale 1.
    sample_rate : float > 0
        Hz.
    freqs_hz : sequence of float in (0, sample_rate / 2)
        Measured partial frequencies, at least ``MIN_SPACING_HZ`` apart.
    onset_s : float
        Onset of the note, seconds from the start of ``samples``.
    end_s : float, optional
        End of the note (the next onset in a take); the end of the recording by default.
        Samples after it are not used.
    hop_s : float in (0, 0.02]
        Envelope sample spacing; rounded to a whole number of samples.

    Returns
    -------
    Envelopes

    Raises
    ------
    ParameterError
        Samples not one channel, frequencies outside the band or too close together.
    RecordingError
        The onset outside the recording, non-finite samples, or a note too short for the
        filters that separate these partials.
    """
    x = np.asarray(samples, dtype=float)
    fs = float(sample_rate)
    freqs = np.asarray(freqs_hz, dtype=float).ravel()
    _check_inputs(x, fs, freqs, hop_s)
    duration_s = len(x) / fs
    if not 0 <= onset_s < duration_s:
        raise RecordingError(f"the onset lies outside the recording (0 to {duration_s:.3f} s)", time_s=onset_s)
    if end_s is not None and not onset_s < end_s:
        raise RecordingError(f"the note must end after its onset at {onset_s:.3f} s", time_s=end_s)
    spacing = _spacing_hz(freqs, fs)
    if np.any(spacing < MIN_SPACING_HZ):
        k = int(np.argmin(spacing))
        raise ParameterError(f"partial at {freqs[k]:.3f} Hz is only {spacing[k]:.3f} Hz from another partial, 0 Hz or "
                             f"a mirror image; tracks must be >= {MIN_SPACING_HZ:g} Hz apart")

    hop_n = max(1, round(hop_s * fs))
    fs_env = fs / hop_n
    stop_hz = np.minimum(0.5 * spacing, STOP_CAP_FRACTION * 0.5 * fs_env)
    taps = _lowpasses(stop_hz, fs_env)
    half = max(len(h) for h in taps) // 2
    # Noise probes: the same filter beside each partial, half way to the nearest neighbour
    # (whose partials then sit on the probe's stop edge) but no farther than two stop edges.
    probe_off = np.minimum(0.5 * spacing, 2.0 * stop_hz)
    centres = np.concatenate([freqs, freqs - probe_off, freqs + probe_off])
    n_part = len(freqs)

    i0 = round(onset_s * fs)
    i1 = len(x) if end_s is None else min(len(x), round(end_s * fs))
    seg = x[i0:i1]
    if not np.all(np.isfinite(seg)):
        bad = i0 + int(np.flatnonzero(~np.isfinite(seg))[0])
        raise RecordingError("the note has samples that are not finite numbers (NaN or inf)", time_s=bad / fs)
    # Only outputs whose filter lies wholly inside the note: nearer the onset the filter
    # straddles the step of the attack and rings with the neighbours' onsets (+-0.8 dB at A0,
    # measured), nearer the end it would see the zeros beyond it.
    count = (len(seg) - 1) // hop_n - 2 * half + 1
    if count < MIN_ENVELOPE_SAMPLES:
        need_s = (MIN_ENVELOPE_SAMPLES + 2 * half) * hop_n / fs
        raise RecordingError(f"the note is too short for decay analysis: {(i1 - i0) / fs:.3f} s after the onset, "
                             f"need at least {need_s:.3f} s to separate partials {spacing.min():.1f} Hz apart",
                             time_s=onset_s)
    base = _mix_down(seg, fs, hop_n, centres, pad=2 * half + 1)
    env = _filter_tracks(base, taps * 3, half)[:, half:half + count]

    power = 4.0 * np.abs(env) ** 2  # re a unit sine
    with np.errstate(divide="ignore"):
        level = np.maximum(10.0 * np.log10(power[:n_part]), FLOOR_DB)
        # |z|^2 of complex Gaussian noise is exponential: mean = median / ln 2.
        noise_power = np.median(power[n_part:], axis=1) / math.log(2.0)
        noise = np.maximum(10.0 * np.log10(0.5 * (noise_power[:n_part] + noise_power[n_part:])), FLOOR_DB)
    t = (i0 + (half + np.arange(count)) * hop_n) / fs - onset_s
    return Envelopes(t_s=t, level_db=level, noise_db=noise)


# --- decay fits ----------------------------------------------------------------------


@dataclass(frozen=True)
class DecayFit:
    """Decay of one partial's envelope.

    Attributes
    ----------
    level_db : float
        Level of the prompt stage extrapolated to the onset (t = 0), dB (the envelope's
        scale). For a beating pair: their power sum, the level averaged over the beats.
        NaN when nothing could be fitted.
    t60_s : float
        60 dB decay time of the prompt stage (the only stage when single); ``inf`` when the
        envelope does not decay significantly (a steady tone); NaN when nothing could be
        fitted.
    t60_uncertainty_s : float
        Standard error of ``t60_s`` from the fit's Jacobian, with the residual's correlation
        (effective number of samples) and changing size (weights) taken into account;
        ``inf`` with an infinite T60.
    knee_s : float or None
        Where the aftersound takes over, ``ln(a1/a2) / (s1 - s2)``; None for one stage.
    after_level_db, after_t60_s : float or None
        Aftersound line extrapolated back to the onset, and its T60; None for one stage.
    beat_hz : float or None
        Beat rate of a mistuned unison when the envelope clearly beats, else None.
    residual_db : float
        Root-mean-square misfit over the fitted part, dB (unweighted).
    level_uncertainty_db : float
        Standard error of ``level_db`` (same covariance as the T60's). A level is far
        better determined than a decay time: a real note's envelope that beats or bends
        leaves T60 uncertain by tens of percent but its onset level within a dB or so.
    quality : {'good', 'fair', 'poor'}
        ``good``: at least 20 dB of decay seen above the noise (plus margin) and a standard
        error of T60 within 1.5 %, so that the issue's 5 % holds at 3.3 standard errors;
        ``fair``: at least 6 dB seen and within 10 % (typically a slow decay on a short note,
        an extrapolation); ``poor``: less than that (too little above the noise, not
        decaying, too few points): do not use the numbers.
    """

    level_db: float
    t60_s: float
    t60_uncertainty_s: float
    knee_s: float | None
    after_level_db: float | None
    after_t60_s: float | None
    beat_hz: float | None
    residual_db: float
    quality: str
    level_uncertainty_db: float


@dataclass(frozen=True)
class _Data:
    """The fitted part of an envelope: levels relative to its peak, the noise power on
    that scale (0: none given) and the square roots of the least-squares weights."""

    t: NDArray[np.float64]
    y: NDArray[np.float64]
    noise: float
    sw: NDArray[np.float64]


@dataclass(frozen=True)
class _Model:
    """A fitted envelope model; full parameters (g1, s1, g2, s2, c, phi, d), g = ln amplitude,
    c the coherence of the two components (cos of their phase difference when locked).
    ``jac`` and ``residual`` are weighted (each point divided by its expected scatter)."""

    name: str  # "one" | "two" | "beat"
    full: NDArray[np.float64]
    jac: NDArray[np.float64]
    residual: NDArray[np.float64]

    @property
    def rss(self) -> float:
        return float(self.residual @ self.residual)

    @property
    def n_params(self) -> int:
        return self.jac.shape[1]


# Free parameters of each model as indices into the full vector; for "beat", s2 follows s1
# and c = 1. For two locked stages with c free the fit moves v, c = clip(v, -1, 1), which
# keeps |c| <= 1; with four parameters c is held (see _two_stages).
_FREE = {"one": [0, 1], "two": [0, 1, 2, 3, 4], "beat": [0, 1, 2, 5, 6]}


def _expand(name: str, p: ArrayLike, coherence: float = 1.0) -> NDArray[np.float64]:
    """Full parameters from a model's own; two stages with four take ``coherence`` as c."""
    p = np.asarray(p, dtype=float)
    full = np.array([p[0], p[1], -np.inf, 0.0, coherence, 0.0, 0.0])
    if name == "two":
        full[2:4] = p[2:4]
        if len(p) == 5:
            full[4] = min(max(p[4], -1.0), 1.0)
    elif name == "beat":
        full[2], full[3], full[5], full[6] = p[2], p[1], p[3], p[4]
    return full


def _envelope(full: NDArray[np.float64], t: NDArray[np.float64], noise: float, jac: bool = False):
    """Expected dB envelope of the model (module docstring) and, optionally, its derivatives
    with respect to the full parameters, shape (n, 7).

    With noise of power N the dB envelope is on average not 10 log10(P + N) but
    10 log10(e) [ln P + E1(P / N)] (E1 the exponential integral: the mean of ln|s + n|^2 for
    complex Gaussian n): ten dB above the noise it adds only 2e-5 dB, where P + N would add
    0.4 dB and bias the decay; at a beat null it tends to the mean dB of the noise alone.
    """
    g1, s1, g2, s2, c, phi, d = full
    q1 = np.exp(np.clip(g1 - s1 * t, -300.0, 300.0))
    if g2 == -np.inf:
        q2 = cross = cos_theta = sin_theta = 0.0
        power = q1 * q1
    else:
        q2 = np.exp(np.clip(g2 - s2 * t, -300.0, 300.0))
        cross = 2.0 * q1 * q2
        if d == 0.0 and phi == 0.0:  # locked stages: no beat to evaluate
            cos_theta, sin_theta = 1.0, 0.0
        else:
            theta = 2.0 * np.pi * d * t + phi
            cos_theta, sin_theta = np.cos(theta), np.sin(theta)
        power = np.maximum(q1 * q1 + q2 * q2 + c * cross * cos_theta, 1e-300)
    if noise > 0:
        x = power / noise
        near = x < 40.0  # E1(40) = 1e-19: exact enough above, and exp1 is costly
        log_power = np.log(power)
        if near.any():
            log_power[near] += special.exp1(x[near])
        level = _DB10 * log_power
        k = _DB10 * -np.expm1(-x) / power  # d/dP of 10 log10(e) [ln P + E1(P/N)]
    else:
        level = _DB10 * np.log(power)
        k = _DB10 / power
    if not jac:
        return level
    out = np.zeros((len(t), 7))
    shared = k * cross * c * cos_theta
    out[:, 0] = k * 2.0 * q1 * q1 + shared
    out[:, 1] = -t * out[:, 0]
    if g2 != -np.inf:
        out[:, 2] = k * 2.0 * q2 * q2 + shared
        out[:, 3] = -t * out[:, 2]
        out[:, 4] = k * cross * cos_theta
        out[:, 5] = -k * cross * c * sin_theta
        out[:, 6] = 2.0 * np.pi * t * out[:, 5]
    return level, out


def _fit(name: str, p0: ArrayLike, data: _Data, coherence: float = 1.0) -> _Model | None:
    """Weighted Levenberg-Marquardt (MINPACK through scipy) on the dB envelope; None if it
    fails. Two stages with four start values hold c at ``coherence``."""
    p0 = np.asarray(p0, dtype=float)
    cols = _FREE[name][: len(p0)]

    def fun(p):
        return (_envelope(_expand(name, p, coherence), data.t, data.noise) - data.y) * data.sw

    def jac(p):
        jfull = _envelope(_expand(name, p, coherence), data.t, data.noise, jac=True)[1]
        j = jfull[:, cols]
        if name == "beat":
            j[:, 1] += jfull[:, 3]  # the common rate drives both components
        elif len(p) == 5 and abs(p[4]) >= 1.0:
            j[:, 4] = 0.0  # c = clip(v, -1, 1): flat beyond, so c settles at the bound
        return j * data.sw[:, None]

    try:
        sol = least_squares(fun, p0, jac=jac, method="lm", max_nfev=MAX_EVALUATIONS)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if sol.status <= 0 or not (np.all(np.isfinite(sol.x)) and np.all(np.isfinite(sol.fun))):
        return None  # not converged: from a good start these fits take 5-20 evaluations
    return _Model(name, _expand(name, sol.x, coherence), sol.jac, sol.fun)


def _fit_line(data: _Data) -> _Model:
    """One stage: a straight line in dB, by weighted linear least squares. The noise term of
    the model is left out: ten dB above the noise it changes the level by under 1e-4 dB."""
    basis = DB_PER_NEPER * np.stack([np.ones_like(data.t), -data.t], axis=1)  # level = 8.686 (g - s t)
    jac = basis * data.sw[:, None]
    coef, *_ = np.linalg.lstsq(jac, data.y * data.sw, rcond=None)
    return _Model("one", _expand("one", coef), jac, jac @ coef - data.y * data.sw)


def _weights(level: NDArray[np.float64], noise: float) -> NDArray[np.float64]:
    """Square-root weights: 1 / the expected scatter of the dB envelope at this level.

    Noise of power N on a level of power P scatters ln P by sqrt(2 N / P) (first order in
    the noise), in quadrature with MISFIT_FLOOR_DB for what no model here describes.
    """
    if noise <= 0:
        return np.ones_like(level)
    spread = 2.0 * _DB10**2 * noise / 10.0 ** (level / 10.0)
    return 1.0 / np.sqrt(spread + MISFIT_FLOOR_DB**2)


def _correlation_time(res: NDArray[np.float64]) -> float:
    """Integrated autocorrelation time of the residual, in samples: ``1 + 2 sum rho_k``
    summed up to the first lag that is not positive. The number of effectively independent
    samples is n / this (Bayley & Hammersley 1946, JRSS Suppl. 8, 184-197; from memory)."""
    r = res - res.mean()
    n = len(r)
    spec = np.fft.rfft(r, 2 * n)
    ac = np.fft.irfft(np.abs(spec) ** 2, 2 * n)[:n]
    if ac[0] <= 0:
        return 1.0
    rho = ac[1:] / ac[0]
    stop = np.flatnonzero(rho <= 0)
    m = int(stop[0]) if stop.size else len(rho)
    return float(np.clip(1.0 + 2.0 * rho[:m].sum(), 1.0, n / 4.0))


def _covariance(model: _Model, absolute: bool) -> NDArray[np.float64]:
    """Parameter covariance for correlated residuals: ``(J^T J)^-1 s^2 tau`` of the weighted
    fit, the least-squares covariance inflated by the correlation time tau, with the scatter
    ``s^2 = RSS / (n_eff - p) / tau`` counted in effectively independent samples
    ``n_eff = n / tau``. With ``absolute`` weights (1 / the expected noise variance) s^2 is
    not taken below 1: on a mixed fit a quiet start would otherwise talk down the noisy end
    (measured: an error of 4 standard errors on a short treble decay).

    A Newey-West sandwich (Newey & West 1987, Econometrica 55, 703) reads low here: a short
    bass decay has only ~10 independent samples and its fitted residuals sum to zero against
    the Jacobian, so the long-lag terms cancel what the short ones add (measured at A0: errors
    of 1.7 of its standard errors, rms, against 0.9-1.1 with this).
    """
    tau = _correlation_time(model.residual)
    n_eff = len(model.residual) / tau
    scatter = model.rss / max(n_eff - model.n_params, 1.0) / tau  # per sample, in weight units
    if absolute:  # the weights come from the noise: a smaller scatter only means a cautious floor
        scatter = max(scatter, 1.0)
    return np.linalg.pinv(model.jac.T @ model.jac) * scatter * tau


def _clearly_better(rich: NDArray[np.float64], plain: NDArray[np.float64], extra_params: int, *,
                    rich_params: int = 0, screen: bool = False) -> bool:
    """True when the richer fit's BIC is below the plainer one's by BIC_MARGIN:
    ``n_eff ln(RSS_plain / RSS_rich) > extra ln(n_eff) + margin``, with n_eff the effective
    number of samples counted with the longer of the two residuals' correlation times.

    The plainer residual's is the cautious one: a sinusoid fitted to the correlated noise of
    a short bass decay also removes the correlation, and counting by what is left made such
    "beats" look very strong (measured). A real second component wins by a wide margin
    anyway (its RSS ratio is in the hundreds). The richer fit also needs
    MIN_SAMPLES_PER_PARAMETER effective samples (by its own residual) per parameter.
    ``screen``: the test of a linear stand-in before a costly fit, at half the margin.
    """
    rss_rich, rss_plain = float(rich @ rich), float(plain @ plain)
    if rss_rich <= 0:
        return rss_plain > 0
    tau_rich = _correlation_time(rich)
    if len(rich) / tau_rich < MIN_SAMPLES_PER_PARAMETER * rich_params:
        return False
    tau = max(tau_rich, _correlation_time(plain))
    n_eff = max(len(rich) / tau, extra_params + 2.0)
    margin = 0.5 * BIC_MARGIN if screen else BIC_MARGIN
    return n_eff * math.log(rss_plain / rss_rich) > extra_params * math.log(n_eff) + margin


def _two_lines_start(data: _Data):
    """Start for two stages: an early and a late straight line (weighted least squares, all
    knees of a grid at once, from prefix sums), each kept a little away from the knee so
    that a dip there (stages in opposite phase) does not bend them. Returns
    ((g1, s1, g2, s2), weighted residual, mask of the points outside the gap), or None when
    the decay does not slow down (no aftersound)."""
    t, y, w = data.t, data.y, data.sw**2
    span = t[-1] - t[0]
    knees = np.linspace(t[0] + 0.2 * span, t[-1] - 0.2 * span, 40)
    gap = KNEE_GAP_FRACTION * span
    sums = np.concatenate([np.zeros((1, 5)), np.cumsum(np.stack([w, w * t, w * t * t, w * y, w * t * y], 1), 0)])
    total_yy = np.concatenate([[0.0], np.cumsum(w * y * y)])
    ends = np.searchsorted(t, knees - gap)  # early line on [0, end)
    starts = np.searchsorted(t, knees + gap, side="right")  # late line on [start, n)

    def lines(lo, hi):
        s0, s1_, s2_, sy, sty = (sums[hi] - sums[lo]).T
        with np.errstate(divide="ignore", invalid="ignore"):  # segments under 3 points: dropped below
            slope = (s0 * sty - s1_ * sy) / (s0 * s2_ - s1_**2)
            icpt = (sy - slope * s1_) / s0
        rss = (total_yy[hi] - total_yy[lo]) - icpt * sy - slope * sty
        return icpt, slope, rss

    n = len(t)
    a1, b1, r1 = lines(np.zeros_like(ends), ends)
    a2, b2, r2 = lines(starts, np.full_like(starts, n))
    ok = (ends >= 3) & (n - starts >= 3)
    if not np.any(ok):
        return None
    j = int(np.argmin(np.where(ok, r1 + r2, np.inf)))
    if not b2[j] > b1[j]:
        return None
    outside = np.ones(n, dtype=bool)
    outside[ends[j]:starts[j]] = False
    fit = np.where(np.arange(n) < ends[j], a1[j] + b1[j] * t, a2[j] + b2[j] * t)
    start = (a1[j] / DB_PER_NEPER, -b1[j] / DB_PER_NEPER, a2[j] / DB_PER_NEPER, -b2[j] / DB_PER_NEPER)
    return start, ((fit - y) * data.sw)[outside], outside


def _beat_start(data: _Data, line: _Model):
    """Start for a beat: the periodogram peak of the line's residual (zero-padded FFT),
    refined by fitting a line plus a sinusoid (weighted linear least squares) at frequencies
    around it; the line is refitted because over two beat periods it takes up part of the
    beat. Returns ((g, s, d, depth r = a2/a1, phase), weighted residual) or None.

    The dB envelope of 1 + r e^(i theta) is 20 log10(e) sum (-1)^(k+1) r^k cos(k theta) / k,
    so its fundamental has amplitude exactly 8.686 r dB, at the phase theta.
    """
    t, sw = data.t, data.sw
    dt = float(np.median(np.diff(t)))
    span = t[-1] - t[0]
    grid = np.arange(t[0], t[-1] + 0.5 * dt, dt)
    r = np.interp(grid, t, line.residual)  # weighted: the beats where they are clearest
    n_fft = scipy.fft.next_fast_len(8 * len(r))
    mag = np.abs(np.fft.rfft(r - r.mean(), n_fft))
    f = np.fft.rfftfreq(n_fft, dt)
    band = np.flatnonzero((f >= 0.5 / span) & (f <= min(BEAT_MAX_HZ, 0.25 / dt)))
    if band.size < 3:
        return None
    peak = f[band[np.argmax(mag[band])]]
    if peak < MIN_BEAT_PERIODS / span:  # a slow bend is misfit of the smooth model, not a beat
        return None
    trial = peak + np.linspace(-0.25, 0.25, 11) / span  # half a resolution bin either side
    theta = 2 * np.pi * trial[:, None] * t[None, :]
    basis = np.stack([np.ones_like(theta), np.broadcast_to(-t, theta.shape), np.cos(theta), np.sin(theta)], axis=-1)
    basis *= sw[None, :, None]
    target = data.y * sw
    gram = basis.transpose(0, 2, 1) @ basis
    coef = np.linalg.solve(gram, (basis.transpose(0, 2, 1) @ target)[..., None])[..., 0]
    res = (basis @ coef[..., None])[..., 0] - target[None, :]
    k = int(np.argmin(np.einsum("kn,kn->k", res, res)))
    g_db, s_db, ca, sa = coef[k]
    depth = min(math.hypot(ca, sa) / DB_PER_NEPER, 0.95)
    start = (g_db / DB_PER_NEPER, s_db / DB_PER_NEPER, float(trial[k]), depth, math.atan2(-sa, ca))
    return start, res[k]


def _two_stages(start: tuple[float, float, float, float], data: _Data) -> tuple[_Model, NDArray[np.bool_]] | None:
    """Two stages, with their coherence c held at +1 (in phase: the brief's
    20 log10(a1 e^(-s1 t) + a2 e^(-s2 t))) or at -1 (opposed: a dip at the knee, tried when
    the data dip below the two lines that start the fit), or free when the data put it
    clearly inside. A free c trades off against the prompt rate (an in-phase decay fitted
    with c free reads 4 % uncertain instead of 1 %), so it is held when the data allow.

    Returns the model and the mask of the points it was fitted on: the floor of a dip is a
    few samples whose dB level swings with every millisecond the null moves, a surface with
    a local minimum for each misplaced null, so those points are left out (the rest of the
    decay fixes the model, dip included).
    """
    g1, s1, g2, s2 = start
    below = data.y - 10.0 * np.log10(10.0 ** ((g1 - s1 * data.t) * DB_PER_NEPER / 10.0)
                                      + 10.0 ** ((g2 - s2 * data.t) * DB_PER_NEPER / 10.0))
    used = below > -DIP_DB
    data = _Data(data.t, data.y, data.noise, data.sw * used)
    held = [_fit("two", start, data, coherence=1.0)]
    if not np.all(used):
        t_dip = data.t[int(np.argmin(below))]  # start with the knee at the dip
        held.append(_fit("two", (g1, s1, g1 - (s1 - s2) * t_dip, s2), data, coherence=-1.0))
    held = [m for m in held if m is not None]
    if not held:
        return None
    best = min(held, key=lambda m: m.rss)
    sign = math.copysign(1.0, best.full[4])
    if not _coherence_pulls_inward(best, data, sign):
        return best, used
    # A held c that the data do not support biases the prompt (by -20 % at c = 0, measured).
    free = _fit("two", [*best.full[:4], sign * TWO_STAGE_START_C], data)
    if free is not None:  # kept unless within two standard errors of +-1
        sigma_c = math.sqrt(max(_covariance(free, data.noise > 0)[4, 4], 0.0))
        if 1.0 - abs(free.full[4]) > max(2.0 * sigma_c, COHERENCE_AT_BOUND):
            best = free
    return best, used


def _coherence_pulls_inward(held: _Model, data: _Data, sign: float) -> bool:
    """Screen before a free-coherence fit: whether one Gauss-Newton step from the held fit,
    c free, moves c inwards by more than COHERENCE_SCREEN. (Its error is no guide here: the
    misfit under test inflates it. Measured steps: up to 0.26 on stages in phase, 1.75 or
    more in quadrature.)"""
    jac = _envelope(held.full, data.t, data.noise, jac=True)[1][:, :5] * data.sw[:, None]
    step, *_ = np.linalg.lstsq(jac, -held.residual, rcond=None)
    return -sign * step[4] > COHERENCE_SCREEN


def _thin(data: _Data, step: int) -> _Data:
    return _Data(data.t[::step], data.y[::step], data.noise, data.sw[::step])


def _choose_model(data: _Data) -> tuple[_Model, _Data]:
    """One stage, unless two stages or beats are clearly better (module docstring).

    Returns the model and the data it was fitted on. The nonlinear fits see every ``step``-th
    sample only: envelope samples closer than half their noise correlation time carry little
    new information but cost as much (at most so many that a beat of BEAT_MAX_HZ keeps four
    samples a period).
    """
    best = line = _fit_line(data)
    span = float(data.t[-1] - data.t[0])
    hinge = _two_lines_start(data)
    wave = _beat_start(data, line)
    tau = min(_correlation_time(r) for r in [line.residual] + [h[1] for h in (hinge, wave) if h is not None])
    dt = span / (len(data.t) - 1)
    step = int(np.clip(tau // 2, 1, max(1, int(1.0 / (4.0 * BEAT_MAX_HZ * dt)))))
    sub = _thin(data, step)
    used_data = data
    # The nonlinear fits are costly: each is tried only when a linear stand-in for it (two
    # lines; a sinusoid in the residual) already passes half the BIC margin.
    if hinge is not None and _clearly_better(hinge[1], line.residual[hinge[2]], 2, screen=True):
        stages = _two_stages(hinge[0], sub)
        if stages is not None:
            two, used = stages
            plain = (_envelope(line.full, sub.t, 0.0) - sub.y) * sub.sw * used
            if _two_stages_valid(two, sub) and _clearly_better(two.residual, plain, 3, rich_params=two.n_params):
                best = two
                used_data = _Data(sub.t, sub.y, sub.noise, sub.sw * used)
    if wave is not None and _clearly_better(wave[1], line.residual, 3, screen=True):
        (g1, s1, d0, r0, phi0), _ = wave
        beat = _fit("beat", [g1, s1, g1 + math.log(r0), phi0, d0], sub)
        if beat is not None and _beat_valid(beat, sub):
            # compared on the points the best model so far was fitted on
            rival = (_envelope(beat.full, used_data.t, used_data.noise) - used_data.y) * used_data.sw
            if _clearly_better(rival, best.residual, beat.n_params - best.n_params, rich_params=beat.n_params):
                best, used_data = beat, sub
    return best, used_data


def _smooth_level(model: _Model, t: NDArray[np.float64]) -> NDArray[np.float64]:
    """The model's level without noise and, for beats, averaged over them (power sum)."""
    full = model.full.copy()
    if model.name == "beat":
        full[0], full[2] = 0.5 * np.logaddexp(2 * full[0], 2 * full[2]), -np.inf
    return _envelope(full, t, 0.0)


def _fit_window(t: NDArray[np.float64], y: NDArray[np.float64], noise_db: float | None,
                start_s: float) -> tuple[int, int]:
    """First and one-past-last index to fit: from the end of the attack to where a running
    median of the level (robust to noise spikes, unbiased on a straight decay) last stands
    NOISE_MARGIN_DB above the noise."""
    after = np.flatnonzero(t >= start_s)
    if after.size == 0:
        return 0, 0
    attack = after[t[after] <= t[after[0]] + ATTACK_SEARCH_S]
    first = int(attack[np.argmax(y[attack])])
    if noise_db is None:
        return first, len(t)
    dt = float(np.median(np.diff(t))) if len(t) > 1 else 1.0
    median = ndimage.median_filter(y[first:], size=2 * max(1, round(0.5 * END_SMOOTHING_S / dt)) + 1, mode="nearest")
    above = np.flatnonzero(median > noise_db + NOISE_MARGIN_DB)
    return first, (first + int(above[-1]) + 1) if above.size else first


def _nothing() -> DecayFit:
    return DecayFit(math.nan, math.nan, math.nan, None, None, None, None, math.nan, "poor", math.nan)


def fit_decay(
    t_s: ArrayLike,
    level_db: ArrayLike,
    *,
    noise_db: float | None = None,
    start_s: float = 0.0,
) -> DecayFit:
    """Fit one stage, two stages or beats to a partial's envelope (see the module docstring).

    Parameters
    ----------
    t_s : array_like, shape (T,)
        Increasing times after the onset (e.g. ``Envelopes.t_s``).
    level_db : array_like, shape (T,)
        The envelope in dB (a row of ``Envelopes.level_db``).
    noise_db : float, optional
        Noise floor of the track on the same scale. The fit ends where the envelope last
        stands ``NOISE_MARGIN_DB`` above it, points are weighted by their expected scatter,
        and the model includes the noise. Without it the whole envelope is fitted, unweighted.
    start_s : float
        Nothing before this time is fitted; the fit starts at the envelope's maximum within
        ``ATTACK_SEARCH_S`` after it (the end of the attack).

    Returns
    -------
    DecayFit
        With ``quality='poor'`` and NaN values when fewer than ``MIN_FIT_POINTS`` samples
        stand above the noise.
    """
    t = np.asarray(t_s, dtype=float)
    y_all = np.asarray(level_db, dtype=float)
    if t.ndim != 1 or t.shape != y_all.shape:
        raise ParameterError(f"t_s and level_db must be 1-D of the same length; got shapes {t.shape} and {y_all.shape}")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(y_all))):
        raise ParameterError("t_s and level_db must be finite")
    if np.any(np.diff(t) <= 0):
        raise ParameterError("t_s must increase")
    if noise_db is not None and not math.isfinite(noise_db):
        raise ParameterError(f"noise_db={noise_db} must be finite")

    first, last = _fit_window(t, y_all, noise_db, start_s)
    if last - first < MIN_FIT_POINTS:
        return _nothing()
    ref = float(y_all[first:last].max())  # fit relative to the peak: parameters near 0
    y_rel = y_all - ref
    noise = 0.0 if noise_db is None else 10.0 ** ((noise_db - ref) / 10.0)

    def window(end: int, level: NDArray[np.float64]) -> _Data:
        return _Data(t[first:end], y_rel[first:end], noise, _weights(level[: end - first], noise))

    unit = np.ones(last - first)
    rough = _fit_line(_Data(t[first:last], y_rel[first:last], 0.0, unit))  # for the weights only
    data = window(last, _smooth_level(rough, t[first:last]))
    best, data = _choose_model(data)
    if noise_db is not None:
        # The end found in the data sits preferentially on an upward noise excursion and
        # would pull a short decay up; refit a line once up to where it meets the margin
        # itself (two stages and beats span long windows, where this matters little).
        level = _smooth_level(best, t[first:])
        above = np.flatnonzero(level > noise_db + NOISE_MARGIN_DB - ref)
        end = first + int(above[-1]) + 1 if above.size else first
        moved = abs(end - last) > max(2, REFIT_MOVE * (last - first))
        if best.name == "one" and end - first >= MIN_FIT_POINTS and moved:
            data = window(end, level)
            best = _fit_line(data)
    return _report(best, data, ref)


def _order_stages(model: _Model) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """(g, s) of the prompt (the faster stage) and of the aftersound."""
    g1, s1, g2, s2 = model.full[:4]
    return (np.array([g1, s1]), np.array([g2, s2])) if s1 >= s2 else (np.array([g2, s2]), np.array([g1, s1]))


def _two_stages_valid(model: _Model, data: _Data) -> bool:
    (g1, s1), (g2, s2) = _order_stages(model)
    # A growing "aftersound" is no stage of a struck string: it is an envelope cut short
    # (a partial dropped by a renderer or gated by a phone, the fit's edge) or noise.
    if not (s1 > 0 and s2 >= 0 and s1 > STAGE_RATE_RATIO * s2):
        return False
    knee = (g1 - g2) / (s1 - s2)
    t = data.t
    margin = KNEE_EDGE_FRACTION * (t[-1] - t[0])
    if not t[0] + margin < knee < t[-1] - margin:
        return False
    if max(g1 - s1 * t[0], g2 - s2 * t[0]) * DB_PER_NEPER > STAGE_ABOVE_PEAK_DB:
        return False
    if data.noise > 0:  # an "aftersound" near the noise may be the floor itself
        at_knee = (g1 - s1 * knee) * DB_PER_NEPER  # either stage there (they are equal)
        return at_knee > 10.0 * math.log10(data.noise) + KNEE_ABOVE_NOISE_DB
    return True


def _beat_valid(model: _Model, data: _Data) -> bool:
    g1, s, g2, _, _, _, d = model.full
    span = float(data.t[-1] - data.t[0])
    r = math.exp(min(g1, g2) - max(g1, g2))
    depth_db = 20.0 * math.log10((1.0 + r) / (1.0 - r)) if r < 1 else math.inf
    loudest_db = (max(g1, g2) - s * data.t[0]) * DB_PER_NEPER  # re the envelope's peak
    return (MIN_BEAT_PERIODS / span <= abs(d) <= BEAT_MAX_HZ and depth_db >= MIN_BEAT_DEPTH_DB
            and loudest_db <= STAGE_ABOVE_PEAK_DB)


def _t60_and_error(rate: float, rate_var: float) -> tuple[float, float]:
    """T60 and its standard error; infinite when the rate is not significantly positive."""
    se = math.sqrt(max(rate_var, 0.0))
    if not (rate > 0 and rate > DECAY_SIGNIFICANCE * se):
        return math.inf, math.inf
    t60 = float(t60_s(rate))
    return t60, t60 * se / rate


def _report(model: _Model, data: _Data, ref: float) -> DecayFit:
    t = data.t
    span = float(t[-1] - t[0])
    fitted = data.sw > 0  # points left out (the floor of a dip) have no weight
    residual_db = float(np.sqrt(np.mean((model.residual[fitted] / data.sw[fitted]) ** 2)))
    cov = _covariance(model, absolute=data.noise > 0)
    knee = after_level = after_t60 = beat_hz = None
    if model.name == "two":
        (g1, s1), (g2, s2) = _order_stages(model)
        prompt = 0 if model.full[1] >= model.full[3] else 2
        rate_var = cov[prompt + 1, prompt + 1]
        level_var = cov[prompt, prompt]
        level = g1 * DB_PER_NEPER + ref
        knee = float((g1 - g2) / (s1 - s2))
        after_level = float(g2 * DB_PER_NEPER + ref)
        after_t60 = float(t60_s(s2)) if s2 > 0 else math.inf
        ends = _smooth_level(model, np.array([t[0], t[-1]]))
        seen_db = float(ends[0] - ends[1])
    else:
        g1, s1 = model.full[:2]
        rate_var = cov[1, 1]
        level_var = cov[0, 0]
        if model.name == "beat":
            level = 10.0 * math.log10(math.exp(2 * g1) + math.exp(2 * model.full[2])) + ref
            # power-sum level: d level / d g_i = DB_PER_NEPER w_i, w_i the power fractions
            w = np.array([1.0, math.exp(2 * (model.full[2] - g1))])
            w /= w.sum()
            level_var = float(w @ cov[np.ix_([0, 2], [0, 2])] @ w)
            beat_hz = float(abs(model.full[6]))
        else:
            level = g1 * DB_PER_NEPER + ref
        seen_db = s1 * DB_PER_NEPER * span
    t60, t60_err = _t60_and_error(float(s1), float(rate_var))
    rel = t60_err / t60 if math.isfinite(t60) else math.inf
    if seen_db >= GOOD_SPAN_DB and rel <= GOOD_REL_UNCERTAINTY:
        quality = "good"
    elif seen_db >= FAIR_SPAN_DB and rel <= FAIR_REL_UNCERTAINTY:
        quality = "fair"
    else:
        quality = "poor"
    return DecayFit(level_db=float(level), t60_s=t60, t60_uncertainty_s=t60_err, knee_s=knee,
                    after_level_db=after_level, after_t60_s=after_t60, beat_hz=beat_hz,
                    residual_db=residual_db, quality=quality,
                    level_uncertainty_db=DB_PER_NEPER * math.sqrt(max(float(level_var), 0.0)))
