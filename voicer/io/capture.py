"""Audio input: a PortAudio input device through sounddevice, or a file replayed as if it were one.

Both sources deliver float32 blocks to the same callback, an :class:`InputGuard`, from
their own thread (PortAudio's for a device, a feeder thread for a file), and the guard
hands each block as a ``(channels, frames)`` view to a :class:`CaptureBuffer`: a
preallocated ring that the consumer (e.g. :mod:`voicer.analysis.guided`) drains from
its own thread. A test, or a technician splitting a long take, therefore goes through
the very path a microphone does.

Callback rules (as for output, see :mod:`voicer.io.sinks`): the guard and the ring
allocate no arrays, do no I/O, take no lock and never raise. Frames the consumer did not
read in time are overwritten, counted, and reported by :meth:`CaptureBuffer.read`.

sounddevice is imported only when a device is used, so replaying a file works on
machines without PortAudio.
"""

from __future__ import annotations

__all__ = [
    "CaptureBuffer",
    "InputGuard",
    "PortAudioInput",
    "FileInput",
    "DEFAULT_INPUT_BLOCK",
    "list_input_devices",
    "format_input_devices",
    "resolve_input_device",
]

import math
import os
import threading
import time
from pathlib import Path
from types import ModuleType
from typing import Any, NamedTuple

import numpy as np
import soundfile
from numpy.typing import NDArray

from ..errors import ParameterError, RecordingError, VoicerError
from .devices import format_device_table, import_sounddevice, list_devices, resolve_device

#: Frames per callback of both sources (21 ms at 48 kHz).
DEFAULT_INPUT_BLOCK = 1024

_DEVICE_HELP = "choose one with --device (index or part of its name), or replay a recording with --input-file"
_LATENCIES = ("high", "low")


def _positive_int(owner: str, field: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ParameterError(f"{owner}: {field}={value!r} must be a positive integer")
    return int(value)


class CaptureBuffer:
    """A ring of the most recent input frames: one producer thread writes, one consumer reads.

    Parameters
    ----------
    channels : int > 0
        Rows of every block.
    capacity_frames : int > 0
        Frames kept; the consumer must read more often than this span of audio, or the
        oldest unread frames are overwritten (and reported as lost).

    Notes
    -----
    Positions are counted in frames since the buffer was made. The producer writes the
    samples first and then advances :attr:`written`, so the consumer never reads frames
    that are not there yet. A block being written while the consumer copies may already
    overwrite the oldest unread frames; the consumer treats as lost every frame within
    one block (the largest seen) of being overwritten.
    """

    def __init__(self, channels: int, capacity_frames: int) -> None:
        self.channels = _positive_int("capture buffer", "channels", channels)
        self.capacity = _positive_int("capture buffer", "capacity_frames", capacity_frames)
        self._data = np.zeros((self.channels, self.capacity), dtype=np.float32)
        #: Frames written since the buffer was made.
        self.written = 0
        #: Frames handed out by :meth:`read` (or skipped as lost).
        self.read_position = 0
        #: Writes that overwrote frames the consumer had not read.
        self.overruns = 0
        self._max_block = 0

    @property
    def free_frames(self) -> int:
        """Frames that can be written without overwriting unread ones."""
        return max(self.capacity - (self.written - self.read_position) - self._max_block, 0)

    def write(self, block: NDArray[np.float32]) -> None:
        """Copy a ``(channels, frames)`` block in (the producer's side; no allocation)."""
        n = block.shape[1]
        if n > self.capacity:  # only the newest frames fit
            block = block[:, n - self.capacity:]
            self.written += n - self.capacity
            n = self.capacity
        if n > self._max_block:
            self._max_block = n
        if self.written + n - self.read_position > self.capacity:
            self.overruns += 1
        pos = self.written % self.capacity
        first = min(n, self.capacity - pos)
        self._data[:, pos:pos + first] = block[:, :first]
        if first < n:
            self._data[:, :n - first] = block[:, first:]
        self.written += n  # last: the frames are in place before the consumer may read them

    def read(self) -> tuple[NDArray[np.float32], int]:
        """Every frame written since the last read (the consumer's side).

        Returns
        -------
        frames : ndarray, float32, shape (channels, n)
            A copy of the unread frames, oldest first.
        lost : int
            Frames overwritten before they could be read; they preceded ``frames``.
        """
        end = self.written
        start = self.read_position
        lost = max(end - start - (self.capacity - self._max_block), 0)
        start += lost
        out = np.empty((self.channels, end - start), dtype=np.float32)
        pos, n = start % self.capacity, end - start
        first = min(n, self.capacity - pos)
        out[:, :first] = self._data[:, pos:pos + first]
        out[:, first:] = self._data[:, :n - first]
        # Frames the producer overwrote while they were being copied are lost too.
        late = max(self.written + self._max_block - self.capacity - start, 0)
        if late:
            out = out[:, min(late, n):]
            lost += min(late, n)
        self.read_position = end
        return out, lost


class _Flags(NamedTuple):
    """The part of sounddevice's ``CallbackFlags`` that :class:`InputGuard` reads."""

    input_overflow: bool = False


_NO_FLAGS = _Flags()


class InputGuard:
    """The input stream callback: hands ``indata.T`` to a :class:`CaptureBuffer`; never raises.

    Attributes
    ----------
    callbacks : int
        Calls so far.
    overflows : int
        Calls that PortAudio flagged ``input_overflow``: the device dropped input because
        the callback came too late.
    faults : int
        Calls whose block could not be stored; ``last_error`` keeps the exception.
    """

    def __init__(self, buffer: CaptureBuffer) -> None:
        self.buffer = buffer
        self.callbacks = 0
        self.overflows = 0
        self.faults = 0
        self.last_error: BaseException | None = None

    def __call__(self, indata: NDArray[np.float32], frames: int, time_info: Any, status: Any) -> None:
        """Store ``indata`` (frames, channels); the signature of a sounddevice callback."""
        self.callbacks += 1
        if status.input_overflow:
            self.overflows += 1
        try:
            self.buffer.write(indata.T)
        except BaseException as exc:  # anything escaping would reach PortAudio's thread
            self.faults += 1
            self.last_error = exc


def _import_sounddevice() -> ModuleType:
    return import_sounddevice("recording from a device needs", "--input-file replays a recording without it")


class PortAudioInput:
    """Records from a PortAudio input device through a sounddevice callback stream.

    Parameters
    ----------
    device : int or str, optional
        Device index or (part of) its name, as listed by :func:`list_input_devices`;
        default: PortAudio's default input device.
    sample_rate : int > 0
        Frames per second asked of the device.
    channels : int > 0
        Input channels recorded (1: mono, as a measurement microphone gives).
    block : int > 0
        Frames per callback.
    latency : {'high', 'low'} or float > 0
        Input latency: PortAudio's safe or low default for the device, or seconds. High
        is right for recording: nothing waits for the input.

    Raises
    ------
    ParameterError
        If a number is not a positive integer or ``latency`` is not allowed.
    """

    name = "portaudio-input"
    realtime = True

    def __init__(self, device: int | str | None = None, *, sample_rate: int, channels: int = 1,
                 block: int = DEFAULT_INPUT_BLOCK, latency: str | float = "high") -> None:
        self.sample_rate = _positive_int(self.name, "sample_rate", sample_rate)
        self.channels = _positive_int(self.name, "channels", channels)
        self.block = _positive_int(self.name, "block", block)
        if not (latency in _LATENCIES or (isinstance(latency, (int, float)) and not isinstance(latency, bool)
                                          and math.isfinite(latency) and latency > 0)):
            raise ParameterError(f"{self.name}: latency={latency!r} must be 'high', 'low' or seconds > 0")
        self.device = device
        self.latency = latency
        #: Name of the opened device (None before ``open``).
        self.device_name: str | None = None
        #: The callback of the open stream (None before ``open``).
        self.guard: InputGuard | None = None
        self._stream: Any = None

    @property
    def description(self) -> str:
        """What the input is, for messages: the device's name."""
        name = self.device_name or ("default input" if self.device is None else str(self.device))
        return f"input device {name!r}"

    @property
    def finished(self) -> bool:
        """A device never runs out of input."""
        return False

    @property
    def overflows(self) -> int:
        """Blocks PortAudio flagged as dropped input (see :class:`InputGuard`)."""
        return self.guard.overflows if self.guard else 0

    def open(self, buffer: CaptureBuffer) -> None:
        """Open the device and start storing its input in ``buffer`` from PortAudio's thread.

        Raises
        ------
        ParameterError
            If ``buffer`` has another channel count, or the device fewer input channels.
        VoicerError
            If PortAudio is missing, the device does not exist, or PortAudio refuses the
            stream (the message names the device and the settings).
        """
        if buffer.channels != self.channels:
            raise ParameterError(f"{self.name}: the buffer has {buffer.channels} channels, the input {self.channels}")
        if self._stream is not None:
            raise VoicerError(f"{self.name} is already open")
        sd = _import_sounddevice()
        index = resolve_input_device(self.device)
        info = sd.query_devices(index)
        if self.channels > info["max_input_channels"]:
            raise ParameterError(f"audio input device {info['name']!r} has {info['max_input_channels']} "
                                 f"input channels; channels={self.channels} asked for")
        guard = InputGuard(buffer)
        try:
            stream = sd.InputStream(samplerate=self.sample_rate, blocksize=self.block, device=index,
                                    channels=self.channels, dtype="float32", latency=self.latency, callback=guard)
        except sd.PortAudioError as exc:
            raise VoicerError(f"cannot open audio input device {info['name']!r} at {self.sample_rate} Hz, "
                              f"{self.channels} channels, block {self.block}: {exc}") from exc
        try:
            stream.start()
        except sd.PortAudioError as exc:
            stream.close(ignore_errors=True)
            raise VoicerError(f"cannot start audio input device {info['name']!r}: {exc}") from exc
        self._stream, self.guard, self.device_name = stream, guard, info["name"]

    def close(self) -> None:
        """Stop recording and release the device; safe to call twice."""
        stream, self._stream = self._stream, None
        if stream is not None:
            stream.abort()  # input still queued is not wanted: the session has ended
            stream.close()


class FileInput:
    """Replays an audio file as if it came from an input device, block by block.

    A feeder thread reads the file with soundfile and calls an :class:`InputGuard` with
    each block, as PortAudio would; in real time the blocks are paced by the clock (a
    block is delivered once its last frame "has been recorded"), otherwise as fast as
    the consumer frees room in the buffer (nothing is dropped).

    Parameters
    ----------
    path : str or PathLike
        Any file libsndfile reads (WAV, FLAC, Ogg, MP3...). It plays at its own sample
        rate with all its channels.
    block : int > 0
        Frames per delivered block.
    realtime : bool
        Pace the blocks by the clock (True) or deliver them as fast as possible.

    Raises
    ------
    RecordingError
        If the file is missing or is not audio libsndfile can read; the message names it.
    """

    name = "file-input"

    def __init__(self, path: str | os.PathLike[str], *, block: int = DEFAULT_INPUT_BLOCK, realtime: bool = True) -> None:
        self.path = Path(path)
        self.block = _positive_int(self.name, "block", block)
        self.realtime = bool(realtime)
        if not self.path.is_file():
            raise RecordingError("no such audio file" if not self.path.exists() else "is not a file",
                                 file=str(self.path))
        try:
            info = soundfile.info(str(self.path))
        except (soundfile.LibsndfileError, RuntimeError) as exc:
            raise RecordingError(f"cannot read it as audio: {exc}", file=str(self.path)) from exc
        self.sample_rate = int(info.samplerate)
        self.channels = int(info.channels)
        #: Length of the file in frames.
        self.frames = int(info.frames)
        #: The callback the feeder calls (None before ``open``).
        self.guard: InputGuard | None = None
        #: What stopped the feeder early, if anything (re-raised by the consumer).
        self.error: BaseException | None = None
        self._done = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    @property
    def description(self) -> str:
        """What the input is, for messages: the file."""
        return str(self.path)

    @property
    def finished(self) -> bool:
        """True once the last block has been delivered (or the feeder failed, see :attr:`error`)."""
        return self._done.is_set()

    @property
    def overflows(self) -> int:
        """A file never drops input."""
        return 0

    def open(self, buffer: CaptureBuffer) -> None:
        """Start the feeder thread, storing the file's blocks in ``buffer``.

        Raises
        ------
        ParameterError
            If ``buffer`` has another channel count than the file, or is smaller than two
            blocks (the fast feeder would wait for room forever).
        """
        if buffer.channels != self.channels:
            raise ParameterError(f"{self.path}: the buffer has {buffer.channels} channels, the file {self.channels}")
        if buffer.capacity < 2 * self.block:
            raise ParameterError(f"{self.name}: the buffer ({buffer.capacity} frames) must hold two blocks "
                                 f"({2 * self.block} frames)")
        if self._thread is not None:
            raise VoicerError(f"{self.path}: already open")
        self.guard = InputGuard(buffer)
        self._thread = threading.Thread(target=self._feed, args=(buffer, self.guard), name="voicer-file-input",
                                        daemon=True)
        self._thread.start()

    def _feed(self, buffer: CaptureBuffer, guard: InputGuard) -> None:
        chunk = np.empty((self.block, self.channels), dtype=np.float32)
        sent = 0
        start = time.perf_counter()
        try:
            with soundfile.SoundFile(str(self.path)) as f:
                while not self._stop.is_set():
                    frames = f.read(self.block, dtype="float32", always_2d=True, out=chunk)
                    n = len(frames)
                    if n == 0:
                        break
                    if self.realtime:
                        due = start + (sent + n) / self.sample_rate
                        while not self._stop.is_set() and time.perf_counter() < due:
                            self._stop.wait(min(due - time.perf_counter(), 0.01))
                    else:
                        while not self._stop.is_set() and buffer.free_frames < n:
                            self._stop.wait(0.001)
                    if self._stop.is_set():
                        break
                    guard(frames, n, None, _NO_FLAGS)
                    sent += n
        except (soundfile.LibsndfileError, RuntimeError, OSError) as exc:
            self.error = RecordingError(f"reading failed: {exc}", file=str(self.path),
                                        time_s=sent / self.sample_rate)
        finally:
            self._done.set()

    def close(self) -> None:
        """Stop the feeder; safe to call twice."""
        self._stop.set()
        thread, self._thread = self._thread, None
        if thread is not None:
            thread.join()


def list_input_devices() -> list[dict[str, Any]]:
    """The PortAudio devices that can record.

    Returns
    -------
    list of dict
        One per device, with ``index`` (int), ``name``, ``hostapi`` (e.g. ALSA),
        ``channels`` (maximum input channels), ``default_samplerate_hz`` and
        ``default`` (True for the default input device).

    Raises
    ------
    VoicerError
        If PortAudio is missing (saying which Debian package to install).
    """
    return list_devices(_import_sounddevice(), "input")


def format_input_devices(devices: list[dict[str, Any]]) -> str:
    """A table of the result of :func:`list_input_devices`."""
    return format_device_table(devices, "input", none_found="no audio input devices found (PortAudio sees none); "
                                                           "--input-file replays a recording without one")


def resolve_input_device(spec: int | str | None) -> int:
    """PortAudio index of an input device.

    Parameters
    ----------
    spec : int, str or None
        A device index (an int or a string of digits), a name or space-separated parts of
        it (case-insensitive, as sounddevice matches them), or None for the default
        input device.

    Raises
    ------
    VoicerError
        If PortAudio is missing, there is no input device at all, or ``spec`` matches
        none or several; the message names the device and lists the available ones.
    """
    sd = _import_sounddevice()
    return resolve_device(sd, list_input_devices(), spec, "input", help=_DEVICE_HELP)
