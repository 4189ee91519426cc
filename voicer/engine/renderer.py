"""The renderer: MIDI events in, safe audio blocks out, one or two voicing states.

:meth:`Renderer.process` is the body of the audio callback. It fills a float32 block of
shape (channels, frames), applying each MIDI event at its sample inside the block: the
block is rendered in segments between events, so the output does not depend on how the
stream is cut into blocks (checked with blocks of 1, 64, 65, 256 and 8193 samples).

Two voicing states (A and B) can be loaded at once. Both hear every event and keep their
strings vibrating; only the audible one is rendered, the other is advanced (one complex
multiply per partial per block). Flipping (:meth:`flip`, a chosen MIDI controller, or a
program change) crossfades to the other over ``crossfade_s``, so a client hears the same
chord voiced both ways.

Output is the summed bridge force times the master gain, through the effect plugins and
the :class:`~voicer.engine.safety.SafetyStage`. A voice whose state turns non-finite is
removed and the fault counted. After construction nothing allocates arrays.

A key's data can be replaced while playing (the live knobs, :mod:`voicer.engine.rebuild`):
another thread appends ``(state index, KeyData)`` to :attr:`Renderer.swaps`, and
:meth:`process` swaps it in at the start of its next block, with no lock. The strikes
made from then on use the new data; voices already sounding keep their partials (a
hammer change acts on the next blow, not on a vibrating string), so nothing is cut. The
replaced data goes to :attr:`Renderer.retired` for the other thread to drop, so that its
arrays are not freed in the callback.
"""

from __future__ import annotations

__all__ = ["Renderer", "RenderStats", "PeakMeter", "HOUSEKEEPING_FRAMES", "DEFAULT_GAIN_DB", "DEFAULT_MAX_VOICES"]

from collections import deque
from dataclasses import dataclass
from typing import Iterable, Iterator, Sequence

import mido
import numpy as np
from numpy.typing import NDArray

from ..errors import ParameterError
from .bank import OscillatorBank
from .defaults import DEFAULT_CULL_DBFS, DEFAULT_GAIN_DB, DEFAULT_MAX_VOICES
from .host import Effect
from .instrument import Instrument, KeyData
from .safety import DEFAULT_CEILING_DBFS, SafetyStage
from .voices import Voices

#: Culling and freeing voices happens at every multiple of this many samples (absolute
#: positions, so that it does not depend on the block size).
HOUSEKEEPING_FRAMES = 2048

# MIDI controller numbers (MIDI 1.0 Detailed Specification, control change table).
CC_SUSTAIN, CC_SOSTENUTO, CC_UNA_CORDA, CC_ALL_SOUND_OFF, CC_ALL_NOTES_OFF = 64, 66, 67, 120, 123


@dataclass
class RenderStats:
    """Running figures of a renderer (see ``voicer render --stats-json``)."""

    frames: int = 0
    blocks: int = 0
    peak_partials: int = 0
    partial_blocks: int = 0  # sum over blocks of the partial count (for the mean)
    peak_abs: float = 0.0
    nonfinite: int = 0
    flips: int = 0
    swaps: int = 0  # keys' data swapped in (live knobs)

    @property
    def mean_partials(self) -> float:
        return self.partial_blocks / self.blocks if self.blocks else 0.0

    @property
    def peak_dbfs(self) -> float:
        return float(20.0 * np.log10(self.peak_abs)) if self.peak_abs > 0 else float("-inf")


class PeakMeter:
    """Peak voices and partials of the audible state since the display last read them.

    The audio thread raises the peaks every block; a display thread calls :meth:`take`.
    Sampling the instantaneous counts instead misses notes shorter than the display
    interval (a render faster than real time, or a staccato passage).
    """

    def __init__(self) -> None:
        self.voices = 0
        self.partials = 0

    def note(self, voices: int, partials: int) -> None:
        """In the audio thread, once a block."""
        if voices > self.voices:
            self.voices = voices
        if partials > self.partials:
            self.partials = partials

    def take(self) -> tuple[int, int]:
        """From the display thread: the peaks so far, then start again from zero. A block
        that lands between the read and the reset counts toward the next reading only."""
        voices, partials = self.voices, self.partials
        self.voices = self.partials = 0
        return voices, partials


class Renderer:
    """Sample-accurate rendering of MIDI through one or two voicing states.

    Parameters
    ----------
    states : sequence of Instrument
        One state, or two for A/B, prepared for the same sample rate and block size
        (their ``max_block``: larger calls to :meth:`process` are split).
    max_voices : int
        Polyphony limit per state.
    gain_db : float
        Master gain from bridge force (N) to full scale.
    ceiling_dbfs : float
        Hard ceiling of the safety stage.
    effects : sequence of Effect
        Plugins applied after the master gain, already prepared.
    ab_cc : int or None
        Controller number whose press (value >= 64 after < 64) flips A/B.
    ab_program_change : bool
        Whether a program change flips A/B.
    crossfade_s : float
        Length of the A/B crossfade.
    cull_dbfs : float
        Partials below this output level are dropped.
    capacity : int, optional
        Partials each bank can hold; default room for ``3 * max_voices`` of the largest
        voice (voices fading out included).
    """

    def __init__(self, states: Sequence[Instrument], *, max_voices: int = DEFAULT_MAX_VOICES,
                 gain_db: float = DEFAULT_GAIN_DB, ceiling_dbfs: float = DEFAULT_CEILING_DBFS,
                 effects: Sequence[Effect] = (), ab_cc: int | None = None, ab_program_change: bool = True,
                 crossfade_s: float = 0.02, cull_dbfs: float = DEFAULT_CULL_DBFS, capacity: int | None = None) -> None:
        if not 1 <= len(states) <= 2:
            raise ParameterError(f"{len(states)} voicing states given; the renderer takes 1 (A) or 2 (A and B)")
        rates = {(s.sample_rate, s.max_block, s.split) for s in states}
        if len(rates) != 1:
            raise ParameterError(f"voicing states prepared differently (sample rate, block, split): {sorted(rates)}")
        block, split = states[0].max_block, states[0].split
        self.sample_rate = states[0].sample_rate
        self.states = list(states)
        self.block = block
        self.gain = 10.0 ** (gain_db / 20.0)
        self.cull = 10.0 ** (cull_dbfs / 20.0) / self.gain  # in bridge-force units
        self.effects = list(effects)
        self.ab_cc, self.ab_program_change = ab_cc, ab_program_change
        self.crossfade = max(1, int(round(crossfade_s * self.sample_rate)))
        self.banks, self.voices = [], []
        for state in states:
            room = capacity if capacity is not None else 3 * max_voices * state.max_partials
            bank = OscillatorBank(room, max_block=block, split=split, owners=3 * max_voices)
            self.banks.append(bank)
            self.voices.append(Voices(state, bank, max_voices=max_voices))
        self.safety = SafetyStage(block, ceiling_dbfs=ceiling_dbfs)
        self.stats = RenderStats()
        self.meter = PeakMeter()
        self.audible = 0
        self._fade_left = 0  # samples of crossfade still to go (toward self.audible)
        self._ab_pressed = False
        self._position = 0  # absolute sample position
        self._housekept = -1  # position of the last housekeeping
        self._in_block = False  # events are being applied inside a rendered block
        self._block_n = 0
        self._flips: list[int] = []
        self._flips_start = (0, 0)
        self._mono = [np.zeros(block) for _ in states]
        self._mix = np.zeros(block)
        self._ramp = np.zeros(block)
        self._fx = np.zeros((1, block), dtype=np.float32)
        #: Key data to swap in at the next block, appended by another thread.
        self.swaps: deque[tuple[int, KeyData]] = deque()
        #: Key data swapped out, for that thread to drop (never freed in the callback).
        self.retired: deque[KeyData] = deque()

    # --- control -----------------------------------------------------------------

    @property
    def state_name(self) -> str:
        return self.states[self.audible].name

    def flip(self, at: int = 0) -> None:
        """Crossfade to the other voicing state (no effect with one state), from sample
        ``at`` of the block being rendered (between blocks: from the next one)."""
        if len(self.states) < 2:
            return
        self.audible = 1 - self.audible
        self._fade_left = self.crossfade - self._fade_left  # reverse a crossfade in progress
        self.stats.flips += 1
        if self._in_block:
            self._flips.append(at)  # _mix_block replays the block's flips
            if self.voices[self.audible].correct is None:
                self._start_rendering(self.audible, at, self._block_n)

    def apply(self, message: mido.Message | str, at: int = 0) -> None:
        """Apply one normalised MIDI message, or the command ``"flip"``, to every state,
        at sample ``at`` of the block being rendered (0 between blocks)."""
        if isinstance(message, str):
            if message == "flip":
                self.flip(at)
            return
        kind = message.type
        if kind == "note_on":
            for v in self.voices:
                v.note_on(message.note, message.velocity, at)
        elif kind == "note_off":
            for v in self.voices:
                v.note_off(message.note, at)
        elif kind == "control_change":
            self._control(message.control, message.value, at)
        elif kind == "program_change" and self.ab_program_change:
            self.flip(at)

    def _control(self, control: int, value: int, at: int) -> None:
        if control == self.ab_cc:
            pressed = value >= 64
            if pressed and not self._ab_pressed:
                self.flip(at)
            self._ab_pressed = pressed
            return
        for v in self.voices:
            if control == CC_SUSTAIN:
                v.set_sustain(value, at)
            elif control == CC_SOSTENUTO:
                v.set_sostenuto(value >= 64, at)
            elif control == CC_UNA_CORDA:
                v.set_una_corda(value >= 64)
            elif control == CC_ALL_NOTES_OFF:
                v.all_notes_off(at)
            elif control == CC_ALL_SOUND_OFF:
                v.all_sound_off(at)

    def stop(self) -> None:
        """Clear every key and pedal and fade all sound (end of a render, Ctrl-C)."""
        for v in self.voices:
            v.set_sustain(0)
            v.set_sostenuto(False)
            v.all_sound_off()

    # --- rendering ---------------------------------------------------------------

    def process(self, out: NDArray[np.float32], events: Iterable[tuple[int, mido.Message | str]] = ()) -> None:
        """Fill ``out`` (channels, frames) with the next frames; apply each event at its
        sample offset (0 <= offset < frames, in time order; later offsets are clamped)."""
        while self.swaps:
            self._swap(*self.swaps.popleft())
        frames = out.shape[1]
        pending = iter(events)
        event = next(pending, None)
        done = 0
        while done < frames:
            # Blocks end at housekeeping points, so that culling always sees the true
            # states at the same samples, whatever the caller's block size.
            n = min(self.block, frames - done, HOUSEKEEPING_FRAMES - self._position % HOUSEKEEPING_FRAMES)
            if self._position % HOUSEKEEPING_FRAMES == 0 and self._housekept != self._position:
                for v in self.voices:
                    v.housekeeping(self.cull)
                self._housekept = self._position
            event = self._block(n, pending, event, frames, done)
            self._finish(out, done, n)
            done += n
        while event is not None:  # events given past the end of the block: apply now
            self.apply(event[1])
            event = next(pending, None)

    def _swap(self, state: int, data: KeyData) -> None:
        keys = self.states[state].keys
        old = keys.get(data.key)
        keys[data.key] = data
        if old is not None:
            self.retired.append(old)
        self.stats.swaps += 1

    def _block(self, n: int, pending: Iterator[tuple[int, mido.Message | str]],
               event: tuple[int, mido.Message | str] | None, frames: int,
               done: int) -> tuple[int, mido.Message | str] | None:
        """Render one block of n samples, then apply its events as corrections.

        Each bank that is heard renders the whole block at once from its block-start
        state (one pass over its tables: the costly part); an event at sample ``at`` then
        only re-renders the partials it changes, from ``at`` to the block end. The mix is
        made last, following the A/B flips of the block. Returns the first event of a
        later block.
        """
        self._flips_start = (self.audible, self._fade_left)
        self._flips = []
        for s, voices in enumerate(self.voices):
            if s == self.audible or self._fade_left > 0:
                self._start_rendering(s, 0, n)
            else:
                voices.correct = None
        self._in_block, self._block_n = True, n
        while event is not None and min(event[0], frames - 1) - done < n:
            self.apply(event[1], max(min(event[0], frames - 1) - done, 0))
            event = next(pending, None)
        self._in_block = False
        for voices in self.voices:
            voices.correct = None
        self._mix_block(n)
        for bank in self.banks:
            bank.advance(n)  # close the block: every state moves n samples on
        self._position += n
        return event

    def _start_rendering(self, s: int, at: int, n: int) -> None:
        buf = self._mono[s][:n]
        buf[:] = 0.0
        self.banks[s].render_segment(buf[at:], at, n)
        self.voices[s].correct = (self._mono[s], n)

    def _mix_block(self, n: int) -> None:
        """The block's mix from the banks' buffers, replaying its flips in order."""
        audible, left = self._flips_start
        mix = self._mix[:n]
        pos = 0
        for stop in [*self._flips, n]:
            if stop > pos:
                seg = mix[pos:stop]
                to = self._mono[audible][pos:stop]
                if left <= 0:
                    seg[:] = to
                else:
                    frm = self._mono[1 - audible][pos:stop]
                    m = min(stop - pos, left)
                    ramp = self._ramp[: stop - pos]
                    self._fill_ramp(ramp, m, 1.0 - left / self.crossfade)
                    ramp[m:] = 1.0
                    np.subtract(to, frm, out=seg)
                    np.multiply(seg, ramp, out=seg)
                    np.add(seg, frm, out=seg)
                    left -= m
            if stop < n:
                audible, left = 1 - audible, self.crossfade - left
            pos = stop
        self.audible, self._fade_left = audible, left

    def _fill_ramp(self, ramp: NDArray[np.float64], m: int, start: float) -> None:
        step = 1.0 / self.crossfade
        # ramp[i] = start + (i + 1) step for i < m, without allocating an arange.
        ramp[:m] = step
        np.cumsum(ramp[:m], out=ramp[:m])
        ramp[:m] += start

    def _finish(self, out: NDArray[np.float32], done: int, n: int) -> None:
        mix = self._mix[:n]
        mix *= self.gain
        if self.effects:
            fx = self._fx[:, :n]
            fx[0] = mix
            for effect in self.effects:
                effect.process(fx)
            mix[:] = fx[0]
        if not self.safety.process(mix):
            self._reset_bad_voices()
        out[:, done:done + n] = mix
        st = self.stats
        st.frames += n
        st.blocks += 1
        count = self.banks[self.audible].count
        st.peak_partials = max(st.peak_partials, count)
        st.partial_blocks += count
        st.peak_abs = max(st.peak_abs, self.safety.peak)
        st.nonfinite = self.safety.nonfinite
        self.meter.note(self.voices[self.audible].voices, count)

    def _reset_bad_voices(self) -> None:
        for bank, voices in zip(self.banks, self.voices):
            k = bank.count
            bad = ~np.isfinite(bank.state[:k])
            for owner in set(bank.owner[:k][bad].tolist()):
                voices.reset_voice(int(owner))
