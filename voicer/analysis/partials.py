"""The partial series of one piano note: its peaks, f0 and the inharmonicity B.

A struck string sounds a stretched series ``f_n = n f0 sqrt(1 + B n^2)`` (Fletcher 1964,
JASA 36, 203-209; exact for pinned ends, see :mod:`voicer.physics.strings`). Squared and
divided by ``n^2`` it is a straight line in ``n^2``: ``(f_n / n)^2 = f0^2 + f0^2 B n^2``, so
f0 and B come from a weighted linear least-squares fit to the measured peaks.

Method
------
* **One spectrum.** A window starting at the onset, ``analysis_window_s(f0)`` long (1 s in
  the bass, shorter up the compass, 0.25 s in the top octaves where partials die within a
  second), zero-padded 4x, one real FFT.
* **The window is a truncated Gaussian** (+-4 sigma, edge pedestal removed) rather than
  Hann: the log-magnitude of a Gaussian's transform is an exact parabola, and a Gaussian
  times a decaying exponential is again a Gaussian of the same width, so quadratic
  interpolation of the log power is exact for a decaying partial too (J. O. Smith,
  *Spectral Audio Signal Processing*, "quadratic interpolation of spectral peaks"). The
  bias truncation leaves is below 1e-4 of a zero-padded bin (measured, decaying partials
  included; Hann at the same padding: 8e-4, without padding 3e-3): too small to correct,
  it is added to each peak's uncertainty as a floor. The sidelobes are below -90 dB from
  6 resolution cells (1/T) on, so a strong partial does not leak onto its weak neighbours;
  the price is a main lobe 1.5x wider than Hann's (-6 dB width 3.0/T), which the chosen
  lengths afford (partials are at least 27 cells apart). A decaying envelope does not shift
  a peak: the magnitude spectrum of any real window times a complex exponential is
  symmetric about its frequency.
* **Noise floor**: a low quantile (20 %) of the power over blocks of two partial spacings,
  scaled to the mean of exponentially distributed noise power; never below the window's
  leakage (-90 dB under the strongest peak), which is the floor of a digitally clean signal.
* **Peak uncertainty** from the noise: with the curvature ``c`` of ``ln P`` at the peak,
  first-order perturbation of ``dP/domega = 0`` gives ``var(omega) = 2 sum(w^2 (k -
  k0)^2) / (sum(w^2) c^2 SNR)`` (rad/sample), where ``k0`` is the time centroid of the
  partial's windowed envelope (from a second FFT of ``k w x``): a fast-decaying partial is
  measured by the early, weakly weighted part of the window, and its uncertainty grows.
  Over noise seeds a peak's error over its uncertainty spreads by 1.0-1.3 (the more at
  SNRs near 10 dB, where first-order theory begins to fail); that of the fitted f0 and B,
  with the Birge ratio below, by 0.8-1.0.
* **Start**: a comb over (first partial within +-60 cents of the guess, B over a generous
  range for the register) scoring the capped SNR of the peaks under its first 8 teeth; a
  missing first partial costs one tooth, not the start. The best comb and a distinct
  runner-up (if it scores at least half as much) are both followed, and the series whose
  partials carry more capped SNR is kept.
* **Search that follows the stretched series**: predict ``f_n`` from the current fit,
  take the strongest peak within a window of a fraction of the local spacing (narrowed to
  the prediction's uncertainty where that is small), refit after every new partial,
  extend to higher n; stop at 0.45 fs, at ``max_partials`` or after 6 partials in a row
  that cannot be found. Then re-centre: search all n again around the fitted series and
  refit until the assignment no longer changes.
* **Robust fit**: a least-median-of-squares start over all pairs of peaks (in cents),
  then weighted least squares (weights 1/sigma^2 from each peak's SNR combined with the
  series' own scatter about the formula, estimated from the residuals: a real bass string
  departs from it by a cent or two, far more than its strongest partials' measurement
  uncertainty, which would otherwise be the ones rejected) with peaks whose
  normalised residual exceeds 4 robust standard deviations (1.4826 MAD, at least 1)
  rejected and the rest refitted. Covariances are scaled by the Birge ratio
  ``max(1, chi^2 / dof)`` so that a series that departs from the formula (a real piano's
  bass) reports it in its uncertainty.

Steady tones (mains hum and its harmonics, whines of the recording chain) passed in
``exclude_hz`` are never taken for partials: no peak within ``exclusion_tolerance_hz`` of
one is a candidate, and a partial that loses its peak to one is flagged unresolved. A
steady tone that is *not* excluded is taken for a partial only where it is the strongest
peak near the prediction; it then sits off the series and is rejected. That holds while the
note's own partials lead the first few partials (measured on a G1 with hum lines falling
as 1/sqrt(h): up to 5 dB above its first partial; tested at 0 dB); a steady harmonic series
much stronger than the note near its first partial can capture the search, so pass it in
``exclude_hz``.

Unisons mistuned by less than about 3/T Hz merge into one peak at their level-weighted
mean frequency (the beats show in the envelope); wider splits give two peaks, of which the
stronger is taken.
"""

from __future__ import annotations

__all__ = [
    "PartialPeak",
    "SeriesFit",
    "find_series",
    "analysis_window_s",
    "exclusion_tolerance_hz",
    "MIN_SNR_DB",
]

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.fft
from numpy.typing import ArrayLike, NDArray
from scipy.ndimage import maximum_filter1d

from ..errors import ParameterError, RecordingError
from ..physics.strings import NYQUIST_FRACTION
from ..physics.tuning import cents

#: Peaks this far above the local noise floor (power ratio, dB) may be taken for partials.
MIN_SNR_DB = 10.0

_HALF_WIDTH_SIGMAS = 4.0  # the Gaussian window spans +-4 sigma; its edges are at exp(-8)
_ZERO_PAD = 4  # FFT length / window length: bins of 1/(4T), interpolation bias < 1e-4 bin
_BIAS_BINS = 1e-4  # measured bound of the interpolation bias (module docstring), in bins
_LEAKAGE = 1e-9  # -90 dB: the sidelobe level of the window, a floor under the noise floor
_FLOOR_QUANTILE = 0.2  # of exponentially distributed noise power: q = -ln(1 - 0.2) * mean
_GUESS_CENTS = 60.0  # the first partial is searched within this many cents of the guess
_COMB_PARTIALS = 8
_COMB_MAX_B_STEPS = 600
_WIDE = 0.25  # search half-width as a fraction of the local partial spacing
_START_WIDE = 0.3  # ... while the series is located by the comb alone
_NARROW_SIGMAS = 5.0
_STOP_MISSES = 6
_REJECT_SIGMAS = 4.0
_MIN_FOR_REJECTION = 4  # fewer peaks than this give no robust scale; all are kept
_MAX_PASSES = 6


@dataclass(frozen=True)
class PartialPeak:
    """One measured partial.

    Attributes
    ----------
    n : int >= 1
        Partial number.
    freq_hz : float
        Interpolated peak frequency.
    level_db : float
        Peak level in dB re the full-scale level of a unit sine (window gain corrected),
        averaged over the analysis window.
    snr_db : float
        Peak power above the local noise floor, in dB.
    freq_uncertainty_hz : float
        One standard deviation of ``freq_hz`` from the noise (first-order theory, module
        docstring; floored at the interpolation bias).
    """

    n: int
    freq_hz: float
    level_db: float
    snr_db: float
    freq_uncertainty_hz: float = math.nan


@dataclass(frozen=True)
class SeriesFit:
    """The fitted stretched series ``f_n = n f0 sqrt(1 + B n^2)`` of one note.

    Attributes
    ----------
    f0_hz : float
        The formula's f0 (the flexible-string fundamental), not the first partial.
    b : float
        Inharmonicity coefficient B (the measured value: it may come out slightly negative
        for a nearly harmonic series; clip it where a physical value is needed).
    b_uncertainty : float
        One standard deviation of B from the weighted regression's covariance (scaled up
        by the Birge ratio when the peaks scatter more than their noise explains).
    f0_uncertainty_hz : float
        One standard deviation of f0, likewise.
    peaks : tuple of PartialPeak
        The peaks used in the fit, n ascending.
    rejected : tuple of int
        Partials found but rejected as outliers of the robust fit.
    unresolved : tuple of int
        Partials within the searched band that the recording does not resolve: no peak of
        their own above the noise floor near the prediction, or within the exclusion
        tolerance of a steady tone. Flagged, not invented.
    first_partial_uncertainty_hz : float
        One standard deviation of :attr:`first_partial_hz` (from the full covariance of f0
        and B, which are strongly correlated).
    """

    f0_hz: float
    b: float
    b_uncertainty: float
    f0_uncertainty_hz: float
    peaks: tuple[PartialPeak, ...]
    rejected: tuple[int, ...]
    unresolved: tuple[int, ...]
    first_partial_uncertainty_hz: float = math.nan

    @property
    def first_partial_hz(self) -> float:
        """The sounding first partial ``f0 sqrt(1 + B)``: the "f0" voicer reports."""
        return self.f0_hz * math.sqrt(1.0 + self.b)


def analysis_window_s(f0_hz: float) -> float:
    """Length of the analysis window for a note whose first partial is near ``f0_hz``.

    ``0.5 s * sqrt(440 Hz / f0)``, clipped to 0.25 .. 1 s. In the bass the window holds at
    least 27 resolution cells (1/T) per partial spacing, so neighbours and unison splits of
    a few Hz are separate peaks, while staying within the ~1 s that high bass partials last.
    Up the compass it shrinks with the decay (T60 of 10-20 s at C4, 3-5 s at C6, under 1 s
    at the top: physics.md section 4) so that a fast-decaying note is not buried in the
    noise of a long window.
    """
    return float(np.clip(0.5 * math.sqrt(440.0 / f0_hz), 0.25, 1.0))


def exclusion_tolerance_hz(window_s: float) -> float:
    """Half-width around a steady tone within which no partial is measured.

    Four standard deviations of the Gaussian window's main lobe, ``4 * 4 / (pi T)`` Hz: a
    steady tone's lobe has fallen by 70 dB there.
    """
    return 4.0 * _lobe_sigma_hz(window_s)


def _lobe_sigma_hz(window_s: float) -> float:
    # A Gaussian of time sigma T / 8 has a spectral (amplitude) sigma of 1 / (2 pi T / 8).
    return _HALF_WIDTH_SIGMAS / (math.pi * window_s)


@dataclass(frozen=True)
class _Spectrum:
    power: NDArray[np.float64]  # |X|^2 up to the top bin (+ guard bins)
    floor: NDArray[np.float64]  # mean noise power per bin
    bin_hz: float
    top_bin: int  # first bin above NYQUIST_FRACTION * fs
    window_s: float
    level_offset_db: float  # 10 log10 P + this = dB re a unit sine
    centroid: NDArray[np.float64]  # time centroid of each bin's signal, samples from the window centre
    spread2: float  # sum(w^2 k^2) / sum(w^2), samples^2
    lobe_curvature: float  # d^2 ln P / d omega^2 of a clean peak, (rad/sample)^-2
    sample_rate: float


@dataclass(frozen=True)
class _Peaks:
    freq: NDArray[np.float64]  # ascending
    sigma_hz: NDArray[np.float64]
    level_db: NDArray[np.float64]
    snr_db: NDArray[np.float64]


def _spectrum(x: NDArray[np.float64], sample_rate: float, f0_guess_hz: float) -> _Spectrum:
    length = x.size
    k = np.arange(length) - (length - 1) / 2.0
    w = np.exp(-0.5 * (k / (length / (2.0 * _HALF_WIDTH_SIGMAS))) ** 2)
    w = (w - w[0]) / (1.0 - w[0])  # zero at the edges: sidelobes fall faster
    n_fft = scipy.fft.next_fast_len(_ZERO_PAD * length, real=True)
    top = int(NYQUIST_FRACTION * n_fft) + 1
    spec = scipy.fft.rfft(x * w, n_fft)[: top + 2]
    power = spec.real**2 + spec.imag**2
    # sum(k w x e^-iwk) / sum(w x e^-iwk) is the time centroid of a partial's windowed
    # envelope at its peak: it moves towards the onset as the partial decays faster.
    timed = scipy.fft.rfft(x * w * k, n_fft)[: top + 2]
    centroid = (timed * np.conj(spec)).real / np.maximum(power, 1e-300)
    sum_w, sum_w2 = float(w.sum()), float((w * w).sum())
    block = max(int(2.0 * f0_guess_hz * n_fft / sample_rate), 64)
    return _Spectrum(
        power=power,
        floor=_noise_floor(power, block),
        bin_hz=sample_rate / n_fft,
        top_bin=top,
        window_s=length / sample_rate,
        level_offset_db=20.0 * math.log10(2.0 / sum_w),
        centroid=centroid,
        spread2=float((w * w * k * k).sum()) / sum_w2,
        lobe_curvature=-2.0 * float((w * k * k).sum()) / sum_w,
        sample_rate=sample_rate,
    )


def _noise_floor(power: NDArray[np.float64], block: int) -> NDArray[np.float64]:
    """Mean noise power per bin: a low quantile over blocks (partials and their skirts
    fill less than 80 % of a block of two spacings), interpolated in log between blocks."""
    n_blocks = max(power.size // block, 1)
    blocks = power[: n_blocks * block].reshape(n_blocks, block)
    q = np.quantile(blocks, _FLOOR_QUANTILE, axis=1) / -math.log(1.0 - _FLOOR_QUANTILE)
    # The window's sidelobes (-90 dB from 6 cells on) bound the range of one spectrum: in a
    # digitally clean signal, leakage of the strongest partial is the floor.
    q = np.maximum(q, _LEAKAGE * float(power.max()) + 1e-300)
    centres = (np.arange(n_blocks) + 0.5) * block
    return np.exp(np.interp(np.arange(power.size), centres, np.log(q)))


def _find_peaks(spec: _Spectrum, exclude_hz: NDArray[np.float64], tol_hz: float) -> _Peaks:
    p = spec.power
    k = np.flatnonzero((p[1:-1] > p[:-2]) & (p[1:-1] >= p[2:])) + 1
    # Interpolation raises a bin's power by < 0.2 dB at 4x padding: 3 dB of margin.
    k = k[(k < spec.top_bin) & (p[k] > 10.0 ** (MIN_SNR_DB / 10.0) * spec.floor[k] / 2.0)]
    lm, l0, lp = (np.log(p[k + d] + 1e-300) for d in (-1, 0, 1))
    curv = lm - 2.0 * l0 + lp
    ok = curv < 0.0
    k, lm, l0, lp, curv = k[ok], lm[ok], l0[ok], lp[ok], curv[ok]
    delta = 0.5 * (lm - lp) / curv
    log_peak = l0 - 0.25 * (lm - lp) * delta
    snr = np.exp(log_peak) / spec.floor[k]
    keep = snr >= 10.0 ** (MIN_SNR_DB / 10.0)
    freq = (k + delta) * spec.bin_hz
    if exclude_hz.size:
        keep &= np.min(np.abs(freq[:, None] - exclude_hz[None, :]), axis=1) > tol_hz
    freq, snr, log_peak = freq[keep], snr[keep], log_peak[keep]
    # Curvature in (rad/sample)^-2, never sharper than a clean window lobe.
    rad_per_bin = 2.0 * math.pi * spec.bin_hz / spec.sample_rate
    c = np.minimum(np.abs(curv[keep]) / rad_per_bin**2, abs(spec.lobe_curvature))
    # The noise term of dP/domega is sum(w (k - k0) noise): referred to the envelope's
    # centroid k0 (where the signal term vanishes) its variance grows by k0^2 sum(w^2).
    k0 = spec.centroid[k[keep]]
    sigma_rad = np.sqrt(2.0 * (spec.spread2 + k0 * k0)) / (c * np.sqrt(snr))
    sigma_hz = np.hypot(sigma_rad * spec.sample_rate / (2.0 * math.pi), _BIAS_BINS * spec.bin_hz)
    return _Peaks(
        freq=freq,
        sigma_hz=sigma_hz,
        level_db=log_peak * (10.0 / math.log(10.0)) + spec.level_offset_db,
        snr_db=10.0 * np.log10(snr),
    )


@dataclass(frozen=True)
class _Fit:
    """``(f_n / n)^2 = p0 + p1 n^2`` with ``p0 = f0^2`` and ``p1 = f0^2 B``; ``cov`` is None
    for the comb's start, whose predictions have no covariance."""

    p0: float
    p1: float
    cov: NDArray[np.float64] | None = None

    def freq(self, n: ArrayLike) -> NDArray[np.float64]:
        n = np.asarray(n, dtype=float)
        return n * np.sqrt(np.maximum(self.p0 + self.p1 * n * n, 0.0))

    def sigma(self, n: int) -> float:
        if self.cov is None:
            return math.inf
        x = float(n * n)
        var_y = self.cov[0, 0] + 2.0 * x * self.cov[0, 1] + x * x * self.cov[1, 1]
        return n * math.sqrt(max(var_y, 0.0)) / (2.0 * math.sqrt(max(self.p0 + self.p1 * x, 1e-300)))


def _wls(x: NDArray[np.float64], y: NDArray[np.float64],
         w: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Weighted least squares of ``y = p0 + p1 x``; returns (p, covariance of p) for weights
    ``w = 1 / sigma_y^2`` (normal equations about the weighted mean of x, well conditioned)."""
    sw = float(w.sum())
    xm = float(w @ x) / sw
    ym = float(w @ y) / sw
    dx = x - xm
    sxx = float(w @ (dx * dx))
    p1 = float(w @ (dx * (y - ym))) / sxx
    p0 = ym - p1 * xm
    var_p1 = 1.0 / sxx
    cov = np.array([[1.0 / sw + xm * xm * var_p1, -xm * var_p1], [-xm * var_p1, var_p1]])
    return np.array([p0, p1]), cov


def _lmeds_start(n: NDArray[np.float64], f: NDArray[np.float64]) -> NDArray[np.bool_]:
    """Inliers of the least-median-of-squares line through two of the peaks (in cents)."""
    x, y = n * n, (f / n) ** 2
    i, j = np.triu_indices(n.size, 1)
    p1 = (y[j] - y[i]) / (x[j] - x[i])
    p0 = y[i] - p1 * x[i]
    model = n[None, :] * np.sqrt(np.maximum(p0[:, None] + p1[:, None] * x[None, :], 1e-300))
    r = np.abs(cents(f[None, :], model))
    med = np.median(r, axis=1)
    best = int(np.argmin(med))
    scale = max(1.4826 * med[best], 1e-4)  # cents; an exact series has no scatter at all
    return r[best] <= _REJECT_SIGMAS * scale


def _robust_fit(
    n: NDArray[np.float64], f: NDArray[np.float64], sigma_hz: NDArray[np.float64], start: NDArray[np.bool_] | None
) -> tuple[_Fit, NDArray[np.bool_]]:
    """Weighted fit with outliers rejected; returns the fit and the inlier mask.

    Each peak's uncertainty is its measurement's combined with the scatter of the series
    about the formula (``scatter`` cents, the same for every peak): a real string departs
    from ``f_n = n f0 sqrt(1 + B n^2)`` by a cent or two (coupling to the bridge, unisons),
    far more than its strong partials' measurement uncertainty, and without this term the
    strongest partials would be the ones rejected. The scatter is estimated from the inliers'
    residuals of all peaks (1.4826 MAD in cents, less what the measurements explain), so an exact series
    keeps its full weighting. Peaks whose residual exceeds ``_REJECT_SIGMAS`` robust
    standard deviations of the normalised residuals (1.4826 MAD, never below 1) are rejected
    and the rest refitted until the set and the scatter are stable; ``start`` is the first
    inlier set (a least-median start over all pairs if None). The covariance is scaled by
    the Birge ratio ``max(1, chi^2/dof)``.
    """
    x, y = n * n, (f / n) ** 2
    per_cent = math.log(2.0) / 1200.0  # relative frequency of one cent
    meas_cents = sigma_hz / (f * per_cent)
    rejecting = n.size >= _MIN_FOR_REJECTION
    if not rejecting:
        inl = np.ones(n.size, dtype=bool)
    elif start is None:
        inl = _lmeds_start(n, f)
    else:
        inl = start.copy()
    if inl.sum() < 2:
        inl = np.ones(n.size, dtype=bool)
    scatter = 0.0
    for _ in range(20):
        sigma = np.hypot(sigma_hz, f * scatter * per_cent)
        p, cov = _wls(x[inl], y[inl], 1.0 / (2.0 * f[inl] * sigma[inl] / (n[inl] * n[inl])) ** 2)
        resid = f - n * np.sqrt(np.maximum(p[0] + p[1] * x, 1e-300))
        z = resid / sigma
        if not rejecting:
            break
        # Over all peaks, not only the inliers: the MAD shrugs off outliers by itself, while
        # one taken after rejection is cut short and talks the scatter down.
        spread = 1.4826 * float(np.median(np.abs(resid / (f * per_cent))))
        new_scatter = math.sqrt(max(spread**2 - float(np.median(meas_cents**2)), 0.0))
        new_sigma = np.hypot(sigma_hz, f * new_scatter * per_cent)
        z_new = resid / new_sigma
        scale = max(1.0, 1.4826 * float(np.median(np.abs(z_new[inl]))))
        new = np.abs(z_new) <= _REJECT_SIGMAS * scale
        settled = abs(new_scatter - scatter) <= 0.05 * max(scatter, 1e-3)
        if new.sum() < 2 or (np.array_equal(new, inl) and settled):
            break
        inl, scatter = new, new_scatter
    dof = int(inl.sum()) - 2
    if dof > 0:
        cov = cov * max(1.0, float(np.sum(z[inl] ** 2)) / dof)
    return _Fit(float(p[0]), float(p[1]), cov), inl


def _b_range(f1_guess_hz: float, b_guess: float | None) -> tuple[float, float]:
    if b_guess is not None:
        return b_guess / 4.0, b_guess * 4.0
    # Generous bounds on B for a first partial near f (physics.md "Typical B": 5e-5 to 2e-4
    # in the tenor, up to 1e-3 mid range, >= 1e-2 in the top octave; higher in uprights).
    return 0.0, float(np.clip(5e-3 * f1_guess_hz / 250.0, 5e-3, 0.08))


def _comb_starts(spec: _Spectrum, peaks: _Peaks, f1_guess_hz: float, b_lo: float,
                 b_hi: float) -> tuple[list[_Fit], float]:
    """The (f0, B) whose first 8 partials land on the most peak level above the floor.

    Each tooth scores the SNR (dB above 6, capped at 30: a clear partial counts once,
    however loud) of the strongest candidate peak within ``tol`` of it; peaks near excluded
    tones are not candidates. Returns the best comb and, if one scores at least half as
    much, the best comb that differs from it by more than ``2 tol`` at some tooth (a steady
    harmonic series near the note, such as hum that was not excluded, is the usual
    rival); and ``tol`` in Hz: every predicted partial n <= 8 of a comb that scored lies
    within ``tol`` of its peak.
    """
    top = spec.top_bin
    tol = max(1.5 * _lobe_sigma_hz(spec.window_s), 0.005 * f1_guess_hz)
    at_peaks = np.zeros(top)
    np.maximum.at(at_peaks, np.minimum(np.rint(peaks.freq / spec.bin_hz).astype(np.int64), top - 1),
                  np.clip(peaks.snr_db - 6.0, 0.0, 30.0))
    score = maximum_filter1d(at_peaks, 2 * int(tol / spec.bin_hz) + 1)
    k = _COMB_PARTIALS
    span = 2.0 ** (_GUESS_CENTS / 1200.0) - 2.0 ** (-_GUESS_CENTS / 1200.0)
    # Grid steps move tooth k by at most 2 tol, so some grid point has every tooth within
    # tol of its partial (d f_k / d f1 = k; d f_k / d B <= k^3 f0 / 2).
    n_f1 = int(span * f1_guess_hz * k / (2.0 * tol)) + 2
    f1 = f1_guess_hz * 2.0 ** (np.linspace(-_GUESS_CENTS, _GUESS_CENTS, n_f1) / 1200.0)
    n_b = min(int((b_hi - b_lo) * k**3 * f1_guess_hz / (4.0 * tol)) + 2, _COMB_MAX_B_STEPS)
    b = np.linspace(b_lo, b_hi, n_b)
    n = np.arange(1, k + 1, dtype=float)
    fn = (f1[:, None] / np.sqrt(1.0 + b[None, :]))[:, :, None] * n * np.sqrt(1.0 + b[None, :, None] * n * n)
    bins = np.rint(fn / spec.bin_hz).astype(np.int64)
    total = np.where(bins < top, score[np.minimum(bins, top - 1)], 0.0).sum(axis=2)
    starts = []
    for _ in range(2):
        if not starts:
            best_total = float(total.max())
        elif float(total.max()) < 0.5 * best_total:
            break
        # The teeth cover +-tol, so the best score is a plateau: take its most central point.
        top_points = np.argwhere(total >= total.max() - 1e-9)
        i, j = top_points[np.argmin(np.sum((top_points - top_points.mean(axis=0)) ** 2, axis=1))]
        f0 = f1[i] / math.sqrt(1.0 + b[j])
        starts.append(_Fit(f0 * f0, f0 * f0 * b[j]))
        apart = np.maximum(np.abs(fn[:, :, 0] - fn[i, j, 0]), np.abs(fn[:, :, -1] - fn[i, j, -1])) > 2.0 * tol
        total = np.where(apart, total, -1.0)
    return starts, tol


def _pick(peaks: _Peaks, f_pred: float, narrow: float, wide: float) -> int | None:
    """The strongest peak within ``narrow`` of the prediction, else within ``wide``."""
    i0, i1 = np.searchsorted(peaks.freq, [f_pred - wide, f_pred + wide])
    if i1 <= i0:
        return None
    idx = np.arange(i0, i1)
    near = idx[np.abs(peaks.freq[idx] - f_pred) <= narrow]
    pool = near if near.size else idx
    return int(pool[np.argmax(peaks.snr_db[pool])])


@dataclass
class _Sweep:
    assigned: dict[int, int]  # n -> index into the peaks
    unresolved: list[int]
    fit: _Fit
    inliers: NDArray[np.bool_] | None


def _fit_assigned(peaks: _Peaks, assigned: dict[int, int],
                  start: NDArray[np.bool_] | None) -> tuple[_Fit, NDArray[np.bool_]]:
    n = np.fromiter(assigned.keys(), dtype=float)
    idx = np.fromiter(assigned.values(), dtype=np.int64)
    return _robust_fit(n, peaks.freq[idx], peaks.sigma_hz[idx], start)


def _sweep(peaks: _Peaks, spec: _Spectrum, start: _Fit, start_tol_hz: float, *, max_partials: int,
           exclude_hz: NDArray[np.float64], tol_ex: float, extend: bool) -> _Sweep:
    """One pass over n = 1, 2, ... predicting each partial from the current fit.

    With ``extend`` the fit is redone after every partial found once there are two (the
    series follows its own stretch upwards; before that the comb's start predicts);
    otherwise ``start`` is kept (re-centring).
    """
    fit, inliers = start, None
    lobe = _lobe_sigma_hz(spec.window_s)
    f_limit = NYQUIST_FRACTION * spec.sample_rate
    assigned: dict[int, int] = {}
    unresolved: list[int] = []
    misses = 0
    for n in range(1, max_partials + 1):
        f_lo, f_pred, f_hi = (float(v) for v in fit.freq([n - 1, n, n + 1]))
        if f_pred > f_limit:
            break
        spacing = min(f_pred - f_lo, f_hi - f_pred)
        if not spacing > 0.0:
            break  # a fit this far off no longer predicts an ascending series
        if fit.cov is None:
            wide = narrow = min(_START_WIDE * spacing, start_tol_hz + 2.0 * lobe)
        else:
            wide = _WIDE * spacing
            narrow = min(wide, _NARROW_SIGMAS * fit.sigma(n) + 2.0 * lobe)
        found = _pick(peaks, f_pred, narrow, wide)
        if found is None:
            unresolved.append(n)
            # A partial merged with a steady tone lost its peak with the tone's; it does
            # not count towards the end of the series.
            if not (exclude_hz.size and float(np.min(np.abs(exclude_hz - f_pred))) <= tol_ex + narrow):
                misses += 1
                if misses >= _STOP_MISSES:
                    break
            continue
        misses = 0
        assigned[n] = found
        if extend and len(assigned) >= 2:
            # A least-median start once outliers can be told apart, then incremental.
            start_inliers = None if inliers is None or len(assigned) <= _MIN_FOR_REJECTION else np.append(inliers, True)
            fit, inliers = _fit_assigned(peaks, assigned, start_inliers)
    return _Sweep(assigned, unresolved, fit, inliers)


def _follow(peaks: _Peaks, spec: _Spectrum, start: _Fit, start_tol_hz: float, **opts) -> _Sweep | None:
    """Extend the series from a comb start, then re-centre until the assignment is stable;
    None if fewer than two partials are found."""
    sweep = _sweep(peaks, spec, start, start_tol_hz, extend=True, **opts)
    for _ in range(_MAX_PASSES):
        if len(sweep.assigned) < 2:
            return None
        fit, inliers = _fit_assigned(peaks, sweep.assigned, None)
        again = _sweep(peaks, spec, fit, start_tol_hz, extend=False, **opts)
        if again.assigned == sweep.assigned:
            return _Sweep(sweep.assigned, again.unresolved, fit, inliers) if fit.p0 > 0 else None
        sweep = again
    if len(sweep.assigned) < 2:
        return None
    sweep.fit, sweep.inliers = _fit_assigned(peaks, sweep.assigned, None)
    return sweep if sweep.fit.p0 > 0 else None


def _support(peaks: _Peaks, sweep: _Sweep) -> float:
    """Score of a followed series: capped SNR summed over the partials it uses (as the comb)."""
    assert sweep.inliers is not None
    idx = np.fromiter(sweep.assigned.values(), dtype=np.int64)[sweep.inliers]
    return float(np.sum(np.clip(peaks.snr_db[idx] - 6.0, 0.0, 30.0)))


def find_series(
    samples: ArrayLike,
    sample_rate: float,
    *,
    f0_guess_hz: float,
    onset_s: float = 0.0,
    end_s: float | None = None,
    max_partials: int = 60,
    exclude_hz: Sequence[float] = (),
    b_guess: float | None = None,
    file: str | None = None,
) -> SeriesFit:
    """Find the partial series of one note and fit f0 and B.

    Parameters
    ----------
    samples : array_like, 1-D
        One channel of the recording.
    sample_rate : float > 0
        Hz.
    f0_guess_hz : float, 20 .. 0.225 sample_rate
        A guess of the first partial (e.g. the key's equal-tempered frequency); it may be off
        by up to +-60 cents (a piano off pitch by a quarter tone, plus the stretch).
    onset_s : float >= 0
        Start of the note in the recording; the analysis window starts here.
    end_s : float, optional
        End of the note (e.g. the next onset); the window never reaches past it.
    max_partials : int >= 2
        Highest partial number searched.
    exclude_hz : sequence of float
        Steady tones (hum and its harmonics, whines) that are never taken for partials.
    b_guess : float > 0, optional
        Expected B (e.g. from the scale model); B is then searched within a factor of 4 of
        it, otherwise over a generous range for the register.
    file : str, optional
        Name of the recording, for error messages.

    Returns
    -------
    SeriesFit

    Raises
    ------
    RecordingError
        The segment is too short, silent, has non-finite samples, the sample rate leaves
        fewer than two partials below 0.45 fs, or fewer than two partials are found.
    ParameterError
        An argument is outside its range.
    """
    fs = float(sample_rate)
    if not (math.isfinite(fs) and fs > 0):
        raise ParameterError(f"sample_rate={sample_rate} must be a finite number > 0")
    if not (math.isfinite(f0_guess_hz) and f0_guess_hz >= 20.0):
        raise ParameterError(f"f0_guess_hz={f0_guess_hz} must be a frequency >= 20 Hz")
    if 2.0 * f0_guess_hz > NYQUIST_FRACTION * fs:
        raise RecordingError(
            f"sample rate {fs:g} Hz is too low to measure the series of a note near {f0_guess_hz:.1f} Hz: "
            f"its second partial lies above {NYQUIST_FRACTION:g} x the sample rate", file=file)
    if not (isinstance(max_partials, (int, np.integer)) and max_partials >= 2):
        raise ParameterError(f"max_partials={max_partials} must be an integer >= 2")
    if b_guess is not None and not (math.isfinite(b_guess) and b_guess > 0):
        raise ParameterError(f"b_guess={b_guess} must be a finite number > 0 (or None)")
    exclude = np.asarray(exclude_hz, dtype=float).reshape(-1)
    if not np.all(np.isfinite(exclude)):
        raise ParameterError(f"exclude_hz={list(exclude_hz)} must be finite frequencies")
    x = np.asarray(samples, dtype=float)
    if x.ndim != 1:
        raise ParameterError(f"samples must be one channel (a 1-D array), got shape {x.shape}")

    duration = x.size / fs
    if not (math.isfinite(onset_s) and 0.0 <= onset_s < duration):
        raise RecordingError(f"onset {onset_s} s is outside the recording (0 .. {duration:.3f} s)", file=file)
    start = int(round(onset_s * fs))
    stop = x.size if end_s is None else min(x.size, int(round(end_s * fs)))
    length = min(int(round(analysis_window_s(f0_guess_hz) * fs)), stop - start)
    need_s = max(12.0 / f0_guess_hz, 0.05)  # partials at least 12 resolution cells apart
    if length < need_s * fs:
        raise RecordingError(
            f"note too short for partial analysis: {max(length, 0) / fs:.3f} s from the onset, need at least "
            f"{need_s:.3f} s for a first partial near {f0_guess_hz:.1f} Hz", file=file, time_s=onset_s)
    seg = x[start:start + length]
    bad = np.flatnonzero(~np.isfinite(seg))
    if bad.size:
        raise RecordingError("non-finite sample (NaN or infinity)", file=file, time_s=(start + bad[0]) / fs)
    if not np.any(seg):
        raise RecordingError("the note is silent (all samples zero)", file=file, time_s=onset_s)

    spec = _spectrum(seg, fs, f0_guess_hz)
    tol_ex = exclusion_tolerance_hz(spec.window_s)
    peaks = _find_peaks(spec, exclude, tol_ex)
    starts, start_tol = _comb_starts(spec, peaks, f0_guess_hz, *_b_range(f0_guess_hz, b_guess))
    opts = dict(max_partials=int(max_partials), exclude_hz=exclude, tol_ex=tol_ex)
    series = [s for s in (_follow(peaks, spec, start, start_tol, **opts) for start in starts) if s is not None]
    if not series:
        raise RecordingError(
            f"found no series of at least 2 partials near {f0_guess_hz:.1f} Hz above the noise floor "
            "(need 2 to fit f0 and B)", file=file, time_s=onset_s)
    sweep = max(series, key=lambda s: _support(peaks, s))
    return _result(peaks, sweep)


def _result(peaks: _Peaks, sweep: _Sweep) -> SeriesFit:
    fit = sweep.fit
    assert fit.cov is not None and sweep.inliers is not None
    ns = list(sweep.assigned)
    used = [(n, i) for (n, i), ok in zip(sweep.assigned.items(), sweep.inliers) if ok]
    f0 = math.sqrt(fit.p0)
    b = fit.p1 / fit.p0
    cov = fit.cov
    j_b = np.array([-fit.p1 / fit.p0**2, 1.0 / fit.p0])
    var_y1 = cov[0, 0] + 2.0 * cov[0, 1] + cov[1, 1]
    return SeriesFit(
        f0_hz=f0,
        b=b,
        b_uncertainty=float(math.sqrt(max(j_b @ cov @ j_b, 0.0))),
        f0_uncertainty_hz=math.sqrt(max(cov[0, 0], 0.0)) / (2.0 * f0),
        peaks=tuple(
            PartialPeak(n=n, freq_hz=float(peaks.freq[i]), level_db=float(peaks.level_db[i]),
                        snr_db=float(peaks.snr_db[i]), freq_uncertainty_hz=float(peaks.sigma_hz[i]))
            for n, i in used
        ),
        rejected=tuple(n for n, ok in zip(ns, sweep.inliers) if not ok),
        unresolved=tuple(sorted(sweep.unresolved)),
        first_partial_uncertainty_hz=math.sqrt(max(var_y1, 0.0)) / (2.0 * math.sqrt(fit.p0 + fit.p1)),
    )
