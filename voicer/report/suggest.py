"""Suggested voicing: the felt change that brings each outlier hammer back to the scale.

For every key :meth:`~voicer.report.evenness.Evenness.flagged_keys` finds, the solver
tries felt changes of one kind, chosen by the key's fault: a key brighter than the trend
is needled (softened), a duller one hardened; a key only louder or quieter follows its
loudness. Each change acts on the felt law F = F1 (c / 1 mm)^p at two compressions, the
crown's (what soft blows reach, :data:`CROWN_MM`) and the shoulders' (what loud blows
reach, :data:`SHOULDER_MM`), as the trade describes it (common practice: needling near the
crown mostly changes soft playing, deeper at the shoulders mostly loud playing):

==========  =====================  =======================
where       force at the crown     force at the shoulders
==========  =====================  =======================
crown       x g                    x (1 + (g - 1) / 4)
shoulders   x (1 + (g - 1) / 4)    x g
throughout  x g                    x g
==========  =====================  =======================

a straight line through the two points in log F against log c gives the new F1 and p.
``g = 1 - amount`` for needling and ``1 + amount`` for hardening, amounts in steps of
:data:`STEP` up to :data:`MAX_AMOUNT`. All candidates of a key are simulated in one batch
at the measured dynamics; each is scored by the squared deviations of loudness and
brightness from the key's trend (the trend of the unvoiced scale, which outliers do not
move), each in units of its flag floor, summed over the dynamics. The smallest amount
whose score is within 5 % of the way from the best score to the unvoiced one wins:
smallest change first. The result is a voicing plan (felt factor and exponent change per
key, each with a comment in trade terms) to edit and audition, not an instruction:
needling cannot be undone, so the technician works in smaller steps and listens.
"""

from __future__ import annotations

__all__ = ["CROWN_MM", "SHOULDER_MM", "STEP", "MAX_AMOUNT", "KeySuggestion", "Suggestion", "suggest", "plan_toml"]

import math
from dataclasses import dataclass
from typing import Iterable

import numpy as np

from ..physics.tuning import key_name
from ..tone.preset import Preset
from ..tone.tables import TableSettings, simulate_variants
from .evenness import FLAG_FLOORS, VOICING_METRICS, Evenness, measure, spectral_metrics

#: Compressions standing for the crown and the shoulders of the felt, mm: the peak felt
#: compression of the demo's blows at pp and ff (velocities 28 and 104) is 0.22-0.24 and
#: 0.42-0.47 mm from C3 to C6 (0.39 and 0.86 mm at C2; simulated): the trade's "crown"
#: and "shoulders" are where soft and loud blows load the felt.
CROWN_MM, SHOULDER_MM = 0.22, 0.45
#: The other point of a crown or shoulder change moves by this fraction of the main one.
SPILL = 0.25
STEP = 0.025
#: Largest change tried per key and operation (common practice, from memory: a hammer
#: needled by much more than a third in one go is past repair; hardener can stiffen a
#: worn, soft hammer by more, but not to new).
MAX_AMOUNT = {"needle": 0.40, "harden": 0.60}
WHERES = ("crown", "shoulders", "throughout")
#: A candidate within this fraction of the way from the best score to the unvoiced one
#: counts as good as the best; the smallest amount among those is taken.
CLOSE_ENOUGH = 0.05


@dataclass(frozen=True)
class KeySuggestion:
    """The change suggested for one key and what it is predicted to do.

    ``deviation_before`` / ``deviation_after``: metric -> deviation from the trend per
    dynamic (the evenness's dynamics), before and with the change.
    """

    key: int
    operation: str  # "needle" or "harden"
    where: str
    amount: float  # fraction, e.g. 0.15 for 15 %
    felt_factor: float  # on felt_force_1mm_n
    exponent_add: float  # on felt_exponent
    deviation_before: dict[str, np.ndarray]
    deviation_after: dict[str, np.ndarray]
    at_limit: bool


@dataclass(frozen=True)
class Suggestion:
    """The suggested changes of every outlier key, and the evenness they start from."""

    evenness: Evenness
    keys: tuple[KeySuggestion, ...]


def _felt(f1: float, p: float, g_crown: float, g_shoulder: float) -> tuple[float, float]:
    """F1 and p of the felt whose forces at the crown and shoulder compressions are
    scaled by the given factors (a line through two points in log F vs log c)."""
    p_new = p + math.log(g_shoulder / g_crown) / math.log(SHOULDER_MM / CROWN_MM)
    f1_new = g_crown * f1 * CROWN_MM ** (p - p_new)  # c in mm: (c / 1 mm)^(p - p')
    return f1_new, p_new


def _factors(where: str, g: float) -> tuple[float, float]:
    spill = 1.0 + (g - 1.0) * SPILL
    return {"crown": (g, spill), "shoulders": (spill, g), "throughout": (g, g)}[where]


def _score(dev: dict[str, np.ndarray], scale: dict[str, np.ndarray]) -> float:
    return float(sum(np.nansum((dev[m] / scale[m]) ** 2) for m in VOICING_METRICS))


def suggest(preset: Preset, *, keys: Iterable[int] = range(21, 109), evenness: Evenness | None = None,
            settings: TableSettings = TableSettings()) -> Suggestion:
    """Felt changes for the outlier keys of ``preset`` (see the module docstring)."""
    ev = evenness if evenness is not None else measure(preset, keys=keys, settings=settings)
    out = []
    for key in ev.flagged_keys():
        i = int(np.flatnonzero(ev.keys == key)[0])
        before = {m: ev.deviation[m][i].copy() for m in VOICING_METRICS}
        trend = {m: ev.trend[m][i] for m in VOICING_METRICS}
        # Each metric in units of its flag floor (relative floors scale with the trend).
        scale = {}
        for m in VOICING_METRICS:
            size, relative = FLAG_FLOORS[m]
            scale[m] = np.abs(trend[m]) * size if relative else np.full_like(trend[m], size)
        bright = float(np.nanmean(before["brightness"] / scale["brightness"]))
        loud = float(np.nanmean(before["loudness_db"] / scale["loudness_db"]))
        soften = bright > 0 if abs(bright) >= abs(loud) else loud > 0
        operation = "needle" if soften else "harden"
        amounts = np.arange(STEP, MAX_AMOUNT[operation] + 1e-9, STEP)
        f1 = float(preset.resolved["felt_force_1mm_n"][key - 21])
        p = float(preset.resolved["felt_exponent"][key - 21])
        cands = []
        for where in WHERES:
            for a in amounts:
                g = 1.0 - a if soften else 1.0 + a
                f1_new, p_new = _felt(f1, p, *_factors(where, g))
                if not 1.0 <= p_new <= 6.0:
                    continue
                cands.append((where, float(a), f1_new, p_new))
        variants = [(preset.with_key_values(key, {"felt_force_1mm_n": f, "felt_exponent": q}), key)
                    for _, _, f, q in cands]
        tables = simulate_variants(variants, ev.speeds_m_s, settings=settings)
        devs = []
        for t in tables:
            metrics = spectral_metrics(t.freq_hz, t.sigma_per_s, t.amplitude_n.sum(axis=1))
            devs.append({m: metrics[m] - trend[m] for m in VOICING_METRICS})
        scores = np.array([_score(d, scale) for d in devs])
        start = _score(before, scale)
        good = scores <= scores.min() + CLOSE_ENOUGH * max(start - scores.min(), 0.0)
        # smallest change first; among equal amounts, the better score
        j = min(np.flatnonzero(good), key=lambda c: (cands[c][1], scores[c]))
        where, a, f1_new, p_new = cands[j]
        out.append(KeySuggestion(key=key, operation=operation, where=where, amount=a, felt_factor=f1_new / f1,
                                 exponent_add=p_new - p, deviation_before=before, deviation_after=devs[j],
                                 at_limit=a >= MAX_AMOUNT[operation] - 1e-9))
    return Suggestion(evenness=ev, keys=tuple(out))


def plan_toml(s: Suggestion, *, name: str = "suggested: outlier hammers back to the scale") -> str:
    """The suggestion as a voicing plan (format 1 changes, commented in trade terms)."""
    dyn = s.evenness.dynamics
    lines = [
        "# Suggested by voicer from the predicted evenness of the scale: the felt change that",
        "# brings each outlier hammer's loudness and brightness back to the trend across the scale.",
        "# A preview to audition and edit (voicer play PRESET --voicing THIS.toml), not an instruction:",
        "# needling cannot be undone, so work in smaller steps than these and listen at pp, mf and ff.",
        "",
        "format = 1",
        f'name = "{name}"',
        f'description = "{len(s.keys)} key(s): ' + ", ".join(key_name(k.key) for k in s.keys) + '"',
    ]
    for k in s.keys:
        dev = ", ".join(f"{d} {k.deviation_before['brightness'][j]:+.2f} / {k.deviation_before['loudness_db'][j]:+.1f} dB"
                        for j, d in enumerate(dyn))
        after = ", ".join(f"{d} {k.deviation_after['brightness'][j]:+.2f} / {k.deviation_after['loudness_db'][j]:+.1f} dB"
                          for j, d in enumerate(dyn))
        lines += ["",
                  f"# {key_name(k.key)} ({k.key}): {k.operation} at the {k.where} by {100 * k.amount:.1f} %"
                  + (" (the largest amount tried)" if k.at_limit else ""),
                  f"#   off the trend (brightness in harmonics / loudness): {dev}",
                  f"#   predicted after: {after}",
                  "[[change]]", f"keys = {k.key}", 'field = "felt_force_1mm_n"', f"factor = {k.felt_factor:.6f}"]
        if abs(k.exponent_add) > 1e-9:
            lines += ["", "[[change]]", f"keys = {k.key}", 'field = "felt_exponent"', f"add = {k.exponent_add:.6f}"]
    return "\n".join(lines) + "\n"
