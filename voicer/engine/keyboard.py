"""The computer keyboard as a small MIDI keyboard (when no MIDI input is at hand).

Two rows of letters play an octave and a half from the current octave (``a`` is C):
``a w s e d f t g y h u j k o l`` = C C# D D# E F F# G G# A A# B C C# D. A terminal only
reports presses, so each note is released after ``hold_s``. Other keys: space flips A/B,
``p`` toggles the sustain pedal, ``z`` / ``x`` move an octave down / up, ``q`` quits.

With live knobs (``s`` already plays D, so saving is ``v``): ``1`` / ``2`` turn the felt
knob down / up, ``3`` / ``4`` the strike point, ``5`` / ``6`` the hammer mass, by
:data:`KNOB_STEP` controller steps a press (sent as the mapping's controllers, so they
take the same path as a MIDI knob); ``r`` switches between the keys last played and the
range, ``v`` saves the plan.
"""

from __future__ import annotations

__all__ = ["KEYMAP", "HELP", "KNOB_HELP", "KNOB_KEYS", "KNOB_STEP", "KeyboardPlayer", "raw_terminal"]

import contextlib
import sys
import threading
from typing import Callable, Iterator

import mido

from .knobs import NEUTRAL_CC, KnobMap
from .live import FLIP, SAVE, TARGET

KEYMAP = {c: i for i, c in enumerate("awsedftgyhujkol")}
HELP = ("computer keyboard: a w s e d f t g y h u j k o l play (a = C), z/x octave down/up, "
        "p sustain pedal, space A/B, q quit")
KNOB_HELP = "knobs: 1/2 felt softer/harder, 3/4 strike point -/+, 5/6 hammer lighter/heavier, r target, v save plan"
#: Key pairs (down, up) of each knob.
KNOB_KEYS = {"felt": "12", "strike": "34", "mass": "56"}
#: Controller steps per press of a knob key (16 presses from the centre to an end).
KNOB_STEP = 4


class KeyboardPlayer:
    """Turns key presses into messages for a :class:`~voicer.engine.live.LiveInput`.

    Parameters
    ----------
    send : callable
        Receives ``mido.Message`` objects and the command ``"flip"``.
    velocity : int
        Velocity of every note.
    hold_s : float
        How long a note is held.
    knobs : KnobMap, optional
        With live knobs: the controllers the knob keys send.
    """

    def __init__(self, send: Callable[[mido.Message | str], None], *, velocity: int = 80, hold_s: float = 0.6,
                 knobs: KnobMap | None = None) -> None:
        self.send, self.velocity, self.hold_s = send, velocity, hold_s
        self.octave = 4
        self.sustain = False
        self.quit = threading.Event()
        self.knobs = knobs
        self._knob_keys: dict[str, tuple[int, int]] = {}  # key -> (controller, step)
        for knob in knobs.knobs if knobs is not None else ():
            down, up = KNOB_KEYS[knob.name]
            self._knob_keys[down], self._knob_keys[up] = (knob.cc, -KNOB_STEP), (knob.cc, KNOB_STEP)
        self.positions = {cc: NEUTRAL_CC for cc, _ in self._knob_keys.values()}

    def press(self, char: str) -> None:
        """Handle one key press."""
        if not char:
            return
        if char == "q":
            self.quit.set()
        elif char == " ":
            self.send(FLIP)
        elif char == "p":
            self.sustain = not self.sustain
            self.send(mido.Message("control_change", control=64, value=127 if self.sustain else 0))
        elif char in self._knob_keys:
            cc, step = self._knob_keys[char]
            self.positions[cc] = min(max(self.positions[cc] + step, 0), 127)
            self.send(mido.Message("control_change", control=cc, value=self.positions[cc]))
        elif self.knobs is not None and char in "vr":
            self.send(SAVE if char == "v" else TARGET)
        elif char in "zx":
            self.octave = min(max(self.octave + (1 if char == "x" else -1), 0), 7)
        elif char in KEYMAP:
            note = 12 * (self.octave + 1) + KEYMAP[char]
            if 21 <= note <= 108:
                self.send(mido.Message("note_on", note=note, velocity=self.velocity))
                timer = threading.Timer(self.hold_s, self.send, args=(mido.Message("note_off", note=note),))
                timer.daemon = True
                timer.start()

    def run(self, read_char: Callable[[], str]) -> None:
        """Read key presses until ``q`` or end of input."""
        while not self.quit.is_set():
            char = read_char()
            if not char:
                self.quit.set()
                break
            self.press(char.lower())


@contextlib.contextmanager
def raw_terminal() -> Iterator[Callable[[], str]]:
    """Standard input in cbreak mode (one key at a time, no echo); restored on exit."""
    import termios
    import tty

    fd = sys.stdin.fileno()
    saved = termios.tcgetattr(fd)
    try:
        tty.setcbreak(fd)
        yield lambda: sys.stdin.read(1)
    finally:
        termios.tcsetattr(fd, termios.TCSADRAIN, saved)
