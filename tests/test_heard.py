"""What the listener hears of a key: the unison coupled at the bridge, then the
soundboard's static gain per entry (voicer.physics.body, checked in test_body.py)."""

from __future__ import annotations

import numpy as np
import pytest

from voicer.errors import PresetError
from voicer.physics.body import BodyModel, body_gain
from voicer.tone.preset import parse_preset
from voicer.tone.tables import build_tables
from voicer.tone.unison import couple_unison, heard


def with_body(demo, **fields):
    data = demo.to_dict()
    data["instrument"].update({"body": "modal", **{f"body_{k}": v for k, v in fields.items()}})
    return parse_preset(data, source="with a body")


def test_the_body_multiplies_each_entry_by_its_gain(demo):
    p = with_body(demo, seed=7, mode_spacing_hz=30.0)
    raw = build_tables(p, keys=[40, 60])
    for key in (40, 60):
        coupled = couple_unison(raw[key], p)
        out = heard(raw[key], p)
        model = BodyModel.from_fields(p.instrument)
        assert (model.seed, model.mode_spacing_hz) == (7, 30.0)  # the preset's fields reach the model
        gain = body_gain(coupled.freq_hz, model)
        np.testing.assert_allclose(out.amplitude_n, coupled.amplitude_n * gain[None, None, :], rtol=1e-12)
        np.testing.assert_array_equal(out.freq_hz, coupled.freq_hz)
        np.testing.assert_array_equal(out.sigma_per_s, coupled.sigma_per_s)  # static: the decays stay
    # No body: the coupled table as it is.
    data = demo.to_dict()
    data["instrument"]["body"] = "none"
    bare = parse_preset(data, source="no body")
    np.testing.assert_array_equal(heard(raw[60], bare).amplitude_n, couple_unison(raw[60], bare).amplitude_n)


def test_body_fields_are_checked_on_load(demo):
    with pytest.raises(PresetError, match="highest_mode_hz"):
        with_body(demo, lowest_mode_hz=500.0, highest_mode_hz=100.0)
    with pytest.raises(PresetError, match="body_loss_factor"):
        with_body(demo, loss_factor=0.9)
