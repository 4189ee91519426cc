"""Guided recording: the technician is asked for one key and dynamic at a time; each strike is saved.

A session walks a plan of steps (key, dynamic). For each step it names the key to play,
waits for the strike on the incoming stream, captures a fixed length after it, checks
the take and either saves it or asks again:

* **Strike detection** (:class:`StrikeDetector`), causal, for live input: the mean square
  of the last 10 ms (two 5 ms hops, all channels) is compared with a running estimate of
  the background, which follows a falling level quickly (time constant 20 ms, 217 dB/s:
  faster than the decay of the previous note, even in the top treble, so it follows that
  decay down to the room noise) and a rising one slowly
  (2 s, so a strike stands out against it). A strike is a rise of 15 dB or more above the
  background (or above -80 dB re full scale, whichever is higher: digital silence has no
  level). For 0.1 s after a strike (the hold-off) the background is the signal itself,
  so the attack of the same note cannot trigger again; afterwards only a new rise does,
  which is how a second strike inside a take is caught (if it lifts the level by 15 dB:
  a strike on a note still ringing loud may pass unseen).
* **Capture length**: fixed per key, 6 s at A0 falling linearly to 3 s at C8 (bass notes
  ring longer; the decay fit needs their aftersound), plus 0.1 s before the strike. A
  fixed length, rather than "until the level falls to the noise", keeps every dynamic of a
  key on the same window, so soft takes are not cut shorter than loud ones. ``seconds``
  overrides it.
* **Checks**: :func:`voicer.analysis.audio.check_signal` (non-finite samples, too short,
  silence, clipping beyond its threshold: the message gives the clipped fraction); too soft
  (sample peak under -50 dBFS, or under 20 dB above the background's RMS); a second
  strike inside the take; input lost (the consumer or the device fell behind). Any of
  these asks for the step again and saves nothing.
* **Saving**: ``KKK-NAME-DYN-T.flac`` (e.g. ``060-C4-mf-1.flac``; T counts takes of the
  step), 24-bit FLAC written atomically (:mod:`voicer.io.atomic`), never over an existing
  file; then the index ``takes.json`` is rewritten atomically. A file that exists but is
  not indexed (a crash between the two writes, or a copied take) is adopted into the index
  on the next session; an indexed take whose file was deleted is recorded again: deleting
  a take's file is how one asks for it to be redone.
* **Resume**: a session on an existing folder skips every (key, dynamic) already indexed.
  An interruption (Ctrl-C, an exception from a callback, the ``stop`` event, the end of a
  replayed file) loses nothing saved; the take in progress is dropped.
"""

from __future__ import annotations

__all__ = [
    "DYNAMICS",
    "INDEX_NAME",
    "INDEX_FORMAT",
    "PRE_ROLL_S",
    "MIN_PEAK_DBFS",
    "MIN_SNR_DB",
    "Step",
    "Prompt",
    "AudioInput",
    "SessionResult",
    "StrikeDetector",
    "TakeIndex",
    "GuidedSession",
    "parse_keys",
    "parse_dynamics",
    "plan_steps",
    "capture_seconds",
]

import collections
import io
import json
import math
import os
import re
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Protocol, Sequence

import numpy as np
import soundfile
from numpy.typing import NDArray

from ..errors import ParameterError, RecordingError, VoicerError
from ..io.atomic import atomic_write_bytes
from ..io.capture import CaptureBuffer
from ..physics.tuning import HIGHEST_KEY, LOWEST_KEY, key_name
from .audio import check_signal

#: Dynamic markings a step may ask for, softest first.
DYNAMICS = ("pp", "p", "mp", "mf", "f", "ff")
#: The index of a takes folder.
INDEX_NAME = "takes.json"
#: Version of the index layout.
INDEX_FORMAT = 1
#: Capture length at the lowest and the highest key (linear in key number between).
BASS_CAPTURE_S, TREBLE_CAPTURE_S = 6.0, 3.0
#: Audio kept before the detected strike.
PRE_ROLL_S = 0.1
#: A take whose sample peak is below this is too soft.
MIN_PEAK_DBFS = -50.0
#: A take whose sample peak stands less than this above the background's RMS is too soft.
MIN_SNR_DB = 20.0
#: Sample encoding of the saved takes.
TAKE_SUBTYPE = "PCM_24"
#: Span of input the capture buffer holds: the consumer may fall this far behind.
BUFFER_S = 20.0
#: How long the consumer sleeps when no input is waiting.
POLL_S = 0.005

_TAKE_FILE = re.compile(r"^(\d{3})-([A-G]#?-?\d+)-(" + "|".join(DYNAMICS) + r")-(\d+)\.flac$")


# --- the plan ---------------------------------------------------------------------------------

@dataclass(frozen=True)
class Step:
    """One thing to record: a key (MIDI number) at a dynamic."""

    key: int
    dynamic: str

    @property
    def name(self) -> str:
        """Scientific pitch name of the key, e.g. 'C4'."""
        return key_name(self.key)

    def file_name(self, take: int) -> str:
        """File of the ``take``-th take of this step, e.g. ``060-C4-mf-1.flac``."""
        return f"{self.key:03d}-{self.name}-{self.dynamic}-{take}.flac"

    def __str__(self) -> str:
        return f"{self.name} (key {self.key}) {self.dynamic}"


def parse_keys(text: str) -> list[int]:
    """Keys from ranges and lists, in the order given: ``"21-108"``, ``"60,64,67"``, ``"21-30,60"``.

    A range may run downwards (``"108-97"``). Each key may appear once.

    Raises
    ------
    ParameterError
        For an item that is not a key or a range, a key outside 21..108, or a repeat.
    """
    keys: list[int] = []
    for item in text.split(","):
        part = item.strip()
        low, sep, high = part.partition("-")
        try:
            first = int(low)
            last = int(high) if sep else first
        except ValueError:
            raise ParameterError(f"keys {text!r}: {part!r} is not a key number or a range like 21-108") from None
        for key in (first, last):
            if not LOWEST_KEY <= key <= HIGHEST_KEY:
                raise ParameterError(f"keys {text!r}: key {key} is outside {LOWEST_KEY}..{HIGHEST_KEY} "
                                     f"({key_name(LOWEST_KEY)}..{key_name(HIGHEST_KEY)})")
        step = 1 if last >= first else -1
        for key in range(first, last + step, step):
            if key in keys:
                raise ParameterError(f"keys {text!r}: key {key} is listed twice")
            keys.append(key)
    return keys


def parse_dynamics(text: str) -> list[str]:
    """Dynamic markings from a list such as ``"mf,ff"``, in the order given.

    Raises
    ------
    ParameterError
        For a marking not in :data:`DYNAMICS`, or a repeat.
    """
    dynamics: list[str] = []
    for item in text.split(","):
        mark = item.strip()
        if mark not in DYNAMICS:
            raise ParameterError(f"dynamics {text!r}: {mark!r} is not one of {', '.join(DYNAMICS)}")
        if mark in dynamics:
            raise ParameterError(f"dynamics {text!r}: {mark} is listed twice")
        dynamics.append(mark)
    return dynamics


def plan_steps(keys: Sequence[int], dynamics: Sequence[str]) -> list[Step]:
    """Every key at every dynamic, key by key (the hand stays on a key for its dynamics)."""
    return [Step(int(key), dynamic) for key in keys for dynamic in dynamics]


def capture_seconds(key: int) -> float:
    """Default capture length after the strike: 6 s at A0 to 3 s at C8, linear in key."""
    fraction = (key - LOWEST_KEY) / (HIGHEST_KEY - LOWEST_KEY)
    return BASS_CAPTURE_S + (TREBLE_CAPTURE_S - BASS_CAPTURE_S) * fraction


# --- strike detection ---------------------------------------------------------------------------

def _db(power: float) -> float:
    return 10.0 * math.log10(power) if power > 0 else -math.inf


class StrikeDetector:
    """Causal strike detector for live input (see the module notes for the rule).

    Parameters
    ----------
    sample_rate : int > 0
    hop_s : float > 0
        Hop of the energy measure (5 ms).
    window_hops : int > 0
        Hops averaged into the short-window level (2: 10 ms).
    rise_db : float > 0
        Rise of the short-window level over the background that is a strike (15 dB).
    floor_db : float
        Lowest background, in dB of mean square re full scale (-80 dB).
    holdoff_s : float >= 0
        Time after a strike during which no strike is detected (0.1 s).
    fall_s, climb_s : float > 0
        Time constants of the background for a falling and a rising level (20 ms, 2 s).
    """

    def __init__(self, sample_rate: int, *, hop_s: float = 0.005, window_hops: int = 2, rise_db: float = 15.0,
                 floor_db: float = -80.0, holdoff_s: float = 0.1, fall_s: float = 0.02,
                 climb_s: float = 2.0) -> None:
        for what, value in (("hop_s", hop_s), ("rise_db", rise_db), ("fall_s", fall_s), ("climb_s", climb_s)):
            if not (math.isfinite(value) and value > 0):
                raise ParameterError(f"strike detector: {what}={value!r} must be > 0")
        if not (math.isfinite(holdoff_s) and holdoff_s >= 0):
            raise ParameterError(f"strike detector: holdoff_s={holdoff_s!r} must be >= 0")
        if window_hops < 1:
            raise ParameterError(f"strike detector: window_hops={window_hops!r} must be >= 1")
        self.sample_rate = int(sample_rate)
        self.hop = max(1, round(hop_s * sample_rate))
        hop_time = self.hop / sample_rate
        self.rise = 10.0 ** (rise_db / 10.0)
        self.floor = 10.0 ** (floor_db / 10.0)
        self.holdoff_hops = math.ceil(holdoff_s / hop_time)
        self._fall = 1.0 - math.exp(-hop_time / fall_s)
        self._climb = 1.0 - math.exp(-hop_time / climb_s)
        self._window: collections.deque[float] = collections.deque(maxlen=window_hops)
        self._partial = np.zeros(0)
        #: Absolute frame of the first sample not yet in a full hop.
        self.position = 0
        self._background: float | None = None
        self._hold = 0

    @property
    def background_db(self) -> float:
        """Current background, dB of mean square re full scale (-inf before any input)."""
        return _db(self._background) if self._background is not None else -math.inf

    def skip(self, frames: int) -> None:
        """Input was lost: move on by ``frames`` and start the background afresh (no strike on the gap)."""
        self.position += self._partial.size + frames
        self._partial = np.zeros(0)
        self._window.clear()
        self._background = None

    def process(self, block: NDArray[np.floating]) -> list[tuple[int, float]]:
        """Feed a ``(channels, frames)`` block; returns the strikes found in it.

        Returns
        -------
        list of (int, float)
            ``(frame, background_db)`` per strike: the first frame of the hop in which the
            rise was seen (absolute, counting every frame fed or skipped), and the
            background level just before it.
        """
        energy = np.mean(np.square(block, dtype=np.float64), axis=0)
        if self._partial.size:
            energy = np.concatenate([self._partial, energy])
        full = energy.size // self.hop
        self._partial = energy[full * self.hop:]
        strikes = []
        for power in energy[:full * self.hop].reshape(full, self.hop).mean(axis=1).tolist():
            start = self.position
            self.position += self.hop
            self._window.append(power)
            level = sum(self._window) / len(self._window)
            background = self._background
            if background is None:
                self._background = level
            elif self._hold > 0:
                self._hold -= 1
                self._background = level
            elif level > self.rise * max(background, self.floor):
                strikes.append((start, _db(background)))
                self._hold = self.holdoff_hops
                self._background = level
            else:
                rate = self._fall if level < background else self._climb
                self._background = background + rate * (level - background)
        return strikes


# --- the index ------------------------------------------------------------------------------------

class TakeIndex:
    """``takes.json`` of a takes folder: one entry per saved take.

    Entries are dicts with ``key``, ``name``, ``dynamic``, ``take``, ``file`` (name in the
    folder), ``sample_rate``, ``channels``, ``frames``, ``duration_s``, ``strike_s`` (strike
    time in the file), ``peak_dbfs``, ``clipped_fraction``, ``background_db`` (RMS level
    before the strike, dB re full scale), ``input`` (device or replayed file),
    ``input_start_s`` (where the take begins in the input stream), ``recorded_at`` (ISO
    8601, UTC), ``truncated`` (the input ended before the full length) and ``adopted``
    (found in the folder, not recorded by a session: the fields a file cannot tell are null).

    Raises
    ------
    VoicerError
        When the index exists but is not a takes index; it is never overwritten then.
    """

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self.folder = Path(folder)
        self.path = self.folder / INDEX_NAME
        self.takes: list[dict[str, Any]] = []
        if self.path.exists():
            self._load()

    def _load(self) -> None:
        fix = "move it away to start a new index"
        try:
            data = json.loads(self.path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise VoicerError(f"{self.path}: cannot read the takes index ({exc}); {fix}") from exc
        if not isinstance(data, dict) or data.get("format") != INDEX_FORMAT or not isinstance(data.get("takes"), list):
            raise VoicerError(f"{self.path}: not a takes index of format {INDEX_FORMAT} "
                              f"(needs {{\"format\": {INDEX_FORMAT}, \"takes\": [...]}}); {fix}")
        for number, entry in enumerate(data["takes"], 1):
            ok = (isinstance(entry, dict) and isinstance(entry.get("key"), int)
                  and LOWEST_KEY <= entry["key"] <= HIGHEST_KEY and entry.get("dynamic") in DYNAMICS
                  and isinstance(entry.get("file"), str) and Path(entry["file"]).name == entry["file"])
            if not ok:
                raise VoicerError(f"{self.path}: take {number} needs a key {LOWEST_KEY}..{HIGHEST_KEY}, a dynamic "
                                  f"({', '.join(DYNAMICS)}) and a file name in the folder; got {entry!r}; {fix}")
        self.takes = data["takes"]

    @property
    def files(self) -> set[str]:
        """File names of the indexed takes."""
        return {entry["file"] for entry in self.takes}

    def done(self) -> set[tuple[int, str]]:
        """(key, dynamic) of every indexed take."""
        return {(entry["key"], entry["dynamic"]) for entry in self.takes}

    def save(self) -> None:
        """Rewrite the index atomically (the folder must exist)."""
        text = json.dumps({"format": INDEX_FORMAT, "takes": self.takes}, indent=1, allow_nan=False) + "\n"
        atomic_write_bytes(self.path, text.encode("utf-8"), backup=False)


# --- the session ---------------------------------------------------------------------------------

class AudioInput(Protocol):
    """What a session reads: :class:`voicer.io.capture.PortAudioInput` or ``FileInput``."""

    sample_rate: int
    channels: int

    @property
    def description(self) -> str: ...

    @property
    def finished(self) -> bool: ...

    @property
    def overflows(self) -> int: ...

    def open(self, buffer: CaptureBuffer) -> None: ...

    def close(self) -> None: ...


@dataclass(frozen=True)
class Prompt:
    """What the technician is asked: step ``index`` of ``total`` (1-based, over the whole plan)."""

    index: int
    total: int
    step: Step
    attempt: int = 1

    def __str__(self) -> str:
        again = f" (attempt {self.attempt})" if self.attempt > 1 else ""
        return f"step {self.index} of {self.total}: play {self.step}{again}"


@dataclass
class SessionResult:
    """What a session did.

    ``skipped`` steps were already indexed; ``saved`` holds this session's index entries;
    ``refused`` the strikes asked again, with the reason. ``stopped``: the stop event was
    set; ``input_ended``: a replayed file ran out before the plan was done.
    """

    total: int
    skipped: int
    saved: list[dict[str, Any]] = field(default_factory=list)
    refused: list[tuple[Step, str]] = field(default_factory=list)
    complete: bool = False
    stopped: bool = False
    input_ended: bool = False


class _Stopped(Exception):
    """The stop event was set."""


@dataclass
class _Capture:
    audio: NDArray[np.float32]
    start: int
    strike: int
    background_db: float
    truncated: bool


class _Stream:
    """The consumer's side of the input: a timeline of recent audio and the strikes found in it."""

    def __init__(self, source: AudioInput, buffer: CaptureBuffer, detector: StrikeDetector,
                 stop: threading.Event | None) -> None:
        self.source, self.buffer, self.detector, self.stop = source, buffer, detector, stop
        self.rate = source.sample_rate
        self._chunks: collections.deque[tuple[int, NDArray[np.float32]]] = collections.deque()
        self.end = 0  # absolute frame after the last one received
        self.cursor = 0  # strikes before this frame are used up
        self._strikes: collections.deque[tuple[int, float]] = collections.deque()
        self._gaps: list[tuple[int, int]] = []

    def _check_stop(self) -> None:
        if self.stop is not None and self.stop.is_set():
            raise _Stopped

    def pull(self) -> bool:
        """Take what input has arrived (waiting briefly if none); False once the input has ended."""
        self._check_stop()
        error = getattr(self.source, "error", None)
        if error is not None:
            raise error
        frames, lost = self.buffer.read()
        if lost:
            self._gaps.append((self.end, self.end + lost))
            self._chunks.append((self.end, np.zeros((self.buffer.channels, lost), dtype=np.float32)))
            self.end += lost
            self.detector.skip(lost)
        if frames.shape[1]:
            self._chunks.append((self.end, frames))
            self.end += frames.shape[1]
            self._strikes.extend(self.detector.process(frames))
            return True
        if self.source.finished and self.buffer.written == self.buffer.read_position:
            return False
        time.sleep(POLL_S)
        return True

    def _slice(self, start: int, stop: int) -> NDArray[np.float32]:
        parts = [chunk[:, max(start - at, 0):stop - at] for at, chunk in self._chunks
                 if at < stop and at + chunk.shape[1] > start]
        return np.concatenate(parts, axis=1) if parts else np.zeros((self.buffer.channels, 0), dtype=np.float32)

    def _trim(self, keep_from: int) -> None:
        while self._chunks and self._chunks[0][0] + self._chunks[0][1].shape[1] <= keep_from:
            self._chunks.popleft()
        self._gaps = [gap for gap in self._gaps if gap[1] > keep_from]

    def next_capture(self, *, pre_frames: int, frames: int) -> _Capture | str | None:
        """The next strike and the ``frames`` after it; a reason string if it must be played
        again; None if the input ended before a strike."""
        self._check_stop()  # strikes may be waiting already: stop before taking one
        while True:
            while self._strikes and self._strikes[0][0] < self.cursor:
                self._strikes.popleft()
            if self._strikes:
                break
            # Waiting: keep only what a strike still to be found could need before it (strikes
            # are found in the newest hop, far shorter than the pre-roll).
            self._trim(self.end - 2 * pre_frames)
            if not self.pull():
                return None
        strike, background_db = self._strikes.popleft()
        overflows = self.source.overflows
        end = strike + frames
        while self.end < end and self.pull():
            pass
        stop = min(end, self.end)
        if self._strikes and self._strikes[0][0] < stop:
            again, _ = self._strikes.popleft()
            self.cursor = again + 1
            self._trim(self.cursor - pre_frames)
            return (f"struck again {(again - strike) / self.rate:.2f} s after the strike; "
                    "let the note ring until the next prompt")
        start = max(strike - pre_frames, self._chunks[0][0] if self._chunks else 0)
        self.cursor = stop
        audio = self._slice(start, stop)
        lost = any(a < stop and b > start for a, b in self._gaps)
        self._trim(stop - pre_frames)
        if lost or self.source.overflows != overflows:
            return "input was lost during the take (the computer fell behind the audio device)"
        return _Capture(audio, start, strike, background_db, truncated=stop < end)


def _peak_dbfs(audio: NDArray[np.floating]) -> float:
    peak = float(np.max(np.abs(audio))) if audio.size else 0.0
    return 20.0 * math.log10(peak) if peak > 0 else -math.inf


def _now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


class GuidedSession:
    """A guided recording into one folder (see the module notes).

    Parameters
    ----------
    folder : str or PathLike
        Where the takes and ``takes.json`` go; created when the input opens. An existing
        index is resumed: its steps are skipped.
    steps : sequence of Step
        The plan (:func:`plan_steps`).
    seconds : float > 0, optional
        Capture length after the strike for every key (default: :func:`capture_seconds`).
    on_prompt : callable, optional
        Called with a :class:`Prompt` each time a step is asked for (again); an exception
        raised here ends the session, keeping what was saved.
    on_message : callable, optional
        Called with each line of news: saved, refused, adopted, missing.
    stop : threading.Event, optional
        Set it (from any thread) to end the session at the next read of the input.
    min_peak_dbfs, min_snr_db : float
        The "too soft" limits (:data:`MIN_PEAK_DBFS`, :data:`MIN_SNR_DB`).
    detector : dict, optional
        Keyword arguments of :class:`StrikeDetector`.

    Raises
    ------
    VoicerError
        If the folder is a file, or its index is not a takes index.
    ParameterError
        For an empty plan, a repeated step, or a capture length that is not > 0.
    """

    def __init__(self, folder: str | os.PathLike[str], steps: Sequence[Step], *, seconds: float | None = None,
                 on_prompt: Callable[[Prompt], None] | None = None, on_message: Callable[[str], None] | None = None,
                 stop: threading.Event | None = None, min_peak_dbfs: float = MIN_PEAK_DBFS,
                 min_snr_db: float = MIN_SNR_DB, detector: dict[str, Any] | None = None) -> None:
        self.folder = Path(folder)
        if self.folder.exists() and not self.folder.is_dir():
            raise VoicerError(f"{self.folder}: is not a folder; the takes need a folder of their own")
        if not steps:
            raise ParameterError("the plan has no steps: give at least one key and one dynamic")
        if len(set(steps)) != len(steps):
            raise ParameterError("the plan lists a step twice")
        if seconds is not None and not (math.isfinite(seconds) and seconds > 0):
            raise ParameterError(f"seconds={seconds!r} must be a finite number of seconds > 0")
        self.steps = list(steps)
        self.seconds = seconds
        self.on_prompt = on_prompt or (lambda prompt: None)
        self.on_message = on_message or (lambda text: None)
        self.stop = stop
        self.min_peak_dbfs = float(min_peak_dbfs)
        self.min_snr_db = float(min_snr_db)
        self.detector_options = dict(detector or {})
        self.index = TakeIndex(self.folder)
        self._notes: list[str] = []
        self._dirty = self._reconcile()

    # -- resuming

    def _reconcile(self) -> bool:
        """Drop entries whose file is gone; adopt take files the index does not list."""
        changed = False
        kept = []
        for entry in self.index.takes:
            if (self.folder / entry["file"]).is_file():
                kept.append(entry)
            else:
                self._notes.append(f"{INDEX_NAME} lists {entry['file']} but the file is gone: "
                                   f"{Step(entry['key'], entry['dynamic'])} is recorded again")
                changed = True
        self.index.takes = kept
        self._unusable: set[str] = set()
        if self.folder.is_dir():
            for path in sorted(self.folder.glob("*.flac")):
                match = _TAKE_FILE.match(path.name)
                if not match or path.name in self.index.files:
                    continue
                key = int(match[1])
                if not (LOWEST_KEY <= key <= HIGHEST_KEY and key_name(key) == match[2]):
                    continue
                entry = self._adopt(path, Step(key, match[3]), int(match[4]))
                if entry is not None:
                    self.index.takes.append(entry)
                    changed = True
        return changed

    def _adopt(self, path: Path, step: Step, take: int) -> dict[str, Any] | None:
        try:
            audio, rate = soundfile.read(str(path), dtype="float32", always_2d=True)
            clipped = check_signal(audio, rate, file=str(path))
        except (soundfile.LibsndfileError, RuntimeError, RecordingError) as exc:
            self._unusable.add(path.name)
            self._notes.append(f"left {path.name} alone: not a usable take ({exc})")
            return None
        self._notes.append(f"adopted {path.name} into {INDEX_NAME} (it was saved but not indexed)")
        recorded = datetime.fromtimestamp(path.stat().st_mtime, timezone.utc).isoformat(timespec="seconds")
        return self._entry(step, take, path.name, audio.T, int(rate), clipped=clipped, strike_s=None,
                           background_db=None, source=None, start_s=None, recorded_at=recorded,
                           truncated=False, adopted=True)

    @property
    def pending(self) -> list[tuple[int, Step]]:
        """(step number, step) of the steps not yet recorded, in plan order."""
        done = self.index.done()
        return [(i, step) for i, step in enumerate(self.steps, 1) if (step.key, step.dynamic) not in done]

    # -- running

    def run(self, source: AudioInput) -> SessionResult:
        """Record every pending step from ``source`` (opened and closed here).

        Returns when the plan is done, the stop event is set, or a replayed file ends;
        exceptions (KeyboardInterrupt, one from ``on_prompt``) propagate after the input is
        closed. Either way every take saved so far is on disk and in the index.
        """
        pending = self.pending
        result = SessionResult(total=len(self.steps), skipped=len(self.steps) - len(pending))
        if not pending:
            self._tell_notes()
            if self._dirty and self.folder.is_dir():
                self._save_index()
            self.on_message(f"all {len(self.steps)} steps are recorded in {self.folder} already")
            result.complete = True
            return result
        detector = StrikeDetector(source.sample_rate, **self.detector_options)
        buffer = CaptureBuffer(source.channels, max(round(BUFFER_S * source.sample_rate), 4 * 8192))
        source.open(buffer)  # first: a missing device fails before anything is said or written
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            self._tell_notes()
            self.on_message(f"recording {len(pending)} of {len(self.steps)} steps into {self.folder} from "
                            f"{source.description} at {source.sample_rate} Hz, {source.channels} channel"
                            f"{'s' if source.channels > 1 else ''}"
                            + (f" ({result.skipped} recorded already)" if result.skipped else ""))
            stream = _Stream(source, buffer, detector, self.stop)
            for index, step in pending:
                if not self._record_step(stream, source, Prompt(index, len(self.steps), step), result):
                    result.input_ended = True
                    return result
            result.complete = True
        except _Stopped:
            result.stopped = True
        finally:
            source.close()
            if self._dirty:
                self._save_index()
        return result

    def _tell_notes(self) -> None:
        for note in self._notes:
            self.on_message(note)
        self._notes = []

    def _record_step(self, stream: _Stream, source: AudioInput, prompt: Prompt, result: SessionResult) -> bool:
        step = prompt.step
        rate = source.sample_rate
        seconds = self.seconds if self.seconds is not None else capture_seconds(step.key)
        while True:
            self.on_prompt(prompt)
            capture = stream.next_capture(pre_frames=round(PRE_ROLL_S * rate), frames=round(seconds * rate))
            if capture is None:
                return False
            if isinstance(capture, str):
                reason = capture
                clipped = 0.0
            else:
                reason, clipped = self._check(capture, source)
            if reason is None:
                assert isinstance(capture, _Capture)
                entry = self._save(step, capture, source, clipped)
                result.saved.append(entry)
                self.on_message(f"saved {entry['file']}: peak {entry['peak_dbfs']:.1f} dBFS, "
                                f"{entry['duration_s']:.1f} s" + (" (the input ended early)" if capture.truncated
                                                                   else ""))
                return True
            result.refused.append((step, reason))
            self.on_message(f"refused {step}: {reason}")
            prompt = Prompt(prompt.index, prompt.total, step, prompt.attempt + 1)

    def _check(self, capture: _Capture, source: AudioInput) -> tuple[str | None, float]:
        rate = source.sample_rate
        try:
            clipped = check_signal(capture.audio.T, rate, file=source.description, start_s=capture.start / rate)
        except RecordingError as exc:
            return str(exc), 0.0
        peak = _peak_dbfs(capture.audio)
        if peak < self.min_peak_dbfs:
            return (f"too soft: peak {peak:.1f} dBFS, needs {self.min_peak_dbfs:.0f} dBFS or more "
                    "(strike harder or raise the input gain)"), clipped
        if peak - capture.background_db < self.min_snr_db:
            return (f"too soft: peak {peak:.1f} dBFS is only {peak - capture.background_db:.1f} dB above the "
                    f"background noise, needs {self.min_snr_db:.0f} dB"), clipped
        return None, clipped

    def _save(self, step: Step, capture: _Capture, source: AudioInput, clipped: float) -> dict[str, Any]:
        taken = self.index.files | self._unusable
        take = 1
        while step.file_name(take) in taken or (self.folder / step.file_name(take)).exists():
            take += 1
        path = self.folder / step.file_name(take)
        rate = source.sample_rate
        data = io.BytesIO()
        # Full scale at most: libsndfile does not clip floats when it converts them to integers.
        soundfile.write(data, np.clip(capture.audio.T, -1.0, 1.0), rate, subtype=TAKE_SUBTYPE, format="FLAC")
        if path.exists():  # nothing is ever written over a take
            raise VoicerError(f"{path}: exists already; not overwritten")
        atomic_write_bytes(path, data.getvalue(), backup=False)
        entry = self._entry(step, take, path.name, capture.audio, rate, clipped=clipped,
                            strike_s=(capture.strike - capture.start) / rate, background_db=capture.background_db,
                            source=source.description, start_s=capture.start / rate, recorded_at=_now_iso(),
                            truncated=capture.truncated, adopted=False)
        self.index.takes.append(entry)
        self._dirty = True
        self._save_index()
        return entry

    def _save_index(self) -> None:
        self.index.save()
        self._dirty = False

    @staticmethod
    def _entry(step: Step, take: int, file: str, audio: NDArray[np.floating], rate: int, *, clipped: float,
               strike_s: float | None, background_db: float | None, source: str | None, start_s: float | None,
               recorded_at: str, truncated: bool, adopted: bool) -> dict[str, Any]:
        peak = _peak_dbfs(audio)
        finite = background_db is not None and math.isfinite(background_db)
        return {
            "key": step.key, "name": step.name, "dynamic": step.dynamic, "take": take, "file": file,
            "sample_rate": rate, "channels": int(audio.shape[0]), "frames": int(audio.shape[1]),
            "duration_s": audio.shape[1] / rate, "strike_s": strike_s,
            "peak_dbfs": round(peak, 3) if math.isfinite(peak) else None,
            "clipped_fraction": float(clipped),
            "background_db": round(background_db, 2) if finite else None,
            "input": source, "input_start_s": start_s, "recorded_at": recorded_at,
            "truncated": truncated, "adopted": adopted,
        }
