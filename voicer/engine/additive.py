"""Additive model plugin: the measured partials of a fitted preset, replayed by the engine.

A key with a ``[measured.K]`` table (:mod:`voicer.tone.measured`) is played from its
recorded partials: each stage of each partial becomes one oscillator-bank entry (two at
the same frequency for a partial with prompt sound and aftersound). Keys without one get
the physical model's tables of the preset, which the fitted preset interpolates.

The physical model still decides what changes. With ``P_x(v)[n]`` its complex amplitude
of partial ``n`` at hammer speed ``v`` (summed over the unison), for the preset being
played (``now``) and for the preset with the key's fitted values restored (``ref``,
:attr:`~voicer.tone.preset.Preset.fit_reference`), an entry's amplitude at layer speed
``v`` is ::

    measured amplitude * |P_ref(v) / P_ref(s)| * |P_now(v) / P_ref(v)|, phase of P_now(v)

where ``s`` is the strike's measured speed: the first factor follows the model's hammer
spectrum to other speeds, the second is the voicing change (the ratio of predicted
spectra after/before). An unvoiced fitted preset therefore replays the recording exactly
at the measured speed. Frequencies and decay rates follow the same way, by the ratios of
the predicted ones (1 unless a plan changes tuning or loss fields).

The voicing factor is held within +-:data:`VOICING_GAIN_LIMIT_DB`. Where the model has a
partial in a null (the strike-point notch ``sin(n pi beta) ~ 0``, or a dip of the felt
pulse's spectrum), a small shift of the null makes the predicted ratio huge, while the
real piano's null sits a little elsewhere and its recorded partial is not in it; voicing
a hammer moves a partial by a few dB, so 20 dB leaves every real change intact and stops
a null of the model from blowing up (or wiping out) a partial of the recording. The
speed factor is not limited (from 0.5 to 6 m/s the model's upper partials rise by 50 dB
and more): at a fixed strike point the notch scales a partial at every speed alike, so
that ratio stays well defined. Only at an exact node of the model (zero coupling, e.g. a
strike ratio of exactly 1/8 for partial 8) is there no ratio to read; the model's
log-magnitude is then interpolated over n from the neighbouring partials.
"""

from __future__ import annotations

__all__ = ["VOICING_GAIN_LIMIT_DB", "AdditiveModel", "additive_table"]

from dataclasses import replace

import numpy as np
from numpy.typing import NDArray

from ..errors import ParameterError
from ..physics.strings import NYQUIST_FRACTION
from ..tone.measured import MeasuredKey
from ..tone.params import ENGINE_ONLY_FIELDS
from ..tone.preset import Preset
from ..tone.tables import KeyTable, ModalTables, TableSettings, build_tables
from ..tone.unison import couple_tables, heard

#: Largest change, in dB either way, that a voicing applies to a measured partial.
VOICING_GAIN_LIMIT_DB = 20.0

_FLOOR = 1e-12  # magnitudes below this fraction of a table's largest count as this (as KeyTable.at_speeds does)
_NODE = 1e-9  # below this fraction a partial is at a node of the model (real notches are > 1e-8)


def additive_table(measured: MeasuredKey, now: KeyTable, ref: KeyTable, *, sample_rate_hz: float,
                   limit_db: float = VOICING_GAIN_LIMIT_DB) -> KeyTable:
    """The table of one measured key.

    Parameters
    ----------
    measured : MeasuredKey
        The recorded strike.
    now, ref : KeyTable
        The physical model's table of the key for the preset being played and for the
        preset with the key's fitted values restored (the same table when unvoiced);
        both with the same velocity layers, which become this table's.
    sample_rate_hz : float > 0
        Entries at or above ``0.45`` of it are dropped.
    limit_db : float >= 0
        Bound on the voicing factor in dB (see the module notes).

    Notes
    -----
    A measured partial beyond the model's table (a higher number than it predicts below
    the band limit or its partial cap) takes the ratios of the model's highest partial.
    If the model has no partial below the band limit (the top keys at sample rates below
    about 9.3 kHz), the key gets the model's (empty) table. The contact figures
    (duration, peak force, rebound) are those of ``now``.
    """
    if not np.array_equal(now.speeds_m_s, ref.speeds_m_s):
        raise ParameterError(f"key {measured.key}: the tables have different velocity layers")
    count = min(len(now.freq_hz), len(ref.freq_hz))
    if count == 0:
        return now  # the model has no partial below the band limit: no ratio to scale by
    e = measured.entries()
    idx = np.minimum(e.n, count) - 1
    speed_gain, voicing_gain = _log_gains(now, ref, count, measured.speed_m_s, limit_db)
    p_now = now.amplitude_n.sum(axis=1)[:, idx]
    amp = e.amplitude_n * np.exp(speed_gain[:, idx] + voicing_gain[:, idx] + 1j * np.angle(p_now))
    freq = e.freq_hz * (now.freq_hz[idx] / ref.freq_hz[idx])
    sigma = e.sigma_per_s * (now.sigma_per_s[idx] / ref.sigma_per_s[idx])
    keep = freq < NYQUIST_FRACTION * sample_rate_hz
    return KeyTable(key=measured.key, speeds_m_s=now.speeds_m_s.copy(), freq_hz=freq[keep], sigma_per_s=sigma[keep],
                    amplitude_n=amp[:, None, keep], contact_s=now.contact_s.copy(),
                    peak_force_n=now.peak_force_n.copy(), rebound_m_s=now.rebound_m_s.copy(),
                    contacts=now.contacts.copy())


def _log_magnitudes(table: KeyTable, count: int) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Log-magnitudes of the first ``count`` partials at each layer (floored like
    KeyTable.at_speeds), and which partials are at a node at some layer."""
    mag = np.abs(table.amplitude_n.sum(axis=1)[:, :count])
    top = max(float(mag.max()), 1e-300)
    return np.log(np.maximum(mag, _FLOOR * top)), (mag < _NODE * top).any(axis=0)


def _fill(log_mag: NDArray[np.float64], where: NDArray[np.bool_]) -> None:
    """Replace the columns ``where`` by interpolation over n from the others, in place."""
    if where.any() and not where.all():
        n = np.arange(log_mag.shape[1])
        for row in log_mag:
            row[where] = np.interp(n[where], n[~where], row[~where])


def _log_gains(now: KeyTable, ref: KeyTable, count: int, speed_m_s: float,
               limit_db: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Natural-log speed and voicing factors of the first ``count`` modelled partials, (L, count).

    A partial at a node of the reference (exactly zero coupling, e.g. a strike ratio of
    exactly 1/8 for partial 8: rounding noise some 19 decades below the loudest partial)
    has no ratio to read. The recorded partial is not in a node, so the reference there is
    replaced by its log-magnitude interpolated over n from the neighbours, and so is the
    voiced model where it has the same node (a node only of the voiced model is a real
    prediction: the partial vanishes, down to the limit).
    """
    log_ref, node_ref = _log_magnitudes(ref, count)
    log_now, node_now = _log_magnitudes(now, count)
    _fill(log_ref, node_ref)
    _fill(log_now, node_ref & node_now)
    # The reference at the measured speed, interpolated across the layers as the engine
    # does (KeyTable.at_speed on the same magnitudes), so an unvoiced replay is exact there.
    filled = replace(ref, freq_hz=ref.freq_hz[:count], sigma_per_s=ref.sigma_per_s[:count],
                     amplitude_n=np.exp(log_ref)[:, None, :])
    log_ref_s = np.log(np.abs(filled.at_speed(speed_m_s)))
    limit = limit_db * np.log(10.0) / 20.0
    return log_ref - log_ref_s, np.clip(log_now - log_ref, -limit, limit)


def _same_key_values(a: Preset, b: Preset, key: int) -> bool:
    i = a.scale.index(key)
    return all(np.array_equal(a.resolved[name][i], b.resolved[name][i], equal_nan=True)
               for name in a.resolved if name not in ENGINE_ONLY_FIELDS)


class AdditiveModel:
    """``voicer.models`` entry ``additive``: measured partials where the preset has them,
    the physical model elsewhere; a voicing change shapes the measured partials by the
    ratio of the physical model's spectra after/before."""

    name = "additive"

    def build(self, preset: Preset, *, settings: TableSettings, progress: bool = False) -> ModalTables:
        """Tables for every key (the physical ones through the table cache)."""
        physical = build_tables(preset, settings=settings, progress=progress)
        measured = {k: m for k, m in preset.measured.items() if k in physical.keys}
        una = build_tables(preset, settings=settings, progress=progress, una_corda=True,
                           keys=[k for k in physical.keys if k not in measured])
        if not measured:
            return couple_tables(physical, una)
        reference = preset.fit_reference
        # Keys whose values the plan left alone are their own reference.
        changed = [k for k in measured if not _same_key_values(preset, reference, k)]
        refs = build_tables(reference, settings=settings, keys=changed, progress=progress) if changed else None
        # A recording holds its unison's double decay already; the other keys get it from the model.
        keys = {k: t if k in measured else heard(t, preset) for k, t in physical.keys.items()}
        for k, m in measured.items():
            ref = refs[k] if refs is not None and k in changed else physical[k]
            keys[k] = additive_table(m, physical[k], ref, sample_rate_hz=settings.sample_rate_hz)
        computed = sorted(set(physical.computed) | set(refs.computed if refs is not None else ()))
        # A recorded key has no una corda blow of its own: the engine shapes its spectrum
        # by the instrument's una corda level and tilt.
        return ModalTables(preset=preset, settings=settings, keys=keys, computed=tuple(computed),
                           cached=tuple(k for k in physical.keys if k not in computed),
                           una_corda={k: heard(t, preset) for k, t in una.keys.items()})
