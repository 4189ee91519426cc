"""Exceptions raised by voicer.

Every error a user can cause derives from :class:`VoicerError`, so the command line can
report it in one line and exit with status 2 instead of showing a traceback.
"""

from __future__ import annotations

__all__ = ["VoicerError", "ParameterError", "PresetError", "RecordingError"]


class VoicerError(Exception):
    """Root of all errors that voicer reports to the user."""


class ParameterError(VoicerError, ValueError):
    """A value is outside its allowed range or has the wrong type."""


class PresetError(ParameterError):
    """A preset file is malformed; the message names the file, key and field.

    Parameters
    ----------
    message : str
        What is wrong and what is allowed.
    file : str, optional
        Path of the preset file.
    key : int, optional
        MIDI key number the problem belongs to (anchor or override), if any.
    field : str, optional
        Name of the offending field, if any.
    """

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        key: int | None = None,
        field: str | None = None,
    ) -> None:
        self.file = file
        self.key = key
        self.field = field
        self.reason = message
        where = [file or "<preset>"]
        if key is not None:
            where.append(f"key {key}")
        if field is not None:
            where.append(f"field '{field}'")
        super().__init__(": ".join(where) + ": " + message)


class RecordingError(VoicerError):
    """A recording cannot be used (unreadable, silent, clipped, too short...); the message
    names the file and, where it applies, the time in the file.

    Parameters
    ----------
    message : str
        What is wrong and what is needed.
    file : str, optional
        Path of the recording.
    time_s : float, optional
        Where in the file (seconds from its start), if the problem has a place.
    """

    def __init__(self, message: str, *, file: str | None = None, time_s: float | None = None) -> None:
        self.file = file
        self.time_s = time_s
        self.reason = message
        where = file or "<recording>"
        if time_s is not None:
            where += f" at {time_s:.2f} s"
        super().__init__(f"{where}: {message}")
