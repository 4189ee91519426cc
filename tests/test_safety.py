"""The safety stage's curve: identity below the knee, the documented tanh law above it,
monotone, continuous, odd, never above the ceiling; non-finite samples zeroed and counted.

References: the law written in voicer/engine/safety.py's docstring, computed here again
sample by sample with :func:`math.tanh`; the default ceiling of -1 dBFS from issue 4
(renderer: "soft limiter below a hard ceiling (default -1 dBFS)"); dBFS as 20 log10 of
the magnitude re full scale 1.0 (common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from voicer.engine.safety import DEFAULT_CEILING_DBFS, SafetyStage
from voicer.errors import ParameterError

CEILING = 10 ** (-1 / 20)  # -1 dBFS (issue 4)
KNEE = CEILING * 10 ** (-6 / 20)  # the default knee, 6 dB under the ceiling (safety.py)


def limited(x, **kw) -> np.ndarray:
    """``x`` through a fresh stage (float64, as the renderer passes its mix)."""
    x = np.array(x, dtype=np.float64)
    SafetyStage(len(x), **kw).process(x)
    return x


def law(x: float, ceiling: float = CEILING, knee: float = KNEE) -> float:
    """The documented curve, one sample at a time."""
    mag = abs(x)
    if mag <= knee:
        return x
    return math.copysign(knee + (ceiling - knee) * math.tanh((mag - knee) / (ceiling - knee)), x)


def test_default_ceiling_is_minus_1_dbfs() -> None:
    assert DEFAULT_CEILING_DBFS == -1.0
    stage = SafetyStage(4)
    assert 20 * math.log10(stage.ceiling) == pytest.approx(-1.0, abs=1e-12)
    assert 20 * math.log10(stage.ceiling / stage.knee) == pytest.approx(6.0, abs=1e-12)


def test_identity_below_the_knee() -> None:
    x = np.linspace(-KNEE, KNEE, 10_001)
    stage = SafetyStage(len(x))
    y = x.copy()
    assert stage.process(y)
    np.testing.assert_array_equal(y, x)  # bit for bit: nothing quiet is touched
    assert stage.limited == 0


@pytest.mark.parametrize("ceiling_dbfs", [-1.0, -3.0, -0.1])
def test_the_documented_law_above_the_knee(ceiling_dbfs) -> None:
    ceiling = 10 ** (ceiling_dbfs / 20)
    knee = ceiling * 10 ** (-6 / 20)
    x = np.concatenate([np.linspace(knee, 3.0, 2001), -np.geomspace(knee, 1e3, 500)])
    y = limited(x, ceiling_dbfs=ceiling_dbfs)
    expected = np.array([law(v, ceiling, knee) for v in x])
    # Same formula in numpy and in math: float64 rounding only (a few ulps of 1.0).
    np.testing.assert_allclose(y, expected, rtol=0, atol=1e-15)


def test_monotone_and_odd_over_a_huge_range() -> None:
    mags = np.unique(np.concatenate([np.linspace(0.0, 2.0, 20_001), np.geomspace(1e-12, 1.7e308, 5000)]))
    with np.errstate(all="raise"):  # no overflow on the way (a warning is I/O in the callback)
        up = limited(mags)
        down = limited(-mags)
    assert np.all(np.diff(up) >= 0), "the curve must never turn down"
    np.testing.assert_array_equal(down, -up)  # odd: a negative peak is bent exactly like a positive one


def test_never_above_the_ceiling_for_huge_inputs() -> None:
    x = np.array([1.0, 2.0, 10.0, 1e6, 1e30, 1e300, np.finfo(np.float64).max])
    x = np.concatenate([x, -x])
    stage = SafetyStage(len(x))
    with np.errstate(all="raise"):
        assert stage.process(x)
    assert np.abs(x).max() <= CEILING
    assert stage.peak <= CEILING and stage.peak == np.abs(x).max()
    # The loud end reaches the ceiling: a limiter, not a fader.
    assert abs(x[-1]) == pytest.approx(CEILING, abs=1e-12)


def test_continuous_in_value_and_slope_at_the_knee() -> None:
    h = 1e-7
    below, at, above = limited([KNEE - h, KNEE, KNEE + h])
    assert at == KNEE
    # Slope 1 on both sides (tanh'(0) = 1): the curve bends, it does not kink.
    assert (at - below) / h == pytest.approx(1.0, abs=1e-6)
    assert (above - at) / h == pytest.approx(1.0, abs=1e-6)
    # Continuous everywhere: on a fine grid no step is larger than the input step (slope <= 1).
    x = np.linspace(0.0, 5.0, 500_001)
    assert np.diff(limited(x)).max() <= (x[1] - x[0]) * (1 + 1e-9)


def test_block_size_does_not_matter() -> None:
    """Memoryless: blocks of 1, 97 or 4096 samples give the same samples."""
    rng = np.random.default_rng(20261201)
    x = rng.normal(scale=0.8, size=4096)
    whole = limited(x)
    assert np.abs(whole).max() > KNEE  # some samples bent
    pieces = np.concatenate([limited(x[i:i + 97]) for i in range(0, 4096, 97)])
    singles = np.concatenate([limited(x[i:i + 1]) for i in range(300)])
    np.testing.assert_array_equal(pieces, whole)
    np.testing.assert_array_equal(singles, whole[:300])


def test_non_finite_samples_are_zeroed_and_counted() -> None:
    x = np.array([0.1, np.nan, -0.2, np.inf, 3.0, -np.inf, -5.0, 0.0])
    finite = ~np.isfinite(x)
    stage = SafetyStage(len(x))
    assert stage.process(x) is False
    assert stage.nonfinite == 3
    np.testing.assert_array_equal(x[finite], 0.0)
    # The finite neighbours go through the curve as usual.
    np.testing.assert_allclose(x[~finite], [law(v) for v in (0.1, -0.2, 3.0, -5.0, 0.0)], rtol=0, atol=1e-15)
    assert stage.peak == pytest.approx(law(-5.0) * -1, abs=1e-15)
    y = np.array([np.nan, 0.5])
    assert stage.process(y) is False and stage.nonfinite == 4  # the count runs on
    assert stage.process(np.array([0.25, -0.25])) is True and stage.nonfinite == 4


@pytest.mark.parametrize("kw, match", [({"ceiling_dbfs": 0.0}, r"ceiling_dbfs=0.0 must be below 0 dBFS"),
                                       ({"knee_db": 0.0}, r"knee_db=0.0 must be > 0")])
def test_bad_settings_are_refused(kw, match) -> None:
    with pytest.raises(ParameterError, match=match):
        SafetyStage(4, **kw)
