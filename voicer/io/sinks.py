"""Audio sinks: where rendered audio goes (nowhere, a WAV/FLAC file, or a PortAudio device).

Every sink follows the :class:`voicer.engine.host.Sink` protocol. Blocks are float32
arrays of shape ``(channels, frames)``. Files go through soundfile (libsndfile), live
audio through sounddevice (PortAudio); sounddevice is imported only when a device is
used, so rendering to a file works on machines without PortAudio.

Nothing unsafe reaches a file or a speaker: NaN and inf samples are written as zeros,
and a live block whose callback failed is replaced by silence.
"""

from __future__ import annotations

__all__ = [
    "NullSink",
    "FileSink",
    "PortAudioSink",
    "GuardedCallback",
    "FILE_FORMATS",
    "DEFAULT_SUBTYPE",
    "LOAD_TIME_CONSTANT_S",
    "MIN_LATENCY_BLOCKS",
    "list_output_devices",
    "format_devices",
    "resolve_output_device",
]

import math
import os
import tempfile
import time
from pathlib import Path
from types import ModuleType, TracebackType
from typing import Any

import numpy as np
import soundfile
from numpy.typing import NDArray

from ..engine.host import BlockCallback
from ..errors import ParameterError, VoicerError
from .devices import format_device_table, import_sounddevice, list_devices, resolve_device

#: File extensions a :class:`FileSink` accepts, and the soundfile format of each.
FILE_FORMATS: dict[str, str] = {".wav": "WAV", ".flac": "FLAC"}
#: Sample encoding of files unless another is asked for.
DEFAULT_SUBTYPE = "PCM_24"
#: Time constant of the smoothed callback load of :class:`GuardedCallback`.
LOAD_TIME_CONSTANT_S = 1.0
#: A live stream asks for at least this many blocks of output latency, whatever the
#: ``latency`` option: a block that comes a little late then still meets the device
#: (issue 4: "default to 256 with at least two periods of output latency").
MIN_LATENCY_BLOCKS = 2

_DEVICE_HELP = "list the devices with `voicer devices`, or render to a file with `voicer render`"
_LATENCIES = ("high", "low")


def _check_stream_format(sink: str, sample_rate: int, channels: int, block: int) -> None:
    for field, value in (("sample_rate", sample_rate), ("channels", channels), ("block", block)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise ParameterError(f"{sink} sink: {field}={value!r} must be a positive integer")


def _check_block(sink: str, block: Any, channels: int) -> None:
    if not (isinstance(block, np.ndarray) and block.dtype == np.float32 and block.ndim == 2
            and block.shape[0] == channels):
        got = f"{block.dtype} array of shape {block.shape}" if isinstance(block, np.ndarray) else type(block).__name__
        raise ParameterError(f"{sink} sink: a block must be a float32 array of shape "
                             f"(channels={channels}, frames); got {got}")


class _BlockSink:
    """Shared part of the sinks that take blocks through ``write``.

    ``write`` checks the block and counts its frames; subclasses implement ``_open``,
    ``_write``, ``_close`` and ``_abort``. Used as a context manager, the sink is closed
    on a normal exit and aborted when an exception leaves the ``with`` block.
    """

    name: str
    realtime = False

    def __init__(self) -> None:
        self._channels: int | None = None
        #: Frames taken by ``write`` since the last ``open``.
        self.frames_written = 0

    def open(self, *, sample_rate: int, channels: int, block: int, callback: BlockCallback | None = None) -> None:
        """Get ready to take blocks of ``channels`` rows at ``sample_rate``.

        Raises
        ------
        ParameterError
            If a number is not a positive integer or a callback is given (this sink takes
            blocks through ``write``).
        VoicerError
            If the sink is already open, or (file sink) the file cannot be created.
        """
        if callback is not None:
            raise ParameterError(f"{self.name} sink takes blocks through write(); callback must be None")
        _check_stream_format(self.name, sample_rate, channels, block)
        if self._channels is not None:
            raise VoicerError(f"{self.name} sink is already open")
        self._open(int(sample_rate), int(channels))
        self._channels = int(channels)
        self.frames_written = 0

    def write(self, block: NDArray[np.float32]) -> None:
        """Take one float32 block of shape (channels, frames).

        Any error aborts the sink: a file sink then leaves its target as it was.

        Raises
        ------
        ParameterError
            If the block has the wrong type or shape.
        VoicerError
            If the sink is not open or (file sink) writing failed.
        """
        if self._channels is None:
            raise VoicerError(f"{self.name} sink is not open")
        try:
            _check_block(self.name, block, self._channels)
            self._write(block)
        except BaseException:
            self.abort()  # a render that went wrong takes no more blocks and replaces no file
            raise
        self.frames_written += block.shape[1]

    def close(self) -> None:
        """Finish (a file sink puts its file in place); safe to call twice."""
        if self._channels is not None:
            self._channels = None
            self._close()

    def abort(self) -> None:
        """Stop without finishing (a file sink leaves any existing file untouched); safe to call twice."""
        if self._channels is not None:
            self._channels = None
            self._abort()

    def __enter__(self) -> "_BlockSink":
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()

    def _open(self, sample_rate: int, channels: int) -> None:
        pass

    def _write(self, block: NDArray[np.float32]) -> None:
        pass

    def _close(self) -> None:
        pass

    def _abort(self) -> None:
        self._close()


class NullSink(_BlockSink):
    """Discards every block, counting the frames (``frames_written``); for tests and timing."""

    name = "null"


class FileSink(_BlockSink):
    """Writes a WAV or FLAC file through soundfile, atomically.

    Blocks go to a temporary file in the target's folder; ``close`` flushes it to disk
    and renames it over ``path``, ``abort`` (or an exception leaving a ``with`` block)
    deletes it. Until then an existing file at ``path`` is untouched. NaN and inf
    samples are written as zeros (libsndfile would write them at full scale) and counted
    in ``samples_zeroed``.

    Parameters
    ----------
    path : str or PathLike
        Target file; its extension (``.wav`` or ``.flac``) chooses the format.
    subtype : str, optional
        soundfile subtype (sample encoding), default ``PCM_24``; must suit the format
        (``soundfile.available_subtypes``).

    Raises
    ------
    ParameterError
        If the extension or the subtype is not allowed; the message names the file and
        the allowed values.
    """

    name = "file"

    def __init__(self, path: str | os.PathLike[str], *, subtype: str | None = None) -> None:
        super().__init__()
        self.path = Path(path)
        self.format = FILE_FORMATS.get(self.path.suffix.lower(), "")
        if not self.format:
            raise ParameterError(f"{self.path}: cannot write audio with extension {self.path.suffix!r}; "
                                 f"allowed: {', '.join(FILE_FORMATS)}")
        self.subtype = DEFAULT_SUBTYPE if subtype is None else subtype
        if not soundfile.check_format(self.format, self.subtype):
            allowed = ", ".join(soundfile.available_subtypes(self.format))
            raise ParameterError(f"{self.path}: subtype {self.subtype!r} is not available for {self.format}; "
                                 f"allowed: {allowed}")
        #: Non-finite samples written as zeros since the last ``open``.
        self.samples_zeroed = 0
        self._fd = -1
        self._tmp: Path | None = None
        self._file: soundfile.SoundFile | None = None

    def _open(self, sample_rate: int, channels: int) -> None:
        folder = self.path.parent
        if not folder.is_dir():
            problem = "is not a folder" if folder.exists() else "does not exist"
            raise VoicerError(f"{self.path}: cannot write: {folder} {problem}")
        try:
            fd, tmp_name = tempfile.mkstemp(prefix=f".{self.path.name}.", suffix=".tmp", dir=folder)
        except OSError as exc:
            raise VoicerError(f"{self.path}: cannot write in folder {folder}: {exc.strerror}") from exc
        self._fd, self._tmp = fd, Path(tmp_name)
        try:
            # closefd=False: the descriptor stays ours, to fsync it after libsndfile has finished.
            self._file = soundfile.SoundFile(fd, "w", samplerate=sample_rate, channels=channels,
                                             subtype=self.subtype, format=self.format, closefd=False)
        except BaseException:
            self._discard()
            raise
        self.samples_zeroed = 0

    def _write(self, block: NDArray[np.float32]) -> None:
        assert self._file is not None
        finite = np.isfinite(block)
        if not finite.all():
            self.samples_zeroed += int(block.size - np.count_nonzero(finite))
            block = np.where(finite, block, np.float32(0.0))
        try:
            self._file.write(block.T)
        except (OSError, soundfile.SoundFileError) as exc:
            raise VoicerError(f"{self.path}: writing failed, the file was not changed: {exc}") from exc

    def _close(self) -> None:
        assert self._file is not None and self._tmp is not None
        try:
            self._file.close()
            os.fsync(self._fd)
            # mkstemp makes the file private; give it the mode a plain save would have.
            self._tmp.chmod(self.path.stat().st_mode & 0o777 if self.path.exists() else 0o644)
            os.replace(self._tmp, self.path)
        except BaseException as exc:
            self._discard()
            if isinstance(exc, (OSError, soundfile.SoundFileError)):
                raise VoicerError(f"{self.path}: cannot finish writing, the file was not changed: {exc}") from exc
            raise
        os.close(self._fd)
        self._fd, self._tmp, self._file = -1, None, None

    def _abort(self) -> None:
        self._discard()

    def _discard(self) -> None:
        """Drop the temporary file; the target stays as it was."""
        if self._file is not None:
            try:
                self._file.close()
            except (OSError, soundfile.SoundFileError):
                pass  # the half-written file is deleted below anyway
        if self._fd >= 0:
            os.close(self._fd)
        if self._tmp is not None:
            self._tmp.unlink(missing_ok=True)
        self._fd, self._tmp, self._file = -1, None, None


class GuardedCallback:
    """The PortAudio stream callback around a :data:`BlockCallback`; it never raises.

    Each call hands ``outdata.T`` (a (channels, frames) view of PortAudio's buffer, no
    copy) to ``callback``. If the callback raises, or leaves a non-finite sum in the
    block (NaN, inf, or magnitudes so large that they overflow), the block is replaced
    by silence and counted in ``faults``; the exception is kept in ``last_error``.
    Nothing here allocates arrays, does I/O or blocks.

    Attributes
    ----------
    callbacks : int
        Calls so far.
    late_blocks : int
        Calls that PortAudio flagged ``output_underflow``: a block came too late and the
        device played a gap.
    faults : int
        Blocks replaced by silence.
    load : float
        Fraction of the block period spent in the callback (``time.perf_counter``),
        smoothed exponentially with a time constant of :data:`LOAD_TIME_CONSTANT_S` of
        audio; above 1 the callback cannot keep up.
    peak_load : float
        Largest load of a single call.
    last_error : BaseException or None
        The last exception raised by ``callback``.
    """

    def __init__(self, callback: BlockCallback, *, sample_rate: int, block: int) -> None:
        self.callback = callback
        self.sample_rate = float(sample_rate)
        self.callbacks = 0
        self.late_blocks = 0
        self.faults = 0
        self.load = 0.0
        self.peak_load = 0.0
        self.last_error: BaseException | None = None
        self._smoothing = 1.0 - math.exp(-block / sample_rate / LOAD_TIME_CONSTANT_S)

    def __call__(self, outdata: NDArray[np.float32], frames: int, time_info: Any, status: Any) -> None:
        """Fill ``outdata`` (frames, channels); the signature of a sounddevice callback."""
        start = time.perf_counter()
        self.callbacks += 1
        if status.output_underflow:
            self.late_blocks += 1
        block = outdata.T
        try:
            self.callback(block)
            # One scalar sum finds any NaN or inf without allocating a mask.
            if not math.isfinite(block.sum()):
                block.fill(0.0)
                self.faults += 1
        except BaseException as exc:  # anything escaping would reach PortAudio's thread
            block.fill(0.0)
            self.faults += 1
            self.last_error = exc
        load = (time.perf_counter() - start) * self.sample_rate / frames
        self.load += self._smoothing * (load - self.load)
        if load > self.peak_load:
            self.peak_load = load


def _import_sounddevice() -> ModuleType:
    return import_sounddevice("live audio needs", "`voicer render` writes audio files without it")


class PortAudioSink:
    """Plays blocks live on a PortAudio output device through a sounddevice callback stream.

    The stream is float32 with ``block`` frames per callback; ``callback`` is wrapped in
    a :class:`GuardedCallback`, whose counters the sink exposes (zero before ``open``,
    kept after ``close``).

    Parameters
    ----------
    device : int or str, optional
        Device index or (part of) its name, as listed by :func:`list_output_devices`;
        default: PortAudio's default output device.
    latency : {'high', 'low'} or float > 0
        Output latency: PortAudio's safe or low default for the device, or seconds;
        never less than :data:`MIN_LATENCY_BLOCKS` blocks (``open`` raises it to that).

    Raises
    ------
    ParameterError
        If ``latency`` is not one of the allowed values.
    """

    name = "portaudio"
    realtime = True

    def __init__(self, device: int | str | None = None, *, latency: str | float = "high") -> None:
        if not (latency in _LATENCIES or (isinstance(latency, (int, float)) and not isinstance(latency, bool)
                                          and math.isfinite(latency) and latency > 0)):
            raise ParameterError(f"portaudio sink: latency={latency!r} must be 'high', 'low' or seconds > 0")
        self.device = device
        self.latency = latency
        #: Name of the opened device (None before ``open``).
        self.device_name: str | None = None
        #: Output latency of the open stream as PortAudio reports it, seconds (None before ``open``).
        self.latency_s: float | None = None
        self._stream: Any = None
        self._guard: GuardedCallback | None = None

    def open(self, *, sample_rate: int, channels: int, block: int, callback: BlockCallback | None = None) -> None:
        """Open the device and start calling ``callback`` from PortAudio's thread.

        Raises
        ------
        ParameterError
            If a number is not a positive integer, no callback is given, or the device has
            fewer output channels than ``channels``.
        VoicerError
            If PortAudio is missing, the device does not exist, or PortAudio refuses the
            stream (the message names the device and the settings).
        """
        if callback is None:
            raise ParameterError("portaudio sink pulls blocks: open() needs a callback")
        _check_stream_format(self.name, sample_rate, channels, block)
        if self._stream is not None:
            raise VoicerError("portaudio sink is already open")
        sd = _import_sounddevice()
        index = resolve_output_device(self.device)
        info = sd.query_devices(index)
        if channels > info["max_output_channels"]:
            raise ParameterError(f"audio output device {info['name']!r} has {info['max_output_channels']} "
                                 f"output channels; channels={channels} asked for")
        guard = GuardedCallback(callback, sample_rate=sample_rate, block=block)
        # 'high' and 'low' are the device's own defaults (as sounddevice reads them).
        asked = (info[f"default_{self.latency}_output_latency"] if self.latency in _LATENCIES
                 else float(self.latency))
        latency = max(asked, MIN_LATENCY_BLOCKS * block / sample_rate)
        try:
            stream = sd.OutputStream(samplerate=sample_rate, blocksize=block, device=index, channels=channels,
                                     dtype="float32", latency=latency, callback=guard)
        except sd.PortAudioError as exc:
            raise VoicerError(f"cannot open audio output device {info['name']!r} at {sample_rate} Hz, "
                              f"{channels} channels, block {block}: {exc}") from exc
        try:
            stream.start()
        except sd.PortAudioError as exc:
            stream.close(ignore_errors=True)
            raise VoicerError(f"cannot start audio output device {info['name']!r}: {exc}") from exc
        self._stream, self._guard, self.device_name = stream, guard, info["name"]
        self.latency_s = float(stream.latency)

    def write(self, block: NDArray[np.float32]) -> None:
        """Not used: a real-time sink pulls its blocks through the callback."""
        raise VoicerError("portaudio sink pulls blocks through the callback given to open(); write() is not used")

    def close(self) -> None:
        """Play what is queued, stop and release the device; safe to call twice."""
        self._end(drain=True)

    def abort(self) -> None:
        """Stop at once, dropping queued audio; safe to call twice."""
        self._end(drain=False)

    def _end(self, *, drain: bool) -> None:
        stream, self._stream = self._stream, None
        if stream is None:
            return
        # sounddevice ignores PortAudio errors here by default: the device is going away anyway.
        if drain:
            stream.stop()
        else:
            stream.abort()
        stream.close()

    def __enter__(self) -> "PortAudioSink":
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self._end(drain=exc_type is None)

    @property
    def callbacks(self) -> int:
        """Stream callbacks so far."""
        return self._guard.callbacks if self._guard else 0

    @property
    def late_blocks(self) -> int:
        """Blocks PortAudio flagged as late (output underflow)."""
        return self._guard.late_blocks if self._guard else 0

    @property
    def faults(self) -> int:
        """Blocks replaced by silence because the callback failed."""
        return self._guard.faults if self._guard else 0

    @property
    def load(self) -> float:
        """Smoothed fraction of the block period spent in the callback (see :class:`GuardedCallback`)."""
        return self._guard.load if self._guard else 0.0

    @property
    def peak_load(self) -> float:
        """Largest fraction of a block period spent in one callback."""
        return self._guard.peak_load if self._guard else 0.0

    @property
    def last_error(self) -> BaseException | None:
        """The last exception raised by the callback, if any."""
        return self._guard.last_error if self._guard else None


def list_output_devices() -> list[dict[str, Any]]:
    """The PortAudio devices that can play audio.

    Returns
    -------
    list of dict
        One per device, with ``index`` (int), ``name``, ``hostapi`` (e.g. ALSA),
        ``channels`` (maximum output channels), ``default_samplerate_hz`` and
        ``default`` (True for the default output device).

    Raises
    ------
    VoicerError
        If PortAudio is missing (saying which Debian package to install).
    """
    return list_devices(_import_sounddevice(), "output")


def format_devices(devices: list[dict[str, Any]]) -> str:
    """Text of ``voicer devices`` for the result of :func:`list_output_devices`."""
    return format_device_table(devices, "output", none_found="no audio output devices found (PortAudio sees none); "
                                                            "`voicer render` writes audio files without one")


def resolve_output_device(spec: int | str | None) -> int:
    """PortAudio index of an output device.

    Parameters
    ----------
    spec : int, str or None
        A device index (an int or a string of digits), a name or space-separated parts of
        it (case-insensitive, as sounddevice matches them), or None for the default
        output device.

    Raises
    ------
    VoicerError
        If PortAudio is missing, there is no output device at all, or ``spec`` matches
        none or several; the message names the device and suggests ``voicer devices``
        and ``voicer render``.
    """
    sd = _import_sounddevice()
    return resolve_device(sd, list_output_devices(), spec, "output", help=_DEVICE_HELP)
