"""The heard partials of a key: its strings' blow (a modal table) through the coupling of
the unison at the bridge (:mod:`voicer.physics.unison`, Weinreich 1977), then through
the soundboard's radiation (:mod:`voicer.physics.body`), a static gain per entry.

A key's modal table gives, per partial, each string's bridge-force amplitude after the
blow, all strings at the key's frequencies and decay rates. Here every partial of a
unison becomes the modes of its coupling matrix: per string (and per polarization) one
bank entry, with the mode's frequency, decay rate and bridge-force amplitude, so double
decay and beats come from the physics and cost the engine nothing beyond the entries.

Per key, from the preset:

- ``mistune_<s>_cents``: string s's own tuning against the key's (all its partials).
- ``bridge_loss_fraction`` r: the part of a single string's decay rate ``sigma_n`` (the
  ``loss_b1_per_s`` / ``loss_b3_s`` rate) that goes into the bridge, ``eta_n = r sigma_n``;
  the rest, ``(1 - r) sigma_n``, is the string's own. A single string decays at
  ``sigma_n`` whatever r; N strings in phase at ``sigma_n (1 + (N - 1) r)``; the modes
  that leave the bridge still at ``(1 - r) sigma_n``.
- ``bridge_reactance_ratio``: ``chi_n / eta_n`` (the bridge's reactive part, which
  pushes the modes' frequencies apart).
- With ``[instrument] polarizations = 2``: ``polarization_split_cents`` (the horizontal
  modes' tuning against the vertical), ``horizontal_coupling`` h and
  ``polarization_coupling`` x (the horizontal motion's bridge term and the
  vertical-horizontal one, as fractions of the vertical's; ``x^2 <= h`` keeps every
  mode decaying).

The blow itself (the contact simulation) sees the key's nominal tuning on every string:
a few cents change nothing in a contact of a few milliseconds.
"""

from __future__ import annotations

__all__ = ["UNISON_FIELDS", "is_coupled", "couple_unison", "radiate", "heard", "couple_tables"]

import functools
from dataclasses import replace

import numpy as np

from ..errors import ParameterError
from ..physics.body import BodyModel, BodyModes, body_modes, modal_sum
from ..physics.unison import coupled_modes, heard_amplitudes, unison_matrix
from .preset import Preset
from .tables import KeyTable, ModalTables

#: The per-key fields read here (the modal tables do not depend on them).
UNISON_FIELDS = ("mistune_1_cents", "mistune_2_cents", "mistune_3_cents", "bridge_loss_fraction",
                 "bridge_reactance_ratio", "polarization_split_cents", "horizontal_coupling",
                 "polarization_coupling")


def _values(preset: Preset, key: int) -> dict[str, float]:
    return {name: float(preset.scale.value(name, key)) for name in UNISON_FIELDS}


def is_coupled(preset: Preset, key: int) -> bool:
    """Whether the key's partials split into modes: a bridge that couples its strings, a
    mistuned string, or a second polarization."""
    v = _values(preset, key)
    strings = int(preset.scale.value("strings", key))
    mistuned = any(v[f"mistune_{s}_cents"] != 0.0 for s in range(1, strings + 1))
    return (preset.instrument["polarizations"] == 2 or mistuned
            or (strings > 1 and v["bridge_loss_fraction"] > 0.0))


@functools.lru_cache(maxsize=8)
def _body_modes(model: BodyModel) -> BodyModes:
    return body_modes(model)


def radiate(table: KeyTable, preset: Preset) -> KeyTable:
    """The table through the preset's soundboard (``[instrument] body = "modal"``): each
    entry's amplitude times the body's complex gain at its frequency
    (:mod:`voicer.physics.body`), or the table as it is (``body = "none"``)."""
    if preset.instrument["body"] != "modal":
        return table
    gain = modal_sum(table.freq_hz, _body_modes(BodyModel.from_fields(preset.instrument)))
    return replace(table, amplitude_n=table.amplitude_n * gain[None, None, :])


def heard(table: KeyTable, preset: Preset) -> KeyTable:
    """A key's modal table as the listener hears it: the unison coupled at the bridge
    (:func:`couple_unison`), then radiated by the soundboard (:func:`radiate`)."""
    return radiate(couple_unison(table, preset), preset)


def couple_unison(table: KeyTable, preset: Preset) -> KeyTable:
    """The heard table of one key: one entry per mode of each partial's unison (partial by
    partial; string by string, vertical then horizontal), amplitudes (layers, 1, modes).

    A key that :func:`is_coupled` says is not gets its strings summed (one entry per
    partial, the sound unchanged).

    Raises
    ------
    ParameterError
        A bridge that would feed a mode instead of damping it (``polarization_coupling``
        squared above ``horizontal_coupling``).
    """
    key = table.key
    total = table.amplitude_n.sum(axis=1, keepdims=True)
    if not is_coupled(preset, key):
        return replace(table, amplitude_n=total)
    v = _values(preset, key)
    strings = table.amplitude_n.shape[1]
    polarizations = int(preset.instrument["polarizations"])
    if polarizations == 2 and v["polarization_coupling"] ** 2 > v["horizontal_coupling"]:
        # A passive bridge takes energy from every motion: its resistive terms
        # [[1, x], [x, h]] must not have a negative eigenvalue, else some mode could grow.
        raise ParameterError(f"key {key}: a mode of the unison would not lose energy to the bridge: "
                             f"polarization_coupling {v['polarization_coupling']:g} needs its square <= "
                             f"horizontal_coupling {v['horizontal_coupling']:g}")
    r = v["bridge_loss_fraction"] if strings > 1 or polarizations == 2 else 0.0
    sigma = table.sigma_per_s
    eta = r * sigma
    omega = 2.0 * np.pi * table.freq_hz
    tune = 2.0 ** (np.array([v[f"mistune_{s}_cents"] for s in range(1, strings + 1)]) / 1200.0)
    tuned, loss = omega[:, None] * tune[None, :], 1j * ((1.0 - r) * sigma)[:, None]  # (N, S), (N, 1)
    own = tuned + loss
    own_h = tuned * 2.0 ** (v["polarization_split_cents"] / 1200.0) + loss
    z = eta * (v["bridge_reactance_ratio"] + 1j)
    matrix = unison_matrix(own, z, polarizations=polarizations, horizontal=v["horizontal_coupling"],
                           cross=v["polarization_coupling"], own_horizontal=own_h)
    lam, vec = coupled_modes(matrix)  # (N, M), (N, M, M)
    excitation = table.amplitude_n.transpose(2, 0, 1)  # (N, L, S)
    amp = heard_amplitudes(vec, excitation, heard=strings)  # (N, L, M)
    n, layers, m = amp.shape
    return replace(table, freq_hz=(lam.real / (2.0 * np.pi)).reshape(n * m), sigma_per_s=lam.imag.reshape(n * m),
                   amplitude_n=amp.transpose(1, 0, 2).reshape(layers, 1, n * m))


def couple_tables(tables: ModalTables, una_corda: ModalTables | None = None) -> ModalTables:
    """Every key of a preset's tables as :func:`heard`, with the una corda blows' tables
    (of the same preset and keys) beside them."""
    preset = tables.preset
    una = ({k: heard(t, preset) for k, t in una_corda.keys.items()} if una_corda is not None
           else tables.una_corda)
    return ModalTables(preset=preset, settings=tables.settings,
                       keys={k: heard(t, preset) for k, t in tables.keys.items()},
                       computed=tables.computed, cached=tables.cached, una_corda=una)
