"""b1, b3 from measured decays: against the loss law they come from and scipy's curve_fit."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import curve_fit

from voicer.analysis.losses import fit_losses
from voicer.physics.strings import loss_rates, t60_s


# The loss law sigma = b1 + b3 omega^2 (Chaigne & Askenfelt 1994, JASA 95, 1112), with
# values of the order of the demo piano's mid range (omega in rad/s).
B1, B3 = 0.5, 2.6e-10


def test_exact_decays_give_the_parameters_back() -> None:
    f = 261.6 * np.arange(1, 25)
    fit = fit_losses(f, t60_s(loss_rates(f, B1, B3)))
    assert fit.b1_per_s == pytest.approx(B1, rel=1e-9)
    assert fit.b3_s == pytest.approx(B3, rel=1e-9)
    assert fit.quality == "good" and fit.residual_rms < 1e-9


def test_noisy_decays_match_scipy_curve_fit_and_cover_the_truth(rng) -> None:
    # Reference: scipy.optimize.curve_fit of the same weighted model (rates with 10 % scatter).
    f = 110.0 * np.arange(1, 31)
    sigma = loss_rates(f, B1, B3)
    inside = 0
    for _ in range(40):
        noisy = sigma * (1 + 0.1 * rng.standard_normal(len(f)))
        fit = fit_losses(f, t60_s(noisy), t60_uncertainty_s=0.1 * t60_s(noisy))
        w2 = (2 * np.pi * f) ** 2
        (b1, b3), _ = curve_fit(lambda x, a, b: a + b * x, w2, noisy, sigma=0.1 * noisy, p0=[1.0, 1e-10])
        assert fit.b1_per_s == pytest.approx(b1, rel=1e-6)
        assert fit.b3_s == pytest.approx(b3, rel=1e-6)
        inside += abs(fit.b3_s - B3) < 2 * fit.b3_uncertainty
    assert inside >= 34  # ~95 % of 40 within 2 sigma: the uncertainty is honest (binomial slack)


def test_too_few_or_unusable_decays() -> None:
    with pytest.raises(ValueError, match="1 usable decay"):
        fit_losses([100.0, 200.0, 300.0], [5.0, np.nan, 0.001])
    fit = fit_losses([100.0, 200.0], [5.0, 4.0])
    assert fit.quality == "poor"
