"""MIDI sources: a Standard MIDI File, or a live input port through mido and python-rtmidi.

Both follow the ``Source`` protocol of :mod:`voicer.engine.host` and hand the engine
messages passed through :func:`voicer.io.midi.normalize`.

:class:`MidiPortSource` is a template method in mido's manner: :meth:`~MidiPortSource.open`
chooses the port, wraps the callback and reports errors, while the two backend steps,
:meth:`~MidiPortSource._input_names` and :meth:`~MidiPortSource._open_port`, are the only
places that touch python-rtmidi; tests replace them with an in-memory mido port.
"""

from __future__ import annotations

__all__ = ["MidiFileSource", "MidiPortSource", "list_input_ports", "format_ports"]

import os
import sys
from contextlib import contextmanager
from pathlib import Path
from typing import Callable, Iterator

import mido

from ..errors import VoicerError
from .midi import normalize

#: What to use instead when no MIDI input can be had.
_ALTERNATIVES = "play from the computer keyboard instead, or render a MIDI file with `voicer render`"

#: What mido raises for a file that is not a well-formed Standard MIDI File.
_BAD_FILE_ERRORS = (OSError, ValueError, KeyError, IndexError, mido.KeySignatureError)


class MidiFileSource:
    """The events of a Standard MIDI File (format 0 or 1), read whole when made.

    Parameters
    ----------
    path : str or os.PathLike
        The ``.mid`` file.

    Raises
    ------
    VoicerError
        If the file is missing, unreadable, not a Standard MIDI File, of format 2, or
        timed in SMPTE frames; the message names the file.
    """

    name = "midi-file"
    realtime = False

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)
        self._file = _read_midi_file(self.path)

    @property
    def duration_s(self) -> float:
        """Playing time in seconds, to the last event of any track (mido's ``length``)."""
        return float(self._file.length)

    def events(self) -> Iterator[tuple[float, mido.Message]]:
        """``(time_s, message)`` in time order across all tracks, normalised.

        Times honour every tempo change (mido's playback iteration). Events at the same
        time keep file order: earlier tracks first, then order within the track. Each
        message's own ``time`` is 0; its time is the first item of the pair.
        """
        now_s = 0.0
        for message in self._file:  # mido: merged tracks, ``time`` = delta in seconds
            now_s += message.time
            engine_message = normalize(message)
            if engine_message is not None:
                yield now_s, engine_message.copy(time=0)

    def open(self, on_message: Callable[[mido.Message], None]) -> None:
        """Not available: a file is not real-time; read it with :meth:`events`.

        Raises
        ------
        VoicerError
            Always.
        """
        raise VoicerError(f"{self.path}: a MIDI file is played through events(), not opened as a live source")

    def close(self) -> None:
        """Nothing to release: the file was read whole and closed when the source was made."""


def _read_midi_file(path: Path) -> mido.MidiFile:
    try:
        midi_file = mido.MidiFile(path)
    except FileNotFoundError:
        raise VoicerError(f"{path}: no such MIDI file") from None
    except IsADirectoryError:
        raise VoicerError(f"{path}: is a folder, not a MIDI file") from None
    except PermissionError:
        raise VoicerError(f"{path}: cannot read the MIDI file (permission denied)") from None
    except EOFError:  # mido's carries no text
        raise VoicerError(f"{path}: not a readable Standard MIDI File (it ends in the middle of a chunk)") from None
    except _BAD_FILE_ERRORS as exc:
        reason = str(exc) or type(exc).__name__
        raise VoicerError(f"{path}: not a readable Standard MIDI File ({reason})") from None
    if midi_file.type == 2:
        raise VoicerError(f"{path}: MIDI file format 2 (independent sequences) is not supported; use format 0 or 1")
    if midi_file.ticks_per_beat < 0:
        # The header's division word read as signed is negative for SMPTE frame timing.
        raise VoicerError(f"{path}: SMPTE frame timing is not supported; use ticks per quarter note")
    if midi_file.ticks_per_beat == 0:
        raise VoicerError(f"{path}: the header gives 0 ticks per quarter note; it must be 1 to 32767")
    return midi_file


@contextmanager
def _quiet_c_stderr() -> Iterator[None]:
    """Silence the C library's own stderr lines (ALSA prints its failures there before
    rtmidi raises), so that the user gets voicer's one-line reason only."""
    try:
        fd = sys.stderr.fileno()
    except (AttributeError, OSError, ValueError):  # no real stderr (e.g. captured): nothing to silence
        yield
        return
    sys.stderr.flush()
    saved = os.dup(fd)
    devnull = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(devnull, fd)
        yield
    finally:
        os.dup2(saved, fd)
        os.close(saved)
        os.close(devnull)


@contextmanager
def _rtmidi_errors(what: str) -> Iterator[None]:
    """Turn python-rtmidi's failures while doing ``what`` into one-line VoicerErrors."""
    try:
        import rtmidi
    except ImportError as exc:  # the wheel links to the ALSA library
        raise VoicerError(f"MIDI ports are unavailable: python-rtmidi cannot be loaded ({exc}); install the "
                          f"Debian package libasound2, or {_ALTERNATIVES}") from None
    try:
        with _quiet_c_stderr():
            yield
    except rtmidi.SystemError as exc:
        # Raised when the MIDI system itself (e.g. the ALSA sequencer) cannot be reached.
        raise VoicerError(f"MIDI ports are unavailable on this system: {str(exc).rstrip('.')}; {_ALTERNATIVES}") from None
    except (rtmidi.RtMidiError, OSError) as exc:
        raise VoicerError(f"cannot {what}: {exc}") from None


def list_input_ports() -> list[str]:
    """Names of the MIDI input ports, as ``mido.get_input_names()`` gives them.

    Raises
    ------
    VoicerError
        If MIDI ports are unavailable on this system (no ALSA sequencer, or
        python-rtmidi cannot be loaded).
    """
    with _rtmidi_errors("list the MIDI input ports"):
        return list(mido.get_input_names())


def format_ports(list_ports: Callable[[], list[str]] = list_input_ports) -> str:
    """Text of a ``devices`` listing: each input port with its index; never raises.

    Parameters
    ----------
    list_ports : callable
        :func:`list_input_ports` (replaceable in tests).
    """
    try:
        names = list_ports()
    except VoicerError as exc:
        return f"no MIDI input ports ({exc})"
    if not names:
        return f"no MIDI input ports (none connected; {_ALTERNATIVES})"
    return "\n".join(["MIDI input ports:", *(f"  {i:>2}  {name}" for i, name in enumerate(names))])


class MidiPortSource:
    """Live MIDI from an input port, delivered from mido's thread once opened.

    Parameters
    ----------
    port : str or int, optional
        Which input: an exact name, an index into :func:`list_input_ports` (an int or a
        string of digits), or a part of one name. None takes the first input. With
        ``virtual`` it is the name of the new port (default: ``client_name``).
    virtual : bool
        Create a virtual input port that other programs can connect to, instead of
        opening an existing one.
    client_name : str
        Name of voicer's MIDI client when ``virtual`` is true.

    Attributes
    ----------
    port_name : str or None
        The port opened, once open.
    errors : int
        Messages whose handling raised inside the callback (counted, never re-raised).
    last_error : str or None
        The latest of those errors, as ``Type: text``.
    """

    name = "midi-port"
    realtime = True

    def __init__(self, port: str | int | None = None, *, virtual: bool = False, client_name: str = "voicer") -> None:
        if virtual and isinstance(port, int):
            raise VoicerError(f"a virtual MIDI port needs a name, not the index {port}")
        self.port = port
        self.virtual = virtual
        self.client_name = client_name
        self.port_name: str | None = None
        self.errors = 0
        self.last_error: str | None = None
        self._input: mido.ports.BaseInput | None = None

    def open(self, on_message: Callable[[mido.Message], None]) -> None:
        """Open the port and deliver each normalised message to ``on_message``.

        ``on_message`` is called from mido's input thread; whatever it raises is counted
        in :attr:`errors` and dropped, so that the thread keeps running.

        Raises
        ------
        VoicerError
            If the source is already open, no MIDI input exists, ``port`` matches none
            (or several) of them, or MIDI ports are unavailable on this system.
        """
        if self._input is not None:
            raise VoicerError(f"MIDI input {self.port_name!r} is already open")
        if self.virtual:
            name = self.port if isinstance(self.port, str) else self.client_name
        else:
            name = _choose_port(self.port, self._input_names())
        self._input = self._open_port(name, self._callback(on_message))
        self.port_name = name

    def events(self) -> Iterator[tuple[float, mido.Message]]:
        """Not available: a port is real-time; its messages go to :meth:`open`'s callback.

        Raises
        ------
        VoicerError
            Always.
        """
        raise VoicerError("a MIDI input port delivers messages live through open(on_message); it has no events()")

    def close(self) -> None:
        """Close the port (mido stops calling back first); safe to call twice."""
        if self._input is not None:
            self._input.close()
            self._input = None

    def _callback(self, on_message: Callable[[mido.Message], None]) -> Callable[[mido.Message], None]:
        def deliver(message: mido.Message) -> None:
            try:
                engine_message = normalize(message)
                if engine_message is not None:
                    on_message(engine_message)
            except Exception as exc:  # an exception here would kill mido's input thread
                self.errors += 1
                self.last_error = f"{type(exc).__name__}: {exc}"

        return deliver

    def _input_names(self) -> list[str]:
        """Backend step: the names of the input ports."""
        return list_input_ports()

    def _open_port(self, name: str, callback: Callable[[mido.Message], None]) -> mido.ports.BaseInput:
        """Backend step: open input ``name`` (or create it if virtual) calling ``callback``."""
        with _rtmidi_errors(f"open MIDI input {name!r}"):
            if self.virtual:
                return mido.open_input(name, virtual=True, client_name=self.client_name, callback=callback)
            # mido makes any port with a client name virtual, so none is given here.
            return mido.open_input(name, callback=callback)


def _choose_port(port: str | int | None, names: list[str]) -> str:
    """The input named by ``port``: exact name, then index, then a unique part of a name."""
    if not names:
        raise VoicerError(f"no MIDI input ports found; connect a MIDI keyboard, or {_ALTERNATIVES}")
    available = "; ".join(f"{i}: {n}" for i, n in enumerate(names))
    if port is None:
        return names[0]
    if isinstance(port, str) and port in names:
        return port
    if isinstance(port, int) or port.isdigit():
        index = int(port)
        if 0 <= index < len(names):
            return names[index]
        raise VoicerError(f"no MIDI input port number {index} (available: {available})")
    matches = [n for n in names if port.lower() in n.lower()]
    if len(matches) == 1:
        return matches[0]
    if matches:
        raise VoicerError(f"MIDI input {port!r} matches several ports ({'; '.join(matches)}); give more of the name")
    raise VoicerError(f"no MIDI input port matches {port!r} (available: {available})")
