"""The piano scale: per-key strings and what follows from them (mass, tension, B).

All keys are held as arrays over the compass (struct of arrays), so later stages can
batch over keys. The tuning target fixes the sounding first partial ``f1``; the
flexible-string fundamental ``f0 = c / 2L`` is what remains after stiffness raises it:

* pinned: ``f1^2 = f0^2 (1 + B)`` with ``B f0^2 = pi^2 E I / (4 mu L^4)`` independent of
  f0, so ``f0^2 = f1^2 - pi^2 E I / (4 mu L^4)`` in closed form;
* clamped: ``f1 = f0 r1(B)`` solved by fixed-point iteration (r1 depends weakly on B).

Then ``T = 4 mu L^2 f0^2``, ``c = sqrt(T / mu) = 2 L f0`` and
``B = pi^3 E d^4 / (64 T L^2)`` with d the core diameter (Fletcher 1964): the core gives
the stiffness, the winding only mass.
"""

from __future__ import annotations

__all__ = ["Scale", "derive_strings", "fletcher_b", "TooStiffError", "winding_mass_kg_per_m", "core_diameter_for_b",
           "B_LIMITS", "TENSION_LIMITS_N"]

from dataclasses import dataclass
from typing import Mapping

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import brentq

from ..errors import ParameterError, PresetError
from .constants import (
    COPPER_DENSITY_KG_M3,
    STEEL_DENSITY_KG_M3,
    STEEL_TENSILE_STRENGTH_PA,
    STEEL_YOUNGS_MODULUS_PA,
    WINDING_PACKING,
)
from .strings import EndCondition, StringModes, partial_ratios, string_modes
from .tuning import KEYS, tuned_hz

#: Range of B accepted for a key. Pianos span about 5e-5 (lower tenor) to a few 1e-2
#: (top treble of small instruments) (physics.md section 2, from memory); values outside
#: 1e-6..0.1 come from a slip in the inputs (a unit, a digit), not from a piano.
B_LIMITS = (1.0e-6, 0.1)
#: Range of string tension accepted. Piano strings carry roughly 400-2000 N (Conklin
#: 1996, JASA, Part III, from memory); below 20 N a string is slack.
TENSION_LIMITS_N = (20.0, 3000.0)

_FIXED_POINT_STEPS = 60


def winding_mass_kg_per_m(core_diameter_m: NDArray[np.float64], outer_diameter_m: NDArray[np.float64]) -> NDArray[np.float64]:
    """Mass per length of a close-wound single layer of round copper wire.

    A layer of wire diameter ``w = (D - d) / 2`` weighs ``pi/4`` of a copper tube with
    the same inner and outer diameters (see ``WINDING_PACKING``).
    """
    d, outer = np.asarray(core_diameter_m, dtype=float), np.asarray(outer_diameter_m, dtype=float)
    return WINDING_PACKING * COPPER_DENSITY_KG_M3 * np.pi / 4.0 * (outer**2 - d**2)


def fletcher_b(core_diameter_m: ArrayLike, tension_n: ArrayLike, length_m: ArrayLike,
               youngs_modulus_pa: float = STEEL_YOUNGS_MODULUS_PA) -> NDArray[np.float64]:
    """Fletcher's inharmonicity coefficient ``B = pi^3 E d^4 / (64 T L^2)`` (Fletcher 1964).

    Parameters
    ----------
    core_diameter_m : array_like of float > 0
        Diameter of the steel (core) wire.
    tension_n : array_like of float > 0
        String tension.
    length_m : array_like of float > 0
        Speaking length.
    youngs_modulus_pa : float > 0
        Young's modulus of the wire.
    """
    d, t, ln = (np.asarray(a, dtype=float) for a in (core_diameter_m, tension_n, length_m))
    return np.pi**3 * youngs_modulus_pa * d**4 / (64.0 * t * ln**2)


class TooStiffError(ParameterError):
    """A string so stiff that no tension tunes it to its target (``index`` is the first)."""

    def __init__(self, message: str, index: int) -> None:
        super().__init__(message)
        self.index = index


def derive_strings(
    f1_hz: ArrayLike,
    length_m: ArrayLike,
    core_diameter_m: ArrayLike,
    winding_mass_kg_per_m: ArrayLike,
    *,
    end: EndCondition = "pinned",
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Flexible fundamental, linear mass, tension and B of strings tuned to ``f1_hz``.

    Parameters
    ----------
    f1_hz : array_like of float > 0
        Target frequency of the first (sounding) partial.
    length_m : array_like of float > 0
        Speaking length.
    core_diameter_m : array_like of float > 0
        Steel wire (core) diameter.
    winding_mass_kg_per_m : array_like of float >= 0
        Mass per length added by a winding (0 for plain wire).
    end : {'pinned', 'clamped'}
        End condition.

    Returns
    -------
    f0_hz, linear_mass_kg_per_m, tension_n, b : ndarray
    """
    f1, length, d, wind = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in
                                                (f1_hz, length_m, core_diameter_m, winding_mass_kg_per_m)))
    mu = STEEL_DENSITY_KG_M3 * np.pi * d**2 / 4.0 + wind
    inertia = np.pi * d**4 / 64.0
    stiffness = np.pi**2 * STEEL_YOUNGS_MODULUS_PA * inertia / (4.0 * mu * length**4)  # = B f0^2
    f0_sq = f1**2 - stiffness
    bad = _first_bad(f0_sq <= 0)
    if bad is not None:
        raise TooStiffError(f"string {bad} is too stiff to sound at {f1.reshape(-1)[bad]:.2f} Hz", bad)
    f0 = np.sqrt(f0_sq)
    if end == "clamped":
        for _ in range(_FIXED_POINT_STEPS):
            f0_next = f1 / partial_ratios(stiffness / f0**2, 1, end="clamped")
            converged = np.max(np.abs(f0_next - f0) / f0) < 1e-15
            f0 = f0_next
            if converged:
                break
    tension = 4.0 * mu * length**2 * f0**2
    return f0, mu, tension, fletcher_b(d, tension, length)


def core_diameter_for_b(b: float, f1_hz: float, length_m: float, *, winding_diameter_m: float | None = None,
                        added_mass_kg_per_m: float = 0.0, end: EndCondition = "pinned",
                        range_m: tuple[float, float] = (0.3e-3, 2.5e-3)) -> float:
    """The core diameter that gives a string of this length and pitch the inharmonicity ``b``.

    A recording gives B, not the wire; keeping the preset's length and winding, B rises
    monotonically with the core diameter (stiffness ~ d^4 against mass ~ d^2 plus winding),
    so the diameter follows by root finding on :func:`derive_strings`.

    Parameters
    ----------
    b : float > 0
        Target inharmonicity coefficient.
    f1_hz, length_m : float > 0
        First partial and speaking length.
    winding_diameter_m : float, optional
        Outer diameter of a winding (its mass then follows the core).
    added_mass_kg_per_m : float >= 0
        Or the winding as a fixed mass per length (0 for plain wire).
    end : {'pinned', 'clamped'}
    range_m : (float, float)
        Diameters searched (the preset's allowed range).

    Raises
    ------
    ParameterError
        If no diameter in the range gives ``b`` (with the B range it can give).
    """
    def b_of(d: float) -> float:
        wind = (float(winding_mass_kg_per_m(np.asarray(d), np.asarray(winding_diameter_m)))
                if winding_diameter_m is not None else added_mass_kg_per_m)
        try:
            return float(derive_strings(f1_hz, length_m, d, wind, end=end)[3])
        except TooStiffError:
            return np.inf

    lo, hi = range_m
    if winding_diameter_m is not None:
        hi = min(hi, winding_diameter_m * (1 - 1e-9))
    b_lo, b_hi = b_of(lo), b_of(hi)
    if not b_lo <= b <= b_hi:
        raise ParameterError(f"B = {b:.3g} needs a core diameter outside {lo * 1e3:g}..{hi * 1e3:g} mm for a "
                             f"{length_m:g} m string at {f1_hz:.2f} Hz (it gives B {b_lo:.3g}..{b_hi:.3g})")
    return float(brentq(lambda d: b_of(d) - b, lo, hi, xtol=1e-15, rtol=1e-13))


def _first_bad(mask: NDArray[np.bool_]) -> int | None:
    idx = np.flatnonzero(mask)
    return int(idx[0]) if idx.size else None


@dataclass(frozen=True, eq=False)
class Scale:
    """Per-key strings of an instrument and their derived quantities.

    Build with :meth:`Scale.build`. Arrays are indexed by ``key - 21``.

    Attributes
    ----------
    keys : ndarray of int
        MIDI numbers 21..108.
    values : mapping of str to ndarray
        Every per-key preset field, resolved for each key (NaN where a field does not
        apply, e.g. winding on plain strings).
    a4_hz : float
        Reference pitch.
    end : {'pinned', 'clamped'}
        End condition of all strings.
    f1_hz : ndarray
        Target frequency of the first partial (as tuned).
    f0_hz : ndarray
        Flexible-string fundamental ``c / 2L``.
    linear_mass_kg_per_m : ndarray
        Total mass per length (core plus winding).
    winding_mass_kg_per_m : ndarray
        Part of it due to the winding (0 for plain wire).
    tension_n : ndarray
        String tension.
    b : ndarray
        Fletcher's inharmonicity coefficient.
    wave_speed_m_s : ndarray
        Transverse wave speed ``sqrt(T / mu)``.
    """

    keys: NDArray[np.int64]
    values: Mapping[str, NDArray[np.float64]]
    a4_hz: float
    end: EndCondition
    f1_hz: NDArray[np.float64]
    f0_hz: NDArray[np.float64]
    linear_mass_kg_per_m: NDArray[np.float64]
    winding_mass_kg_per_m: NDArray[np.float64]
    tension_n: NDArray[np.float64]
    b: NDArray[np.float64]
    wave_speed_m_s: NDArray[np.float64]

    @classmethod
    def build(cls, values: Mapping[str, NDArray[np.float64]], *, a4_hz: float, end: EndCondition) -> "Scale":
        """Derive mass, tension and B from resolved per-key values.

        Parameters
        ----------
        values : mapping of str to ndarray, one value per key 21..108
            Needs ``speaking_length_m``, ``core_diameter_mm``, ``stretch_cents`` and the
            winding fields ``winding_diameter_mm`` / ``winding_mass_g_per_m`` (NaN where
            not given; both NaN means plain wire).
        a4_hz : float
            Reference pitch.
        end : {'pinned', 'clamped'}
            End condition.

        Raises
        ------
        PresetError
            Naming the first key whose strings make no physical sense (winding thinner
            than its core, a string too stiff for its pitch, B or tension out of range,
            tension above the breaking load), with the allowed range.
        """
        keys = KEYS.copy()
        length = np.asarray(values["speaking_length_m"], dtype=float)
        d = np.asarray(values["core_diameter_mm"], dtype=float) * 1e-3
        outer = np.asarray(values["winding_diameter_mm"], dtype=float) * 1e-3
        given_mass = np.asarray(values["winding_mass_g_per_m"], dtype=float) * 1e-3

        bad = _first_bad(np.isfinite(outer) & (outer <= d))
        if bad is not None:
            raise PresetError(
                f"winding diameter {outer[bad] * 1e3:g} mm must exceed the core diameter {d[bad] * 1e3:g} mm",
                key=int(keys[bad]), field="winding_diameter_mm")
        wind = np.where(np.isfinite(given_mass), given_mass,
                        np.where(np.isfinite(outer), winding_mass_kg_per_m(d, np.nan_to_num(outer)), 0.0))
        f1 = tuned_hz(keys, values["stretch_cents"], a4_hz=a4_hz)
        try:
            f0, mu, tension, b = derive_strings(f1, length, d, wind, end=end)
        except TooStiffError as exc:
            i = exc.index
            # The allowed range: the thickest core that keeps B within its limit here.
            winding = {"winding_diameter_m": outer[i]} if np.isfinite(outer[i]) else {"added_mass_kg_per_m": wind[i]}
            d_max = core_diameter_for_b(B_LIMITS[1], float(f1[i]), float(length[i]), end=end,
                                        range_m=(1e-6, d[i]), **winding)
            raise PresetError(
                f"a {d[i] * 1e3:g} mm core over {length[i]:g} m is too stiff to sound at {f1[i]:.2f} Hz; "
                f"allowed here: up to {d_max * 1e3:.3g} mm (B <= {B_LIMITS[1]:g}), or a longer speaking_length_m",
                key=int(keys[i]), field="core_diameter_mm") from None

        lo, hi = B_LIMITS
        bad = _first_bad((b < lo) | (b > hi))
        if bad is not None:
            raise PresetError(
                f"derived inharmonicity B={b[bad]:.3g} is outside {lo:g}..{hi:g} "
                "(check speaking_length_m and core_diameter_mm)", key=int(keys[bad]), field="core_diameter_mm")
        lo, hi = TENSION_LIMITS_N
        bad = _first_bad((tension < lo) | (tension > hi))
        if bad is not None:
            raise PresetError(
                f"derived tension {tension[bad]:.0f} N is outside {lo:g}..{hi:g} N "
                "(check speaking_length_m and the wire)", key=int(keys[bad]), field="speaking_length_m")
        breaking = STEEL_TENSILE_STRENGTH_PA * np.pi * d**2 / 4.0
        bad = _first_bad(tension >= breaking)
        if bad is not None:
            raise PresetError(
                f"derived tension {tension[bad]:.0f} N would break a {d[bad] * 1e3:g} mm core "
                f"(breaking load about {breaking[bad]:.0f} N)", key=int(keys[bad]), field="core_diameter_mm")

        return cls(
            keys=keys,
            values={name: np.asarray(v, dtype=float) for name, v in values.items()},
            a4_hz=float(a4_hz),
            end=end,
            f1_hz=f1,
            f0_hz=f0,
            linear_mass_kg_per_m=mu,
            winding_mass_kg_per_m=wind,
            tension_n=tension,
            b=b,
            wave_speed_m_s=2.0 * length * f0,
        )

    def index(self, key: int) -> int:
        """Array index of a MIDI key (ParameterError outside 21..108)."""
        i = int(key) - int(self.keys[0])
        if not 0 <= i < len(self.keys):
            raise PresetError(f"key {key} is outside the compass {self.keys[0]}..{self.keys[-1]}")
        return i

    def value(self, name: str, key: int) -> float:
        """A resolved per-key preset field for one key."""
        return float(self.values[name][self.index(key)])

    @property
    def wound(self) -> NDArray[np.bool_]:
        """True for keys with wound strings."""
        return self.winding_mass_kg_per_m > 0

    def partials_hz(self, key: int, count: int) -> NDArray[np.float64]:
        """Frequencies of the first ``count`` partials of a key (no band limit)."""
        i = self.index(key)
        return self.f0_hz[i] * partial_ratios(self.b[i], np.arange(1, count + 1), end=self.end)

    def modes(self, key: int, **kwargs: float | int) -> StringModes:
        """The key's string modes with its losses; keyword arguments go to
        :func:`voicer.physics.strings.string_modes` (``sample_rate_hz``, ``max_partials``)."""
        i = self.index(key)
        return string_modes(
            float(self.f0_hz[i]), float(self.b[i]), end=self.end,
            loss_b1_per_s=float(self.values["loss_b1_per_s"][i]),
            loss_b3_s=float(self.values["loss_b3_s"][i]), **kwargs)  # type: ignore[arg-type]
