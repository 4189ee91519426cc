"""Analysis of a recording, note by note: what ``voicer analyze`` reports and the fit uses.

For each struck note of a recording: the partial series (f0, B), each partial's decay
(one or two stages, beats), and the strike ratio from the pattern of weak partials.
Steady tones of the take (mains hum, whines) are found first, over all its notes, and kept
out of every note's partials.
"""

from __future__ import annotations

__all__ = ["MAX_LEVEL_UNCERTAINTY_DB", "has_level", "PartialResult", "NoteAnalysis", "RecordingAnalysis", "analyze_note", "analyze_recording"]

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from ..errors import RecordingError
from ..physics.tuning import cents, equal_tempered_hz
from .audio import Recording, load_recording
from .decay import DecayFit, fit_decay, partial_envelopes
from .onsets import Strike, Take, segment
from .partials import SeriesFit, find_series
from .steady import MIN_WINDOW_S, SteadyTone, find_steady_tones
from .strike import StrikeFit, fit_strike_ratio

#: Partials analysed per note at most (beyond ~40 a recording's partials are mostly room
#: and noise, and the hammer's spectrum is far down).
MAX_PARTIALS = 40
#: A steady tone this close to a lone note's pitch (relative; ~17 cents, well beyond the
#: pitch estimate's error) is taken for the note's first partial.
OWN_PITCH_TOLERANCE = 0.01
#: A partial's onset level is used (strike ratio, felt) when known to within this, dB: a
#: real note's beating or bending envelope leaves its T60 uncertain long before its level.
MAX_LEVEL_UNCERTAINTY_DB = 6.0
#: A note's analysis window ends this long after its onset at the latest (long enough for
#: the aftersound of the bass, short enough to keep the analysis fast).
MAX_NOTE_S = 8.0
#: Fewest partials with a level that the strike ratio is fitted from.
MIN_STRIKE_PARTIALS = 6


@dataclass(frozen=True)
class PartialResult:
    """One partial of a note: where it is and how it decays.

    Levels are dB re full scale of a unit sine (the recording's own scale); ``t60_s`` is
    the prompt stage (the only one when single). ``decay_quality`` is that of the T60;
    the level's own standard error is ``level_uncertainty_db`` (see :func:`has_level`).
    """

    n: int
    freq_hz: float
    level_db: float
    level_uncertainty_db: float
    t60_s: float
    t60_uncertainty_s: float
    knee_s: float | None
    after_level_db: float | None
    after_t60_s: float | None
    beat_hz: float | None
    decay_quality: str


@dataclass(frozen=True)
class NoteAnalysis:
    """The analysis of one struck note."""

    path: str
    key: int
    onset_s: float
    end_s: float
    level_db: float
    first_partial_hz: float
    cents_from_et: float
    b: float
    b_uncertainty: float
    partials: tuple[PartialResult, ...]
    unresolved: tuple[int, ...]
    strike: StrikeFit | None
    quality: str
    notes: tuple[str, ...] = field(default=())


@dataclass(frozen=True)
class RecordingAnalysis:
    """All notes of one recording, with what was kept out."""

    path: str
    sample_rate: int
    take: Take
    steady: tuple[SteadyTone, ...]
    notes: tuple[NoteAnalysis, ...]
    skipped: tuple[tuple[float, str], ...]


def has_level(p: PartialResult) -> bool:
    """True when the partial's onset level is known well enough to fit to."""
    return bool(np.isfinite(p.level_db) and p.level_uncertainty_db <= MAX_LEVEL_UNCERTAINTY_DB)


def _quality(series: SeriesFit, partials: list[PartialResult]) -> str:
    """``good``: 8 or more partials with B known to 5 %; ``fair``: 4 or more partials;
    ``poor``: fewer (a pitch without a usable series)."""
    rel_b = series.b_uncertainty / series.b if series.b > 0 else np.inf
    good_decays = sum(p.decay_quality != "poor" for p in partials)
    if len(series.peaks) >= 8 and rel_b < 0.05 and good_decays >= 4:
        return "good"
    return "fair" if len(series.peaks) >= 4 else "poor"


def analyze_note(recording: Recording, strike: Strike, *, exclude_hz: tuple[float, ...] = (),
                 a4_hz: float = 440.0) -> NoteAnalysis:
    """Series, decays and strike ratio of one struck note of ``recording``."""
    end = min(strike.end_s, strike.onset_s + MAX_NOTE_S)
    x, fs = recording.samples, recording.sample_rate
    series = find_series(x, fs, f0_guess_hz=strike.pitch_hz, onset_s=strike.onset_s, end_s=end,
                         max_partials=MAX_PARTIALS, exclude_hz=exclude_hz, file=recording.path)
    notes: list[str] = []
    peaks = list(series.peaks)
    env = partial_envelopes(x, fs, [p.freq_hz for p in peaks], onset_s=strike.onset_s, end_s=end)
    partials = []
    for j, peak in enumerate(peaks):
        d: DecayFit = fit_decay(env.t_s, env.level_db[j], noise_db=float(env.noise_db[j]))
        partials.append(PartialResult(n=peak.n, freq_hz=peak.freq_hz, level_db=d.level_db,
                                      level_uncertainty_db=d.level_uncertainty_db, t60_s=d.t60_s,
                                      t60_uncertainty_s=d.t60_uncertainty_s, knee_s=d.knee_s, after_level_db=d.after_level_db, after_t60_s=d.after_t60_s,
                                      beat_hz=d.beat_hz, decay_quality=d.quality))
    strike_fit = None
    # Levels that the envelope does not tell are left out (not guessed).
    levelled = [p for p in partials if has_level(p)]
    if len(levelled) >= MIN_STRIKE_PARTIALS:
        strike_fit = fit_strike_ratio([p.n for p in levelled], [p.level_db for p in levelled])
    else:
        notes.append(f"{len(levelled)} partials with a level: too few for the strike ratio")
    f1 = series.first_partial_hz
    return NoteAnalysis(
        path=recording.path, key=strike.key, onset_s=strike.onset_s, end_s=end, level_db=strike.level_db,
        first_partial_hz=f1, cents_from_et=float(cents(f1, equal_tempered_hz(strike.key, a4_hz=a4_hz))),
        b=series.b, b_uncertainty=series.b_uncertainty, partials=tuple(partials), unresolved=series.unresolved,
        strike=strike_fit, quality=_quality(series, partials), notes=tuple(notes))


def analyze_recording(path: str | Path, *, key: int | None = None, a4_hz: float = 440.0,
                      on_note: Callable[[int, int], None] | None = None) -> RecordingAnalysis:
    """Load, segment and analyse every struck note of one recording.

    Parameters
    ----------
    path : str or Path
        Any file libsndfile reads.
    key : int, optional
        The key of a single-note recording, when the technician knows it.
    a4_hz : float
        Reference of equal temperament for keys and cents.
    on_note : callable, optional
        Called as ``on_note(done, total)`` after each note (progress).

    Raises
    ------
    RecordingError
        If the file cannot be used, or no note in it can be analysed.
    """
    recording = load_recording(path)
    take = segment(recording, a4_hz=a4_hz, key=key)
    steady = find_steady_tones(recording.samples, recording.sample_rate, [s.onset_s for s in take.strikes])
    if len(take.strikes) == 1 and take.strikes[0].onset_s < MIN_WINDOW_S:
        # One note and no lead-in: only the fall of its level tells a steady tone, and the
        # note's own first partial can hold its level for a short file (beating unisons;
        # measured on the fluid-soundfont-gm C6, 1.5 s long). The file is of the note.
        own = take.strikes[0].pitch_hz
        steady = tuple(t for t in steady if abs(t.freq_hz / own - 1.0) > OWN_PITCH_TOLERANCE)
    exclude = tuple(t.freq_hz for t in steady)
    notes, skipped = [], list(take.skipped)
    for i, strike in enumerate(take.strikes):
        try:
            notes.append(analyze_note(recording, strike, exclude_hz=exclude, a4_hz=a4_hz))
        except RecordingError as exc:
            skipped.append((strike.onset_s, exc.reason))
        if on_note is not None:
            on_note(i + 1, len(take.strikes))
    if not notes:
        reasons = "; ".join(f"{t:.2f} s: {r}" for t, r in skipped) or "no struck note found"
        raise RecordingError(f"no note could be analysed ({reasons})", file=str(path))
    return RecordingAnalysis(path=str(path), sample_rate=recording.sample_rate, take=take, steady=steady,
                             notes=tuple(notes), skipped=tuple(skipped))
