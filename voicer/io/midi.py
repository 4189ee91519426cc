"""MIDI messages as the engine sees them: one normalisation shared by every source.

Sources (files, ports) and the engine pass each incoming ``mido.Message`` through
:func:`normalize` so that the engine handles one spelling of each event: a note-on with
velocity 0, which the MIDI 1.0 specification defines as a note-off (and which senders use
to profit from running status), arrives as ``note_off``; everything the engine does not
play (system exclusive, pitch bend, aftertouch, clock, meta messages...) is dropped.
"""

from __future__ import annotations

__all__ = ["ENGINE_TYPES", "NOTE_OFF_VELOCITY", "normalize"]

import mido

#: Message types the engine acts on; :func:`normalize` drops every other type.
ENGINE_TYPES: frozenset[str] = frozenset({"note_on", "note_off", "control_change", "program_change"})

#: Release velocity given to a note-on with velocity 0: the MIDI 1.0 specification's
#: value for a sender without velocity information (40H).
NOTE_OFF_VELOCITY = 64


def normalize(message: mido.Message | mido.MetaMessage) -> mido.Message | None:
    """The engine's form of ``message``, or None if the engine ignores it.

    Parameters
    ----------
    message : mido.Message or mido.MetaMessage
        Any message as mido parsed it from a port or a file.

    Returns
    -------
    mido.Message or None
        ``note_on`` with velocity 0 becomes ``note_off`` (same channel and note, release
        velocity :data:`NOTE_OFF_VELOCITY`); ``note_on``, ``note_off``, ``control_change``
        and ``program_change`` are kept unchanged, channel included; anything else
        (meta messages, sysex, pitch bend, aftertouch, system real-time...) gives None.
        The ``time`` attribute is carried over unchanged.
    """
    if message.is_meta or message.type not in ENGINE_TYPES:
        return None
    if message.type == "note_on" and message.velocity == 0:
        return mido.Message("note_off", channel=message.channel, note=message.note,
                            velocity=NOTE_OFF_VELOCITY, time=message.time)
    return message
