"""Voices of one voicing state: note-on/off, dampers, pedals, polyphony and stealing.

A voice is one strike of one key: its partials in the oscillator bank, owned by the
voice's id. Re-striking a sounding key adds a new voice on top of the strings still
vibrating (superposition; nothing is cut). Every voice of a key shares the key's damper:

* a held key, a key above ``last_damped_key``, or a key caught by the sostenuto pedal
  (CC 66, keys held when it went down) rings freely;
* otherwise the damper engagement follows the sustain pedal (CC 64), with half-pedal
  values between ``half_pedal_low_cc`` and ``half_pedal_high_cc`` damping in part
  (quantised to :data:`~voicer.engine.instrument.DAMPER_LEVELS` steps);
* the una corda pedal (CC 67) shifts the hammers for the strikes made while it is down
  (their una corda blow: fewer strings, softer felt).

Above the voice limit a voice is stolen, released voices first (the longest released),
then the quietest, and faded out over a few milliseconds instead of cut. All work is
Python bookkeeping plus copies into the bank's preallocated arrays: nothing here
allocates arrays after construction, so it runs inside the audio callback.
"""

from __future__ import annotations

__all__ = ["Voices"]

import numpy as np

from ..errors import ParameterError

from .bank import OscillatorBank
from .instrument import DAMPER_LEVELS, Instrument, KeyData

_FADING = DAMPER_LEVELS + 1  # level index of the fade tables
_NEVER = np.iinfo(np.int64).max  # release time of a voice not released


class Voices:
    """Voice allocation and pedal state for one instrument on one bank.

    Parameters
    ----------
    instrument : Instrument
        The voicing state.
    bank : OscillatorBank
        Where the partials go, made with ``owners=3 * max_voices`` (its partial count per
        voice id); its capacity should hold ``3 * max_voices`` voices.
    max_voices : int
        Polyphony limit (voices not fading out).
    """

    def __init__(self, instrument: Instrument, bank: OscillatorBank, *, max_voices: int) -> None:
        self.inst, self.bank, self.max_voices = instrument, bank, max_voices
        ids = 3 * max_voices  # room for voices fading out
        if len(bank.owner_counts) < ids:
            raise ParameterError(f"the bank keeps counts for {len(bank.owner_counts)} owners; voices need {ids}")
        self.key_of = [-1] * ids
        self.data_of: list[KeyData | None] = [None] * ids  # the KeyData each voice plays (its entries)
        self.level_of = [0] * ids
        self.fading = [False] * ids
        self.free = list(range(ids - 1, -1, -1))
        self.by_key: list[list[int]] = [[] for _ in range(128)]
        self.held = [False] * 128
        self.caught = [False] * 128  # by the sostenuto pedal
        self.sustain_cc = 0
        self.sostenuto = False
        self.una_corda = False
        self.active = 0  # voices not fading
        # (buffer, stop) when the current block is already rendered into ``buffer``:
        # every change made at sample ``at`` then corrects samples at..stop-1 of it.
        self.correct: tuple[np.ndarray, int] | None = None
        # When each released, not fading voice was released (a running count; _NEVER: not
        # released). In an array: a dict in release order would resize now and then as
        # voices come and go, and a list would keep a new int object per release.
        self._released_at = np.full(ids, _NEVER, dtype=np.int64)
        self._releases = 0  # running count of releases
        self._n_released = 0
        self.steals = 0
        self._amp = np.zeros(instrument.max_partials, dtype=np.complex128)
        self._loudness = np.zeros(ids, dtype=np.float64)
        self._mag = np.zeros(bank.capacity, dtype=np.float64)

    # --- events ------------------------------------------------------------------

    def note_on(self, key: int, velocity: int, at: int = 0) -> None:
        """Strike a key (velocity 1..127) at sample ``at`` of the current block; keys
        outside the instrument are ignored."""
        data = self.inst.keys.get(key)
        if data is None or velocity < 1:
            return
        self.held[key] = True
        for v in self.by_key[key]:
            self._unrelease(v)
        self._update_key(key, at)  # an already sounding key stops being damped
        if self.inst.damper_level(self.sustain_cc) < DAMPER_LEVELS:
            data = data.sympathetic or data  # the other keys' strings are free to answer
        else:
            data = data.free_sympathetic or data  # only the strings without dampers
        n = len(data.freq_hz)
        while self.active >= self.max_voices:
            self._steal(at=at)
        while not self.free or self.bank.count + n > self.bank.capacity:
            if not self._drop_fading(at) and not self._steal(hard=True, at=at):
                return  # nothing left to make room with (cannot happen with a sane capacity)
        amp = self._amp[:n]
        if self.una_corda and data.una_corda_amplitude is not None:
            amp[:] = data.una_corda_amplitude[min(velocity, 127)]
        elif self.una_corda:
            # Real gains on the real and imaginary parts: a complex-by-float product would
            # make numpy allocate a casting buffer.
            amp[:] = data.amplitude[min(velocity, 127)]
            np.multiply(amp.real, data.una_corda_gain, out=amp.real)
            np.multiply(amp.imag, data.una_corda_gain, out=amp.imag)
        else:
            amp[:] = data.amplitude[min(velocity, 127)]
        v = self.free.pop()
        self.bank.add_tables(data.levels[0], amp, owner=v, at=at, correct=self.correct)
        self.key_of[v], self.level_of[v], self.fading[v], self.data_of[v] = key, 0, False, data
        self.by_key[key].append(v)
        self.active += 1

    def note_off(self, key: int, at: int = 0) -> None:
        """Release a key: its damper falls unless a pedal holds it."""
        if not 0 <= key < 128 or not self.held[key]:
            return
        self.held[key] = False
        for v in self.by_key[key]:
            if self._released_at[v] == _NEVER:
                self._released_at[v] = self._releases
                self._releases += 1
                self._n_released += 1
        self._update_key(key, at)

    def set_sustain(self, cc: int, at: int = 0) -> None:
        """Sustain pedal position, CC 64 value 0..127 (half pedal in between)."""
        self.sustain_cc = cc
        self._update_all(at)

    def set_sostenuto(self, down: bool, at: int = 0) -> None:
        """Sostenuto pedal (CC 66): going down catches the keys held at that moment."""
        if down and not self.sostenuto:
            self._set_caught(self.held)
        elif not down:
            self._set_caught(None)
        self.sostenuto = down
        self._update_all(at)

    def set_una_corda(self, down: bool) -> None:
        """Una corda pedal (CC 67): changes the strikes made while it is down."""
        self.una_corda = down

    def all_notes_off(self, at: int = 0) -> None:
        """Release every key (MIDI CC 123); pedals still hold what they hold."""
        for key in range(128):
            if self.held[key]:
                self.note_off(key, at)

    def all_sound_off(self, at: int = 0) -> None:
        """Fade every voice out now (CC 120, stop, panic)."""
        for key in range(128):
            for v in list(self.by_key[key]):
                self._fade(v, at)
            self.held[key] = False
        self._set_caught(None)

    # --- upkeep ------------------------------------------------------------------

    def housekeeping(self, threshold: float) -> None:
        """Drop inaudible partials and free voices that have none left."""
        if not self.bank.cull(threshold):
            return  # voices only run out of partials by culling (the rest free their ids)
        counts = self.bank.owner_counts
        for v, key in enumerate(self.key_of):
            if key >= 0 and counts[v] == 0:
                self._release_id(v)

    def reset_voice(self, v: int) -> None:
        """Remove a voice at once (its state went bad): no fade, it is already faulty."""
        self.bank.remove_owner(v)
        self._release_id(v)

    @property
    def voices(self) -> int:
        """Voices sounding (fading ones included)."""
        return len(self.key_of) - len(self.free)

    # --- internals ---------------------------------------------------------------

    def _level(self, key: int) -> int:
        data = self.inst.keys[key]
        if not data.damped or self.held[key] or (self.sostenuto and self.caught[key]):
            return 0
        return self.inst.damper_level(self.sustain_cc)

    def _update_key(self, key: int, at: int = 0) -> None:
        voices = self.by_key[key]
        if not voices:
            return
        level = self._level(key)
        for v in voices:
            if self.level_of[v] != level:
                self.bank.retune(v, self.data_of[v].levels[level], at, self.correct)
                self.level_of[v] = level

    def _update_all(self, at: int = 0) -> None:
        for key, voices in enumerate(self.by_key):
            if voices:
                self._update_key(key, at)

    def _unrelease(self, v: int) -> None:
        if self._released_at[v] != _NEVER:
            self._released_at[v] = _NEVER
            self._n_released -= 1

    def _set_caught(self, held: list[bool] | None) -> None:
        """The keys the sostenuto pedal holds: a copy of ``held``, or none; item by item
        (a new list, or a slice assignment of 128 items, would allocate)."""
        caught = self.caught
        for key in range(128):
            caught[key] = held[key] if held is not None else False

    def _fade(self, v: int, at: int = 0) -> None:
        key = self.key_of[v]
        if key < 0 or self.fading[v]:
            return
        self.bank.retune(v, self.data_of[v].fade, at, self.correct)
        self.by_key[key].remove(v)
        self._unrelease(v)
        self.fading[v], self.level_of[v] = True, _FADING
        self.active -= 1

    def _release_id(self, v: int) -> None:
        key = self.key_of[v]
        if not self.fading[v]:
            self.by_key[key].remove(v)
            self._unrelease(v)
            self.active -= 1
        self.key_of[v], self.fading[v] = -1, False
        self.free.append(v)

    def _drop_fading(self, at: int = 0) -> bool:
        """Remove one fading voice at once (only when the bank is full)."""
        for v, key in enumerate(self.key_of):
            if key >= 0 and self.fading[v]:
                self.bank.remove_owner(v, at, self.correct)
                self._release_id(v)
                return True
        return False

    def _victim(self) -> int:
        if self._n_released:
            return int(self._released_at.argmin())  # the longest released
        bank = self.bank
        mag = self._mag[: bank.count]
        np.abs(bank.state[: bank.count], out=mag)
        loud = self._loudness
        loud[:] = 0.0
        np.add.at(loud, bank.owner[: bank.count], mag)
        victim, quietest = -1, np.inf
        for v, key in enumerate(self.key_of):  # no list of candidates: nothing allocated
            if key >= 0 and not self.fading[v] and loud[v] < quietest:
                victim, quietest = v, loud[v]
        return victim

    def _steal(self, hard: bool = False, at: int = 0) -> bool:
        """Fade (or with ``hard``, remove) one voice to make room; False if none."""
        if not self.active:
            return False
        v = self._victim()
        self.steals += 1
        if hard:
            self.bank.remove_owner(v, at, self.correct)
            self._release_id(v)
        else:
            self._fade(v, at)
        return True
