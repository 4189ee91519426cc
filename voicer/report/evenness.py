"""Evenness across the compass: per-key metrics at chosen dynamics, a robust trend, each
key's deviation from it, and the outlier keys.

Metrics (:data:`METRIC_INFO`), per key and dynamic, from the predicted blow at the hammer
speed of the dynamic's MIDI velocity (the preset's velocity map is per instrument, so
every key gets the same speed):

- ``loudness_phon``: the loudness level, in phon, of the partials at the onset as a
  listener in the room hears them: Zwicker's method of ISO 532-1:2017 for stationary
  sounds (:mod:`voicer.report.loudness`), diffuse field, at the one listening level of
  :data:`~voicer.report.loudness.LISTENING_SPL_DB` for every preset. Not a weighted sum
  of the partials' power: that is set by the first few partials, which the hammer's
  momentum rules at ff, so it hardly hears a felt that rounds off the upper partials;
  a listener does, since partials in separate critical bands add up in loudness
  (needling the demo's C4 by 20 % at the shoulders: -0.11 dB of partial power at ff,
  -0.16 at pp; -0.59 and -0.32 phon). The onset, not an energy over the first part
  of the note, because voicing acts on the blow, not on the decay: the felt sets the
  partials' amplitudes and leaves their decay rates alone, and the decay has its own
  metric (``sustain_s``), so a key with unusual losses does not pass for a loudness
  outlier that no needle could mend.
- ``brightness``: the power-weighted spectral centroid of the partials
  (:func:`~voicer.report.spectrum.spectral_centroid_hz`) over the first partial's
  frequency, "in harmonics". ``high_partials_db``: the power of partials 5-10 over that
  of partials 1-4; a key with fewer than 10 partials below the band limit (0.45 of the
  sample rate, above hearing at 48 kHz) uses those it has, one with 4 or fewer has none
  (NaN).
- ``attack_ms``: the hammer's contact duration (shorter: sharper attack), as the
  duration of the half-sine pulse with the same impulse and energy as the simulated one,
  ``(pi^2 / 8) (integral F dt)^2 / integral F^2 dt``. Not the span from first touch to
  last release that the tables keep: in the bass a string can throw a light second touch
  back at the hammer (a 0.1-11 N tap after a 35-77 N blow in the demo) or the force dip
  between two humps can just reach zero, and either nearly doubles the span from one key
  to the next while the blow hardly changes (1.95 to 3.26 ms from the demo's B1 to C2 at
  mf; the first contact alone, 1.98 to 3.40 ms from C2 to C#2). The effective duration
  runs smoothly through both; for a half-sine it is its duration, for the demo's peaked
  single contacts 0.65-0.9 of the span.
- ``sustain_s``: T60 of the first partial, ``ln(1000) / sigma`` (the same at every
  dynamic: the model's decay rates do not depend on the speed).

Trend (:func:`trend`): LOWESS (Cleveland 1979) within each section of alike strings
(:func:`construction_breaks`): a new section begins where wound strings end and where
the unison count changes, since each makes a step in the metrics (two strings instead of
one are 2.5-3 dB louder at the demo's F1) that no hammer caused and no voicing should
chase. Flags: a deviation beyond :data:`FLAG_SIGMAS` robust standard deviations of its
neighbours' deviations and beyond the metric's :data:`FLAG_FLOORS`.
"""

from __future__ import annotations

__all__ = [
    "DYNAMICS",
    "METRICS",
    "METRIC_INFO",
    "VOICING_METRICS",
    "FLAG_FLOORS",
    "FLAG_SIGMAS",
    "CONSISTENT_FRACTION",
    "SPAN_KEYS",
    "ROBUST_ITERATIONS",
    "Evenness",
    "construction_breaks",
    "spectral_metrics",
    "trend",
    "measure",
]

import warnings
from dataclasses import dataclass
from typing import Any, Iterable, Mapping

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import ParameterError
from ..physics.strings import t60_s
from ..tone.preset import Preset
from ..tone.tables import ModalTables, TableSettings, simulate_blows
from ..tone.velocity import DYNAMIC_VELOCITY, hammer_speed
from .loudness import LISTENING_SPL_DB, partials_loudness_phon
from .spectrum import spectral_centroid_hz

#: MIDI velocity of each dynamic measured (the fit's readings of the markings).
DYNAMICS: dict[str, int] = {name: DYNAMIC_VELOCITY[name] for name in ("pp", "mf", "ff")}

#: The metrics, in the order of :data:`METRIC_INFO`.
METRICS: tuple[str, ...] = ("loudness_phon", "brightness", "high_partials_db", "attack_ms", "sustain_s")

#: Unit and meaning of each metric (for reports and the README).
METRIC_INFO: dict[str, tuple[str, str]] = {
    "loudness_phon": ("phon", "loudness level of the partials at the onset (ISO 532-1 Zwicker, diffuse field, "
                              f"{LISTENING_SPL_DB:g} dB SPL per newton of bridge force)"),
    "brightness": ("harmonics", "spectral centroid of the partials (power-weighted) over the first partial's "
                                "frequency"),
    "high_partials_db": ("dB", "power of partials 5-10 relative to partials 1-4"),
    "attack_ms": ("ms", "hammer contact duration, as the half-sine pulse of the same impulse and energy "
                        "(shorter: sharper attack)"),
    "sustain_s": ("s", "T60 of the first partial"),
}

#: The metrics a voicing job evens out: :meth:`Evenness.flagged_keys` looks at these.
VOICING_METRICS: tuple[str, ...] = ("loudness_phon", "brightness")

#: Smallest deviation worth a flag, per metric: (size, relative). Relative sizes are
#: fractions of the trend, for metrics that span a decade or more over the compass.
#: Loudness: a just-noticeable level step is about 1 dB (from memory), about 1 phon at
#: these levels; 1.5 phon between neighbours is clearly heard; the partials' balance
#: alike, in dB. Brightness: 5 % of
#: the centroid (listeners tell centroid steps of a few per cent apart, from memory): it
#: is some 1.05 harmonics at the top and 6-10 in the low bass, so a fixed size in
#: harmonics would be a large change in the treble and a slight one in the bass (doubling
#: the felt stiffness at the demo's C4 raises it by 0.15-0.19 harmonics, 10 %). Attack
#: and sustain: 10 %, a working choice (the JND of a reverberation time is about 5 %,
#: from memory; a piano's decay is harder to judge).
FLAG_FLOORS: dict[str, tuple[float, bool]] = {
    "loudness_phon": (1.5, False),
    "brightness": (0.05, True),
    "high_partials_db": (1.5, False),
    "attack_ms": (0.10, True),
    "sustain_s": (0.10, True),
}

#: Flag beyond this many robust standard deviations: the modified z-score rule of
#: Iglewicz & Hoaglin (1993, "How to detect and handle outliers", ASQC; from memory).
FLAG_SIGMAS = 3.5
#: An outlier hammer deviates the same way at every dynamic by at least this fraction of
#: its largest deviation (see :meth:`Evenness.flagged_keys`). A felt 1.8 times harder
#: than its neighbours at C5 moves brightness by 0.017 / 0.018 / 0.073 harmonics at
#: pp / mf / ff (0.23 of the largest); a pulse-spectrum dip in the top octaves moves one
#: dynamic by 3-18 dB and the others by under 2 % of that (measured on the demo).
CONSISTENT_FRACTION = 0.15

#: LOWESS window in keys: 7 either side (the farthest get zero weight, so 13 count).
#: Wide enough that two neighbouring outliers are a small part of it, narrow enough for a
#: local quadratic to follow the demo's steepest bends (its loudness falls by 40 dB over
#: the top octave at ff). Of 11, 13, 15, 19 and 25 keys, 15 is the one that flags nothing
#: below G6 in the demo (13 and 19 each flag one key where its partials 5-10 are rough,
#: B5 and G#5, 25 one in the bass, B1); all five find a doubled felt at C4 and nothing
#: else.
SPAN_KEYS = 15

#: Robustness iterations, as Cleveland (1979) recommends. With the span above, up to
#: three neighbouring outliers of 5 dB move a smooth trend by under 0.02 dB (more
#: iterations change nothing); four in a row are a region, not outliers, and carry it.
ROBUST_ITERATIONS = 2

_MAD_SD = 1.4826  # standard deviation / MAD of a normal distribution
_LOW, _HIGH = slice(0, 4), slice(4, 10)  # partials 1-4 and 5-10


def construction_breaks(preset: Preset) -> tuple[int, ...]:
    """Keys after which the strings change: the last wound key and each change of
    unison count (each makes a step in the metrics that no hammer caused)."""
    scale = preset.scale
    changed = (np.diff(scale.values["strings"]) != 0) | (np.diff(scale.wound.astype(int)) != 0)
    return tuple(int(k) for k in scale.keys[:-1][changed])


@dataclass(frozen=True, eq=False)
class Evenness:
    """Metrics of every key at every dynamic, their trends, deviations and flags.

    Arrays over keys and dynamics have shape ``(len(keys), len(dynamics))``; a metric a
    key does not have (``high_partials_db`` of the top keys) is NaN there, with NaN trend
    and deviation and no flag.

    Attributes
    ----------
    keys : ndarray of int (K,)
        MIDI keys, ascending.
    dynamics : tuple of str (D,)
        Dynamic markings (keys of :data:`DYNAMICS`).
    velocities : tuple of int (D,)
        Their MIDI velocities.
    speeds_m_s : ndarray (D,)
        Their hammer speeds under the preset's velocity map.
    values, trend, deviation : dict of str to ndarray (K, D)
        Per metric: the value, the smooth trend across the compass, value - trend.
    scatter : dict of str to ndarray (K, D)
        Per metric: the robust standard deviation (1.4826 MAD) of the deviations of the
        key's ``span_keys`` nearest keys, relative to the trend where the metric's floor
        is relative: how uneven the region is.
    flagged : dict of str to ndarray of bool (K, D)
        Per metric: the key is an outlier at that dynamic.
    breaks : tuple of int
        Keys after which a new section of the trend begins.
    """

    keys: NDArray[np.int64]
    dynamics: tuple[str, ...]
    velocities: tuple[int, ...]
    speeds_m_s: NDArray[np.float64]
    values: dict[str, NDArray[np.float64]]
    trend: dict[str, NDArray[np.float64]]
    deviation: dict[str, NDArray[np.float64]]
    scatter: dict[str, NDArray[np.float64]]
    flagged: dict[str, NDArray[np.bool_]]
    breaks: tuple[int, ...]

    def flagged_keys(self, metrics: Iterable[str] = VOICING_METRICS, *, consistent: bool = True) -> list[int]:
        """Keys flagged in any of ``metrics`` (default loudness and brightness), ascending.

        With ``consistent`` (the default) a key counts as an outlier hammer only where, in
        that metric, it is flagged at some dynamic and deviates the same way at every
        measured dynamic by at least :data:`CONSISTENT_FRACTION` of its largest
        deviation: a hammer harder or softer than its neighbours moves the tone at every
        dynamic (more at pp when at the crown, at ff at the shoulders), while a partial
        meeting a dip of the hammer's force spectrum (the model's elastic felt in the top
        octaves, where the contact outlasts a period) makes one dynamic deviate alone,
        and no needle mends that. ``consistent=False``: flagged at any dynamic.
        """
        hit = np.zeros(len(self.keys), dtype=bool)
        for name in metrics:
            flags = self._metric(self.flagged, name).any(axis=1)
            if consistent and len(self.dynamics) > 1:
                dev = self._metric(self.deviation, name)
                big = np.nanmax(np.abs(dev), axis=1, keepdims=True)
                with np.errstate(invalid="ignore"):
                    same = (np.all(dev > CONSISTENT_FRACTION * big, axis=1)
                            | np.all(dev < -CONSISTENT_FRACTION * big, axis=1))
                flags &= same
            hit |= flags
        return [int(k) for k in self.keys[hit]]

    def rms_deviation(self, metric: str, *, dynamic: str | None = None, keys: Iterable[int] | None = None) -> float:
        """Root-mean-square deviation from the trend, in the metric's unit, over the keys
        (all measured, or those given) and the dynamics (all, or the one given); keys
        without the metric are left out (NaN if none is left)."""
        dev = self._metric(self.deviation, metric)
        if dynamic is not None:
            if dynamic not in self.dynamics:
                raise ParameterError(f"dynamic {dynamic!r} was not measured (measured: {', '.join(self.dynamics)})")
            dev = dev[:, [self.dynamics.index(dynamic)]]
        if keys is not None:
            wanted = np.asarray(sorted({int(k) for k in keys}), dtype=np.int64)
            missing = np.setdiff1d(wanted, self.keys)
            if missing.size:
                raise ParameterError(f"keys {missing.tolist()} were not measured")
            dev = dev[np.isin(self.keys, wanted)]
        dev = dev[np.isfinite(dev)]
        return float(np.sqrt(np.mean(dev**2))) if dev.size else float("nan")

    @staticmethod
    def _metric(table: Mapping[str, NDArray[Any]], name: str) -> NDArray[Any]:
        if name not in table:
            raise ParameterError(f"unknown metric {name!r} (one of {', '.join(METRICS)})")
        return table[name]


def _local_fit(u: NDArray[np.float64], w: NDArray[np.float64], y: NDArray[np.float64], degree: int
               ) -> NDArray[np.float64]:
    """Weighted polynomial fits, one per row of ``w``, evaluated at their centre.

    ``u[i, j]`` is point j's offset from point i (scaled), ``w[i, j]`` its weight in fit i.
    A fit with fewer supporting points than its degree needs drops to a lower degree.
    """
    out = np.full(len(y), np.nan)
    support = np.count_nonzero(w > 0, axis=1)
    for deg in range(degree, -1, -1):
        rows = np.flatnonzero(np.isnan(out) & (support > deg))
        if not rows.size:
            continue
        powers = u[rows][:, :, None] ** np.arange(deg + 1)  # (rows, n, deg + 1)
        weighted = powers * w[rows][:, :, None]
        normal = np.einsum("rnk,rnl->rkl", weighted, powers)
        rhs = np.einsum("rnk,n->rk", weighted, y)
        ok = np.linalg.cond(normal) < 1e12  # points of a window all at a few offsets
        if np.any(ok):
            out[rows[ok]] = np.linalg.solve(normal[ok], rhs[ok][:, :, None])[:, 0, 0]
    return out


def _lowess(x: NDArray[np.float64], y: NDArray[np.float64], span: int, iterations: int, degree: int
            ) -> NDArray[np.float64]:
    """LOWESS of one section (finite values only)."""
    dist = np.abs(x[None, :] - x[:, None])
    # Half the span either side, also at a section's ends (there Cleveland's span nearest
    # points reach twice as far, into the bend of a steep end: the demo's C8 at ff came
    # out 16 dB below its trend); wider only where keys are too sparse for the degree.
    enough = np.sort(dist, axis=1)[:, min(degree + 2, len(x) - 1)]
    h = np.maximum((span - 1) / 2.0, enough)
    tricube = np.clip(1.0 - (dist / h[:, None]) ** 3, 0.0, None) ** 3
    window = dist <= h[:, None]
    u = (x[None, :] - x[:, None]) / h[:, None]
    fit = _local_fit(u, tricube, y, degree)
    for _ in range(iterations):
        residual = y - fit
        # The residual scale of each point's own window, not the section's: the model's
        # scatter varies by orders of magnitude along the compass (round-off smooth in the
        # middle, dips of 10 dB and more where a partial meets a null of the hammer's
        # spectrum in the top octave), and one scale made outliers of a whole rough
        # region, leaving the trend there with no support.
        scale = np.nanmedian(np.where(window, np.abs(residual)[None, :], np.nan), axis=1)
        tiny = 1e-12 * max(float(np.max(np.abs(y))), 1e-300)
        r = residual / (6.0 * np.maximum(scale, tiny))
        robust = np.clip(1.0 - r**2, 0.0, None) ** 2  # bisquare
        fit = _local_fit(u, tricube * robust[None, :], y, degree)
    return fit


def trend(keys: ArrayLike, values: ArrayLike, *, span_keys: int = SPAN_KEYS, iterations: int = ROBUST_ITERATIONS,
          degree: int = 2, breaks: Iterable[int] = ()) -> NDArray[np.float64]:
    """Robust smooth trend of a metric across the compass: LOWESS.

    Cleveland, W. S. (1979), "Robust locally weighted regression and smoothing
    scatterplots", JASA 74, 829-836: at each key a weighted polynomial fit over its
    neighbours with tricube weights ``(1 - (d/h)^3)^3``, then robustness iterations that
    reweight each key by the bisquare ``(1 - (e / 6s)^2)^2`` of its residual e. Three
    departures: the fits are local quadratics (Cleveland & Devlin 1988, JASA 83, 596-610,
    for curves that bend, as the loudness does toward the top); the bandwidth h is half
    the span in keys everywhere, where Cleveland takes the distance to the span-th
    nearest point, which at a section's ends reaches twice as far (keys are evenly
    spaced, so the two differ only there); and s is the median absolute residual of the
    key's own window rather than of all keys (see the code's comment).

    Parameters
    ----------
    keys : array_like of int (K,), ascending
        MIDI keys.
    values : array_like of float (K,) or (K, M)
        One metric per column; non-finite values take no part and get a NaN trend.
    span_keys : int >= 2
        Width of each local fit's window in keys, ``(span_keys - 1) / 2`` either side.
    iterations : int >= 0
        Robustness iterations (0: plain local regression).
    degree : {0, 1, 2}
        Degree of the local polynomials.
    breaks : iterable of int
        Keys after which a new section begins; sections are fitted separately (see
        :func:`construction_breaks`). A section of one key is its own trend.

    Returns
    -------
    ndarray, the shape of ``values``
    """
    x = np.asarray(keys, dtype=float)
    y = np.asarray(values, dtype=float)
    if x.ndim != 1 or y.shape[:1] != x.shape:
        raise ParameterError(f"values of shape {y.shape} do not match {x.size} keys")
    if np.any(np.diff(x) <= 0):
        raise ParameterError("keys must be strictly ascending")
    if span_keys < 2 or iterations < 0 or degree not in (0, 1, 2):
        raise ParameterError(f"span_keys={span_keys} must be >= 2, iterations={iterations} >= 0, "
                             f"degree={degree} one of 0, 1, 2")
    columns = y.reshape(len(x), -1)
    out = np.full(columns.shape, np.nan)
    section = np.searchsorted(np.sort(np.asarray(list(breaks), dtype=float)), x, side="left")
    for s in np.unique(section):
        for c in range(columns.shape[1]):
            idx = np.flatnonzero((section == s) & np.isfinite(columns[:, c]))
            if idx.size:
                out[idx, c] = _lowess(x[idx], columns[idx, c], span_keys, iterations, degree)
    return out.reshape(y.shape)


def _scatter(keys: NDArray[np.int64], deviation: NDArray[np.float64], span: int) -> NDArray[np.float64]:
    """Robust standard deviation (1.4826 MAD) of the deviations in each key's window, per
    column, over all sections (deviations are comparable across a break); NaN left out."""
    x = keys.astype(float)
    dist = np.abs(x[None, :] - x[:, None])
    window = dist <= np.sort(dist, axis=1)[:, min(span, len(x)) - 1][:, None]
    near = np.where(window[:, :, None], deviation[None, :, :], np.nan)  # (key, neighbour, column)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a window without any value: NaN
        centre = np.nanmedian(near, axis=1, keepdims=True)
        return _MAD_SD * np.nanmedian(np.abs(near - centre), axis=1)


def spectral_metrics(freq_hz: NDArray[np.float64], sigma_per_s: NDArray[np.float64],
                      amplitude_n: NDArray[np.complex128]) -> dict[str, NDArray[np.float64]]:
    """Loudness, brightness, high partials and sustain of one key at each speed
    (``amplitude_n`` is (speeds, partials), summed over the unison)."""
    power = np.abs(amplitude_n) ** 2
    count = len(freq_hz)
    loudness = partials_loudness_phon(freq_hz, amplitude_n)
    with np.errstate(divide="ignore"):
        high = (10.0 * np.log10(power[:, _HIGH].sum(axis=1) / power[:, _LOW].sum(axis=1)) if count > 4
                else np.full(len(power), np.nan))
    brightness = np.array([spectral_centroid_hz(freq_hz, a) for a in amplitude_n]) / freq_hz[0]
    return {"loudness_phon": loudness, "brightness": brightness, "high_partials_db": high,
            "sustain_s": np.full(len(power), float(t60_s(sigma_per_s[0])))}


def _effective_contact_s(force_n: NDArray[np.float64], dt_s: float) -> float:
    """Contact duration of the half-sine pulse with the same impulse and energy as the
    recorded one: ``(pi^2 / 8) (sum F dt)^2 / (sum F^2 dt)``."""
    return float(np.pi**2 / 8.0 * (force_n.sum() * dt_s) ** 2 / (np.sum(force_n**2) * dt_s))


def measure(preset: Preset, *, keys: Iterable[int] = range(21, 109), dynamics: Iterable[str] = ("pp", "mf", "ff"),
            settings: TableSettings = TableSettings(), tables: ModalTables | None = None,
            span_keys: int = SPAN_KEYS) -> Evenness:
    """Evenness metrics of a preset's keys at some dynamics, with trends and flags.

    Every key is struck at the exact hammer speed of each dynamic in one batch of the
    contact simulation: the whole compass at three dynamics takes about 0.65 s on this
    project's machine at the default settings, 0.4 s of it simulating. The cached
    16-layer tables read faster, but their interpolation between layers is off by up to
    10 dB where the top octaves' partials meet the dips of the hammer's spectrum (within
    0.1 dB below G6).

    Parameters
    ----------
    preset : Preset
        The instrument (voiced or not).
    keys : iterable of int
        MIDI keys to measure (default the whole compass); trends are fitted over these.
    dynamics : iterable of str
        Markings from :data:`DYNAMICS`.
    settings : TableSettings
        Sample rate, partial cap and time steps of the simulation (layers unused).
    tables : ModalTables, optional
        Tables a model plugin built for this preset (e.g. ``additive``: the measured
        partials of a fitted piano): the spectra then come from them, interpolated to
        the speeds as the engine plays them. The attack is still simulated, since tables
        keep only the whole contact span.
    span_keys : int >= 2
        LOWESS window of the trends and of the flags' scatter.

    Raises
    ------
    ParameterError
        An unknown dynamic, a key outside the compass or without a table, tables of
        another preset.
    """
    wanted = sorted({int(k) for k in keys})
    names = tuple(dynamics)
    unknown = [d for d in names if d not in DYNAMICS]
    if unknown or not names or len(set(names)) != len(names):
        raise ParameterError(f"dynamics {list(names)} must be distinct names from {', '.join(DYNAMICS)}")
    if not wanted:
        raise ParameterError("no keys to measure")
    for k in wanted:
        preset.scale.index(k)
    if tables is not None and tables.preset is not preset and tables.preset.to_dict() != preset.to_dict():
        raise ParameterError("the tables were built for another preset")
    velocities = tuple(DYNAMICS[d] for d in names)
    speeds = np.asarray(hammer_speed(list(velocities), preset.instrument), dtype=float)
    blows = simulate_blows(preset, wanted, speeds, settings=settings, record=True)
    forces = blows.force_n
    assert forces is not None  # recorded

    values = {name: np.empty((len(wanted), len(names))) for name in METRICS}
    for i, k in enumerate(wanted):
        table = tables[k] if tables is not None else blows.tables[k]
        if not len(table.freq_hz):
            raise ParameterError(f"key {k} has no partial below the band limit (sample rate too low)")
        amplitude = (table.at_speeds(speeds) if tables is not None else table.amplitude_n.sum(axis=1))
        for name, row in spectral_metrics(table.freq_hz, table.sigma_per_s, amplitude).items():
            values[name][i] = row
        values["attack_ms"][i] = [1e3 * _effective_contact_s(force, dt) for force, dt in zip(forces[k], blows.dt_s[k])]

    key_array = np.asarray(wanted, dtype=np.int64)
    breaks = construction_breaks(preset)
    trends, deviations, scatters, flags = {}, {}, {}, {}
    for name in METRICS:
        tr = trend(key_array, values[name], span_keys=span_keys, breaks=breaks)
        dev = values[name] - tr
        size, relative = FLAG_FLOORS[name]
        with np.errstate(invalid="ignore", divide="ignore"):
            test = dev / np.abs(tr) if relative else dev
            scatter = _scatter(key_array, test, span_keys)
            flags[name] = (np.abs(test) > FLAG_SIGMAS * scatter) & (np.abs(test) > size)
        trends[name], deviations[name], scatters[name] = tr, dev, scatter
    return Evenness(keys=key_array, dynamics=names, velocities=velocities, speeds_m_s=speeds, values=values,
                    trend=trends, deviation=deviations, scatter=scatters, flagged=flags, breaks=breaks)
