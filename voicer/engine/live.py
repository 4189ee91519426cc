"""Live input: MIDI and commands from other threads into the audio callback.

Messages arrive on the MIDI thread (or the keyboard thread) and are stamped with
``time.perf_counter()``; :meth:`LiveInput.drain`, called at the start of each audio
callback, turns the stamps into sample offsets inside the block. A message is placed
one block later than it arrived, at the same distance from the block start as from the
previous callback, so timing within a block is kept with a constant one-block latency
(no jitter). ``collections.deque`` appends and pops are atomic: no lock is shared with
the audio thread.
"""

from __future__ import annotations

__all__ = ["LiveInput", "FLIP"]

import time
from collections import deque
from typing import Callable

import mido

from ..io.midi import normalize

#: Command that flips A/B (the renderer's ``apply`` understands it).
FLIP = "flip"


class LiveInput:
    """A queue of timestamped messages for one audio stream."""

    def __init__(self, sample_rate: float, *, clock: Callable[[], float] = time.perf_counter) -> None:
        self.sample_rate = float(sample_rate)
        self._clock = clock
        self._queue: deque[tuple[float, mido.Message | str]] = deque()
        self._last = clock()
        self.received = 0

    def push(self, message: mido.Message | str) -> None:
        """From any thread: a MIDI message (normalised here) or a command such as FLIP."""
        if isinstance(message, str):
            self._queue.append((self._clock(), message))
            return
        msg = normalize(message)
        if msg is not None:
            self._queue.append((self._clock(), msg))
            self.received += 1

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
