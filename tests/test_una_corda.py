"""The una corda blow, physically: the shifted hammer misses a string of each unison and
meets the others with softer felt; the struck and the unstruck strings then share the
bridge (voicer.tone.unison), and the engine plays that blow while the pedal is down."""

from __future__ import annotations

import mido
import numpy as np

from voicer.engine.bank import DEFAULT_SPLIT
from voicer.engine.instrument import Instrument
from voicer.engine.models import PhysicalModel
from voicer.engine.renderer import Renderer
from voicer.report.spectrum import spectral_centroid_hz
from voicer.tone.tables import TableSettings, build_tables
from voicer.tone.unison import couple_unison

FS = 48_000
KEYS = (25, 40, 60)  # one string, two, three (the demo: single strings to E1, bichords to A2)


def test_the_shifted_hammer_misses_the_first_string(demo):
    normal = build_tables(demo, keys=KEYS)
    shifted = build_tables(demo, keys=KEYS, una_corda=True)
    for key in KEYS:
        n, u = normal[key].amplitude_n, shifted[key].amplitude_n
        assert n.shape == u.shape
        strings = n.shape[1]
        if strings > 1:
            # string 1 (bass side) rests; the others are struck (common practice: the
            # action shifts toward the treble).
            assert np.all(u[:, 0] == 0) and np.all(np.abs(u[:, 1:]).max(axis=-1) > 0)
        # Fewer strings and softer felt: a quieter, darker blow at every layer (common
        # practice for the soft pedal).
        for layer in range(n.shape[0]):
            a, b = n[layer].sum(axis=0), u[layer].sum(axis=0)
            assert np.sum(np.abs(b) ** 2) < np.sum(np.abs(a) ** 2), (key, layer)
            f = normal[key].freq_hz
            assert spectral_centroid_hz(f, b) < spectral_centroid_hz(f, a), (key, layer)


def test_a_single_string_is_still_struck_only_the_felt_changes(demo):
    # A single string is still struck; only the felt changes (una_corda_felt_factor).
    key = 25
    same = demo.with_key_values(key, {"una_corda_felt_factor": 1.0})
    plain = build_tables(same, keys=[key])[key].amplitude_n
    np.testing.assert_allclose(build_tables(same, keys=[key], una_corda=True)[key].amplitude_n, plain, rtol=1e-12)


def test_the_unstruck_string_rings_through_the_bridge(demo):
    # Weinreich 1977 (section V, on the soft pedal; from memory): striking two of three
    # coupled strings is an unsymmetric blow that feeds the slowly decaying modes, so the
    # una corda tone has a stronger aftersound than the normal, symmetric blow.
    key = 60
    p = demo.with_key_values(key, {"bridge_loss_fraction": 0.6, "mistune_3_cents": 0.3})
    normal = couple_unison(build_tables(p, keys=[key])[key], p)
    shifted = couple_unison(build_tables(p, keys=[key], una_corda=True)[key], p)
    np.testing.assert_array_equal(normal.freq_hz, shifted.freq_hz)  # the same strings, the same modes
    slow = normal.sigma_per_s[:3] < normal.sigma_per_s[:3].max()  # partial 1: the modes other than the prompt
    layer = 8

    def share(t):
        a = np.abs(t.amplitude_n[layer, 0, :3])
        return np.sum(a[slow] ** 2) / np.sum(a**2)

    assert share(shifted) > 3 * share(normal)  # 35 times here (5 times with the demo's own unison)


def test_the_engine_plays_the_una_corda_blow_while_the_pedal_is_down(demo):
    p = demo.with_key_values(60, {"bridge_loss_fraction": 0.5, "mistune_3_cents": 0.3})
    tables = PhysicalModel().build(p, settings=TableSettings())
    assert tables.una_corda is not None and set(tables.una_corda) == set(tables.keys)
    inst = Instrument(tables, sample_rate=FS, max_block=256, split=DEFAULT_SPLIT)
    data = inst.keys[60]
    np.testing.assert_allclose(data.una_corda_amplitude[1:], tables.una_corda[60].at_speeds(inst._speeds))

    def render(pedal: bool) -> np.ndarray:
        r = Renderer([inst], gain_db=-40.0)
        out = np.zeros((2, FS // 2), dtype=np.float32)
        events = ([(0, mido.Message("control_change", control=67, value=127))] if pedal else []) + \
            [(1, mido.Message("note_on", note=60, velocity=90))]
        for pos in range(0, out.shape[1], 256):
            r.process(out[:, pos:pos + 256], events if pos == 0 else [])
        return out[0].astype(np.float64)

    plain, soft = render(False), render(True)
    assert np.sqrt(np.mean(soft**2)) < np.sqrt(np.mean(plain**2))
    # What was rendered is the una corda row of the table: the first 10 ms, where no
    # damper or pedal has acted, against the sum of its entries.
    t = np.arange(480) / FS
    row = data.una_corda_amplitude[90]
    lam = -tables.una_corda[60].sigma_per_s + 2j * np.pi * tables.una_corda[60].freq_hz
    expected = 10 ** (-40 / 20) * np.real(np.exp(np.outer(t, lam)) @ row)
    np.testing.assert_allclose(soft[1:481], expected, atol=2e-3 * np.abs(expected).max())
