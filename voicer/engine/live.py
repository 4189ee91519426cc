"""Live input: MIDI and commands from other threads into the audio callback.

Messages arrive on the MIDI thread (or the keyboard thread) and are stamped with
``time.perf_counter()``; :meth:`LiveInput.drain`, called at the start of each audio
callback, turns the stamps into sample offsets inside the block. A message is placed
one block later than it arrived, at the same distance from the block start as from the
previous callback, so timing within a block is kept with a constant one-block latency
(no jitter). ``collections.deque`` appends and pops are atomic: no lock is shared with
the audio thread.

A *tap* (the live knobs) sees every message and command on the sending thread before
it is queued, and takes the ones it handles (its controllers, its commands) out of the
stream: they never reach the audio thread.
"""

from __future__ import annotations

__all__ = ["LiveInput", "FLIP", "SAVE", "TARGET"]

import time
from collections import deque
from typing import Callable

import mido

from ..io.midi import normalize

#: Command that flips A/B (the renderer's ``apply`` understands it).
FLIP = "flip"
#: Commands of the live knobs (taken by their tap; the renderer ignores them).
SAVE, TARGET = "save", "target"


class LiveInput:
    """A queue of timestamped messages for one audio stream.

    Parameters
    ----------
    sample_rate : float
        Of the stream.
    clock : callable
        Seconds, monotonic (``time.perf_counter``).
    tap : callable, optional
        Called with each normalised message or command on the sending thread; returning
        True takes it out of the stream.
    """

    def __init__(self, sample_rate: float, *, clock: Callable[[], float] = time.perf_counter,
                 tap: Callable[[mido.Message | str], bool] | None = None) -> None:
        self.sample_rate = float(sample_rate)
        self._clock = clock
        self.tap = tap
        self._queue: deque[tuple[float, mido.Message | str]] = deque()
        self._last = clock()
        self.received = 0

    def push(self, message: mido.Message | str) -> None:
        """From any thread: a MIDI message (normalised here) or a command such as FLIP."""
        stamp = self._clock()  # the arrival, before the tap's work
        if isinstance(message, str):
            if self.tap is None or not self.tap(message):
                self._queue.append((stamp, message))
            return
        msg = normalize(message)
        if msg is not None:
            self.received += 1
            if self.tap is None or not self.tap(msg):
                self._queue.append((stamp, msg))

    def drain(self, frames: int) -> list[tuple[int, mido.Message | str]]:
        """In the audio callback: everything that arrived since the last call, with
        sample offsets 0..frames-1 in arrival order."""
        now = self._clock()
        span = max(now - self._last, 1e-9)
        events = []
        while self._queue:
            t, msg = self._queue.popleft()
            offset = int((t - self._last) / span * frames)
            events.append((min(max(offset, 0), frames - 1), msg))
        self._last = now
        return events
