"""Sympathetic resonance: with the dampers lifted, the strings of other keys answer the
partials of a struck key that lie near their own.

Every string shares the bridge, so a sounding partial ``A exp(L_p t)`` (``L = -sigma + i
omega``) drives each free string mode ``m`` of another key weakly, ``x' = L_m x + k A
exp(L_p t)``, and from rest that mode answers ::

    x(t) = k A (exp(L_p t) - exp(L_m t)) / (L_p - L_m)

(the weak-coupling limit of the unison's coupling matrix, :mod:`voicer.physics.unison`,
for two strings of different keys; Weinreich 1977). The first term rides at the driving
partial's frequency and decay; the second is the answering string ringing at its own,
which outlasts the partial that woke it when its own loss is lower. A mode answers
strongly only within a few bandwidths of the driving partial: the response falls as
``|k| / |L_p - L_m|``, so only pairs above :data:`~voicer.tone.params` field
``sympathetic_floor_db`` are kept, and per key at most ``sympathetic_max_entries``
answering modes (the strongest), within the engine's real-time budget.

The coupling is resistive, ``k = -s sqrt(eta_p eta_m)``, with ``eta = r sigma`` each
string's bridge loss (``bridge_loss_fraction`` r) and ``s`` the instrument's
``sympathetic_coupling``, the part of a unison's own coupling that reaches the strings of
another key along the bridge (0 switches the resonance off).

The answers are computed when a state is prepared: a strike made while the sustain pedal
lifts the dampers plays its key's entries followed by the answering modes of the other
keys (one extra entry each), so a note-on costs nothing more than its entries; with the
pedal up, only the strings without dampers (above ``last_damped_key``) answer. An
answering mode keeps its own string's damper (none for the undamped strings), engaged
with the struck voice's: right once the key is released (the pedal damps both), a little
long while it is held and the pedal comes up.
"""

from __future__ import annotations

__all__ = ["Answers", "sympathetic_answers"]

from dataclasses import dataclass
from typing import Iterable

import numpy as np
from numpy.typing import NDArray

from ..tone.tables import ModalTables


@dataclass(frozen=True)
class Answers:
    """The other keys' modes that answer one key's entries.

    Attributes
    ----------
    freq_hz, sigma_per_s : ndarray (m,)
        Frequency and decay rate of each answering mode.
    keys : ndarray of int (m,)
        The key each answering mode belongs to.
    coupling : ndarray complex (n, m)
        ``k / (L_p - L_m)`` for source entry p and answering mode m (0 where the pair is
        below the floor): a source amplitude ``A`` adds ``-A @ coupling`` to the
        answering modes and ``(coupling).sum(axis=1) * A`` to the source entries.
    """

    freq_hz: NDArray[np.float64]
    sigma_per_s: NDArray[np.float64]
    keys: NDArray[np.int64]
    coupling: NDArray[np.complex128]


def _bridge_loss(tables: ModalTables, key: int) -> NDArray[np.float64]:
    t = tables[key]
    return float(tables.preset.scale.value("bridge_loss_fraction", key)) * t.sigma_per_s


def sympathetic_answers(tables: ModalTables, *, answering: Iterable[int] | None = None) -> dict[int, Answers]:
    """Per key, the answering modes of the other keys (of ``answering``, default all) and
    their couplings (empty where ``sympathetic_coupling`` is 0 or no pair reaches the
    floor)."""
    inst = tables.preset.instrument
    s = float(inst["sympathetic_coupling"])
    keys = sorted(tables.keys)
    resonators = keys if answering is None else sorted(set(answering) & set(keys))
    empty = {k: Answers(np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.int64),
                        np.zeros((len(tables[k].freq_hz), 0), dtype=np.complex128)) for k in keys}
    if s == 0.0 or not resonators:
        return empty
    floor = 10.0 ** (float(inst["sympathetic_floor_db"]) / 20.0)
    cap = int(inst["sympathetic_max_entries"])
    freq = np.concatenate([tables[k].freq_hz for k in resonators])
    sigma = np.concatenate([tables[k].sigma_per_s for k in resonators])
    eta = np.concatenate([_bridge_loss(tables, k) for k in resonators])
    owner = np.concatenate([np.full(len(tables[k].freq_hz), k) for k in resonators])
    order = np.argsort(freq)
    freq, sigma, eta, owner = freq[order], sigma[order], eta[order], owner[order]
    lam = -sigma + 2j * np.pi * freq
    eta_max = float(eta.max())
    out = {}
    for k in keys:
        t = tables[k]
        src_lam = -t.sigma_per_s + 2j * np.pi * t.freq_hz
        src_eta = _bridge_loss(tables, k)
        # |c| = |k| / |L_p - L_m| >= floor needs |f_p - f_m| <= s sqrt(eta_p eta_m) / (2 pi floor).
        reach = s * np.sqrt(src_eta * eta_max) / (2.0 * np.pi * floor)
        lo = np.searchsorted(freq, t.freq_hz - reach, side="left")
        hi = np.searchsorted(freq, t.freq_hz + reach, side="right")
        counts = hi - lo
        src = np.repeat(np.arange(len(t.freq_hz)), counts)
        res = lo[src] + np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
        other = owner[res] != k
        src, res = src[other], res[other]
        c = -s * np.sqrt(src_eta[src] * eta[res]) / (src_lam[src] - lam[res])
        # Beyond the weak coupling (|c| near 1) the two would have to be solved together;
        # such pairs are nearly unisons of different keys and rare: their answer is capped.
        c = np.where(np.abs(c) > 0.5, c * (0.5 / np.abs(c)), c)
        strong = np.abs(c) >= floor
        src, res, c = src[strong], res[strong], c[strong]
        if not len(c):
            out[k] = empty[k]
            continue
        # The strongest answers at a mezzo-forte blow, at most ``cap`` of them.
        level = np.abs(t.amplitude_n[len(t.speeds_m_s) // 2].sum(axis=0))
        modes, where = np.unique(res, return_inverse=True)
        score = np.zeros(len(modes))
        np.maximum.at(score, where, level[src] * np.abs(c))
        keep = np.sort(np.argsort(-score)[:cap])
        column = np.full(len(modes), -1)
        column[keep] = np.arange(len(keep))
        coupling = np.zeros((len(t.freq_hz), len(keep)), dtype=np.complex128)
        kept = column[where] >= 0
        np.add.at(coupling, (src[kept], column[where][kept]), c[kept])
        m = modes[keep]
        out[k] = Answers(freq_hz=freq[m], sigma_per_s=sigma[m], keys=owner[m].astype(np.int64), coupling=coupling)
    return out
