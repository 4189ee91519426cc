"""Reading a recording: any format libsndfile reads, checked, mixed to mono, resampled.

Every problem a recording can cause is a :class:`~voicer.errors.RecordingError` naming
the file and, where it has one, the time in the file. :func:`check_signal` is shared with
the guided recorder, which checks captured audio with the same rules.
"""

from __future__ import annotations

__all__ = [
    "MAX_CHANNELS",
    "MIN_DURATION_S",
    "SILENCE_DBFS",
    "CLIP_LEVEL",
    "CLIP_RUN",
    "MAX_CLIPPED_FRACTION",
    "Recording",
    "check_signal",
    "load_recording",
]

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf
from numpy.typing import NDArray

from ..errors import ParameterError, RecordingError

#: More channels than this are refused (a 32-channel file is not a piano recording).
MAX_CHANNELS = 8
#: Shorter recordings cannot be analysed (partials of a bass note need a few periods).
MIN_DURATION_S = 0.25
#: A recording whose peak stays below this level (dBFS) is taken for silence.
SILENCE_DBFS = -60.0
#: A channel's extreme counts as a clipping level only this close to full scale (-1 dBFS):
#: lower down, repeated equal peak samples are ordinary quantisation of a quiet file.
CLIP_LEVEL = 10.0 ** (-1.0 / 20.0)
#: A clipped run is at least this many consecutive samples at the channel's extreme; a
#: peak of an unclipped piano tone (sharp, with many partials) does not stay there.
CLIP_RUN = 3
#: More clipped frames than this fraction are refused: the partial levels, which the fit
#: compares in dB, are no longer those of the piano. A few clipped attack peaks are
#: tolerated and reported in ``Recording.clipped_fraction``.
MAX_CLIPPED_FRACTION = 1e-3


@dataclass(frozen=True)
class Recording:
    """A checked recording, mixed to mono.

    Attributes
    ----------
    path : str
        The file read.
    samples : ndarray of float64, shape (frames,)
        Mono mixdown (mean of the channels), resampled if asked for.
    sample_rate : int
        Sample rate of ``samples``.
    file_rate : int
        Sample rate of the file.
    channels : int
        Channels in the file.
    clipped_fraction : float
        Fraction of the file's frames that are clipped in any channel (tolerated: at most
        :data:`MAX_CLIPPED_FRACTION`).
    """

    path: str
    samples: NDArray[np.float64]
    sample_rate: int
    file_rate: int
    channels: int
    clipped_fraction: float

    @property
    def duration_s(self) -> float:
        """Length of the recording in seconds."""
        return len(self.samples) / self.sample_rate


def _clipped_frames(frames: NDArray) -> NDArray[np.bool_]:
    """Frames where some channel sits in a run of >= CLIP_RUN samples at its extreme.

    The extreme is the channel's largest (and, separately, smallest) value, provided it is
    within :data:`CLIP_LEVEL` of full scale: float data of a clipped PCM file sits at
    +32767/32768 and -1.0, a clipped float file at +-1.0, a converter that clips early at
    its own largest value.
    """
    n = len(frames)
    clipped = np.zeros(n, dtype=bool)
    if n < CLIP_RUN:
        return clipped
    for channel in frames.T:
        for extreme in (channel.max(), channel.min()):
            if abs(extreme) < CLIP_LEVEL:
                continue
            at = channel == extreme
            starts = at[: n - CLIP_RUN + 1].copy()
            for k in range(1, CLIP_RUN):
                starts &= at[k : n - CLIP_RUN + 1 + k]
            # a run of length L >= CLIP_RUN has L - CLIP_RUN + 1 starts; mark the whole run
            for k in range(CLIP_RUN):
                clipped[k : n - CLIP_RUN + 1 + k] |= starts
    return clipped


def check_signal(frames: NDArray, sample_rate: int, *, file: str, start_s: float = 0.0) -> float:
    """Check audio for what makes it unusable; return the clipped fraction when tolerated.

    Parameters
    ----------
    frames : ndarray of float, shape (n, channels) or (n,)
        The audio, full scale = 1.0.
    sample_rate : int > 0
        Sample rate of ``frames``.
    file : str
        Name used in messages (a path, or a description of the capture).
    start_s : float
        Time of ``frames[0]`` in the file, so that reported times are file times.

    Returns
    -------
    float
        Fraction of frames clipped in any channel (0 ... :data:`MAX_CLIPPED_FRACTION`).

    Raises
    ------
    RecordingError
        Non-finite samples (the time of the first is named), shorter than
        :data:`MIN_DURATION_S`, a peak below :data:`SILENCE_DBFS`, or more than
        :data:`MAX_CLIPPED_FRACTION` of the frames clipped (the time of the first clipped
        run and the fraction are named).
    """
    x = np.asarray(frames, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    n = len(x)
    finite = np.isfinite(x).all(axis=1)
    if not finite.all():
        first = int(np.argmin(finite))
        raise RecordingError(
            "holds non-finite samples (NaN or infinity); a recording must hold numbers only",
            file=file, time_s=start_s + first / sample_rate)
    duration_s = n / sample_rate
    if duration_s < MIN_DURATION_S:
        raise RecordingError(
            f"lasts {duration_s * 1e3:.1f} ms ({n} frames at {sample_rate} Hz); "
            f"a note needs at least {MIN_DURATION_S:g} s to be analysed", file=file)
    peak = float(np.max(np.abs(x)))
    if peak == 0.0:
        raise RecordingError("is silent: every sample is zero; check the input and its level", file=file)
    peak_db = 20.0 * math.log10(peak)
    if peak_db < SILENCE_DBFS:
        raise RecordingError(
            f"is silent: its peak is {peak_db:.1f} dBFS, below the {SILENCE_DBFS:g} dBFS needed; "
            "check the input and its level", file=file)
    clipped = _clipped_frames(x)
    fraction = float(clipped.mean())
    if fraction > MAX_CLIPPED_FRACTION:
        first = int(np.argmax(clipped))
        raise RecordingError(
            f"is clipped: {100 * fraction:.2f} % of the frames sit at full scale (at most "
            f"{100 * MAX_CLIPPED_FRACTION:g} % is tolerated); record again with less input gain",
            file=file, time_s=start_s + first / sample_rate)
    return fraction


def _formats() -> str:
    return f"{', '.join(sorted(sf.available_formats()))} (libsndfile {sf.__libsndfile_version__})"


def load_recording(path: str | Path, *, sample_rate: int | None = None) -> Recording:
    """Read, check, mix down and (if asked) resample a recording.

    Parameters
    ----------
    path : str or Path
        Any file libsndfile reads (WAV, FLAC, OGG, MP3, AIFF ...).
    sample_rate : int > 0, optional
        Resample to this rate (``scipy.signal.resample_poly``) if the file's differs.

    Returns
    -------
    Recording

    Raises
    ------
    RecordingError
        Missing or unreadable file, no samples, more than :data:`MAX_CHANNELS` channels,
        or a signal refused by :func:`check_signal`.
    ParameterError
        ``sample_rate`` is not a positive integer.
    """
    if sample_rate is not None and (not isinstance(sample_rate, (int, np.integer)) or sample_rate <= 0):
        raise ParameterError(f"sample_rate={sample_rate!r} must be a positive integer (Hz)")
    name = str(path)
    if not Path(path).is_file():
        raise RecordingError("no such file", file=name)
    if Path(path).stat().st_size == 0:
        raise RecordingError("is empty (0 bytes): the recording was not saved, or not completely", file=name)
    try:
        info = sf.info(name)
    except sf.LibsndfileError as err:
        raise RecordingError(
            f"cannot be read as audio ({err.error_string.rstrip('.')}); formats read: {_formats()}",
            file=name) from None
    if info.channels > MAX_CHANNELS:
        raise RecordingError(
            f"has {info.channels} channels; a piano recording has 1 to {MAX_CHANNELS}", file=name)
    try:
        frames, file_rate = sf.read(name, dtype="float64", always_2d=True)
    except sf.LibsndfileError as err:
        raise RecordingError(f"cannot be decoded ({err.error_string.rstrip('.')})", file=name) from None
    if len(frames) == 0:
        raise RecordingError("holds no samples", file=name)
    clipped = check_signal(frames, file_rate, file=name)
    # The mean, not one channel or a power sum: it is linear, so each partial stays one
    # damped sinusoid of its own frequency and decay, only its amplitude and phase are a
    # blend of the microphones'. Spaced microphones see a partial with different phases;
    # a partial at a node for one microphone is kept by the other (it would cancel only
    # with equal amplitudes in exact opposition).
    mono = frames.mean(axis=1)
    rate = int(file_rate)
    if sample_rate is not None and sample_rate != rate:
        from scipy.signal import resample_poly  # scipy.signal costs ~0.2 s to import; only here

        g = math.gcd(int(sample_rate), rate)
        mono = resample_poly(mono, int(sample_rate) // g, rate // g)
        rate = int(sample_rate)
    return Recording(path=name, samples=np.ascontiguousarray(mono, dtype=np.float64), sample_rate=rate,
                     file_rate=int(file_rate), channels=int(info.channels), clipped_fraction=clipped)
