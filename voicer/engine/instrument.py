"""A voicing state made ready for the audio thread: per key, everything a voice copies.

From a preset's modal tables this precomputes, per key,

* the partials' power tables (:class:`~voicer.engine.bank.PartialTables`) for each
  damper engagement level 0..``DAMPER_LEVELS`` (0: free, the top level: damper fully on)
  and for a short fade (voice stealing, all sound off),
* the partial amplitudes at every MIDI velocity 1..127 (interpolated between the
  velocity layers through the preset's velocity map),
* the amplitudes of the una corda blow (the hammer shifted: fewer strings struck, with
  softer felt) where the model gives its tables; for a key played from a recording, a
  spectral change instead (``una_corda_level_db`` plus ``una_corda_tilt_db_per_octave``
  above the first partial),

so that note-on, note-off and pedal changes only copy rows. The amplitudes are the
strings' bridge force in newtons, summed over the unison.
"""

from __future__ import annotations

__all__ = ["DAMPER_LEVELS", "FADE_S", "KeyData", "Instrument"]

from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import NDArray

from ..physics.constants import T60_LN
from ..tone.tables import KeyTable, ModalTables
from ..tone.velocity import hammer_speed
from .bank import PartialTables, partial_tables
from .sympathy import Answers, sympathetic_answers

#: Damper engagement is quantised to this many steps (half pedal); level 0 is free.
DAMPER_LEVELS = 8
#: Time for a stolen or silenced voice to fall 60 dB: short, but no click.
FADE_S = 0.012


@dataclass(frozen=True, eq=False)
class KeyData:
    """One key of a voicing state, ready to copy."""

    key: int
    freq_hz: NDArray[np.float64]
    damped: bool
    levels: tuple[PartialTables, ...]  # damper engagement 0..DAMPER_LEVELS, then the fade
    amplitude: NDArray[np.complex128]  # (128, n): row v is MIDI velocity v (row 0 unused)
    una_corda_gain: NDArray[np.float64]  # (n,): the spectral change, where there is no una corda blow
    una_corda_amplitude: NDArray[np.complex128] | None = None  # (128, n): the una corda blow
    #: The key struck while the sustain pedal lifts the dampers: these entries, then the
    #: other keys' strings that answer them (:mod:`voicer.engine.sympathy`).
    sympathetic: "KeyData | None" = None
    answers: Answers | None = None
    #: The same with the sustain pedal up: only the strings without dampers answer.
    free_sympathetic: "KeyData | None" = None
    free_answers: Answers | None = None

    @property
    def fade(self) -> PartialTables:
        return self.levels[-1]


class Instrument:
    """Every key of one voicing state, precomputed for a sample rate and block size.

    Parameters
    ----------
    tables : ModalTables
        The state's tables (all keys).
    sample_rate : float
        Output sample rate (the tables' partials must lie below its Nyquist limit).
    max_block : int
        Longest block the bank renders.
    split : int
        Rows of the bank's block matrix.
    name : str
        Shown in the status line ("A", "B").
    """

    def __init__(self, tables: ModalTables, *, sample_rate: float, max_block: int, split: int, name: str = "A") -> None:
        preset = tables.preset
        inst = preset.instrument
        self.name = name
        self.preset = preset
        self.max_block, self.split = int(max_block), int(split)
        self.sample_rate = float(sample_rate)
        self.last_damped_key = int(inst["last_damped_key"])
        self.half_pedal = (int(inst["half_pedal_low_cc"]), int(inst["half_pedal_high_cc"]))
        self._speeds = hammer_speed(np.arange(1, 128), inst)
        una = tables.una_corda or {}
        answers = sympathetic_answers(tables)
        free = sympathetic_answers(tables, answering=[k for k in tables.keys if k > self.last_damped_key])
        self.keys: dict[int, KeyData] = {key: self.key_data(table, una=una.get(key), answers=answers[key],
                                                            free_answers=free[key])
                                          for key, table in tables.keys.items()}
        self.max_partials = max(len(d.freq_hz) for k in self.keys.values()
                                for d in (k, k.sympathetic, k.free_sympathetic) if d is not None)

    def key_data(self, table: KeyTable, *, una: KeyTable | None = None, like: KeyData | None = None,
                 answers: Answers | None = None, free_answers: Answers | None = None) -> KeyData:
        """One key's data from its table and that of its una corda blow (allocates: off
        the audio thread).

        With ``like``, a key of this state whose partials have the same frequencies and
        decay rates (a change of the hammer only: felt, mass, strike point), its damper
        and fade tables are shared instead of recomputed; a voice already sounding on
        ``like`` then keeps exactly its partials when a damper falls on it. Without ``una``
        (a live rebuild of the normal blow only), ``like``'s una corda blow is scaled by
        the change of the normal one, entry by entry (within 20 dB). ``answers`` (default:
        ``like``'s; a hammer change leaves the partials' frequencies alone) are the other
        keys' modes that answer this key with the dampers lifted, ``free_answers`` those of
        the keys without dampers, which answer whatever the pedal.
        """
        data = self._key_data(table, una=una, like=like)
        answers = answers if answers is not None else (like.answers if like is not None else None)
        free = free_answers if free_answers is not None else (like.free_answers if like is not None else None)
        return replace(data, answers=answers, free_answers=free,
                       sympathetic=self._answered(data, table, answers, like.sympathetic if like else None),
                       free_sympathetic=self._answered(data, table, free,
                                                       like.free_sympathetic if like else None))

    def _answered(self, data: KeyData, table: KeyTable, answers: Answers | None,
                  like: KeyData | None) -> KeyData | None:
        """The key's entries followed by the answering modes of other keys (None without
        any). An answering mode keeps its own string's damper: none above
        ``last_damped_key``, else its key's rate (lifted with the dampers by the pedal)."""
        if answers is None or not len(answers.freq_hz) or answers.coupling.shape[0] != len(table.freq_hz):
            return None
        c = answers.coupling
        freq = np.concatenate([table.freq_hz, answers.freq_hz])
        scale = self.preset.scale
        own = np.full(len(table.freq_hz), float(scale.value("damper_rate_per_s", table.key)))
        theirs = np.array([float(scale.value("damper_rate_per_s", int(k))) if k <= self.last_damped_key else 0.0
                           for k in answers.keys])
        levels = self._levels(freq, np.concatenate([table.sigma_per_s, answers.sigma_per_s]),
                              np.concatenate([own, theirs]), like)

        def extend(rows: NDArray[np.complex128]) -> NDArray[np.complex128]:
            return np.concatenate([rows * (1.0 + c.sum(axis=1)), -(rows @ c)], axis=1)

        return KeyData(key=table.key, freq_hz=freq, damped=data.damped, levels=levels,
                       amplitude=extend(data.amplitude),
                       una_corda_gain=np.concatenate([data.una_corda_gain, np.ones(len(answers.freq_hz))]),
                       una_corda_amplitude=(extend(data.una_corda_amplitude) if data.una_corda_amplitude is not None
                                            else None))

    def _levels(self, freq_hz: NDArray[np.float64], sigma_per_s: NDArray[np.float64],
                damper_per_s: NDArray[np.float64] | float, like: KeyData | None) -> tuple[PartialTables, ...]:
        """Damper and fade tables of entries with these frequencies, decay rates and
        damper rates (``like``'s when they are the same)."""
        free = (-sigma_per_s + 2j * np.pi * freq_hz) / self.sample_rate
        if like is not None and np.array_equal(like.levels[0].lam, free):
            return like.levels
        built = []
        for level in range(DAMPER_LEVELS + 1):
            sigma = sigma_per_s + damper_per_s * level / DAMPER_LEVELS
            built.append(partial_tables((-sigma + 2j * np.pi * freq_hz) / self.sample_rate,
                                        split=self.split, max_block=self.max_block))
        fade_sigma = sigma_per_s + T60_LN / FADE_S
        built.append(partial_tables((-fade_sigma + 2j * np.pi * freq_hz) / self.sample_rate,
                                    split=self.split, max_block=self.max_block))
        return tuple(built)

    def _key_data(self, table: KeyTable, *, una: KeyTable | None, like: KeyData | None) -> KeyData:
        key = table.key
        inst = self.preset.instrument
        damper = float(self.preset.scale.value("damper_rate_per_s", key))
        levels = self._levels(table.freq_hz, table.sigma_per_s, damper, like)
        amp = np.zeros((128, len(table.freq_hz)), dtype=np.complex128)
        amp[1:] = table.at_speeds(self._speeds)
        octaves = np.log2(table.freq_hz / table.freq_hz[0])
        gain = 10.0 ** ((inst["una_corda_level_db"] + inst["una_corda_tilt_db_per_octave"] * octaves) / 20.0)
        una_amp = None
        if una is not None and len(una.freq_hz) == len(table.freq_hz):
            una_amp = np.zeros_like(amp)
            una_amp[1:] = una.at_speeds(self._speeds)
        elif like is not None and like.una_corda_amplitude is not None and like.amplitude.shape == amp.shape:
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(np.abs(like.amplitude) > 0, np.abs(amp) / np.abs(like.amplitude), 1.0)
            una_amp = like.una_corda_amplitude * np.clip(ratio, 0.1, 10.0)
        return KeyData(key=key, freq_hz=table.freq_hz, damped=key <= self.last_damped_key, levels=levels,
                       amplitude=amp, una_corda_gain=gain, una_corda_amplitude=una_amp)

    def damper_level(self, sustain_cc: int) -> int:
        """Damper engagement level of a released key at a sustain-pedal value (0..127)."""
        lo, hi = self.half_pedal
        engaged = min(max((hi - sustain_cc) / (hi - lo), 0.0), 1.0)
        return int(round(engaged * DAMPER_LEVELS))
