"""Suggested voicing: the felt operation that brings each outlier hammer back to the scale.

For every key :meth:`~voicer.report.evenness.Evenness.flagged_keys` finds, the solver
tries the plan operations of :mod:`voicer.tone.voicing` of one kind, chosen by the key's
fault: a key brighter than the trend is needled (softened), a duller one hardened; a key
only louder or quieter follows its loudness. Each is tried at the crown, the shoulders and
throughout (the felt law changed at the compressions of a pp and an ff blow, as the
operation table says), in steps of :data:`STEP` percent up to the operation's safe
range. All candidates of a key are simulated in one batch at the measured dynamics; each
is scored by the squared deviations of loudness and brightness from the key's trend (the
trend of the unvoiced scale, which outliers do not move), each in units of its flag
floor, summed over the dynamics. The smallest amount whose score is within
:data:`CLOSE_ENOUGH` of the way from the best score to the unvoiced one wins: smallest
change first. A fault larger than the safe range gets a further step (up to
:data:`MAX_STEPS`), each chosen the same way from the state the step before leaves. The result is a plan of ``[[operation]]`` tables, each commented with the
predicted deviations before and after, to edit and audition, not an instruction:
needling cannot be undone, so the technician works in smaller steps and listens.
"""

from __future__ import annotations

__all__ = ["STEP", "CLOSE_ENOUGH", "MAX_STEPS", "KeySuggestion", "Suggestion", "suggest", "plan_toml", "write_plan"]

import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import tomli_w

from ..physics.tuning import key_name
from ..tone.preset import Preset
from ..tone.tables import TableSettings, simulate_variants
from ..io.atomic import atomic_write_bytes
from ..tone.voicing import OPERATIONS, WHERES, Operation, VoicingPlan, apply_voicing, parse_voicing
from .evenness import FLAG_FLOORS, VOICING_METRICS, Evenness, measure, spectral_metrics

#: Amount step of the candidates, percent.
STEP = 2.5
#: A candidate within this fraction of the way from the best score to the unvoiced one
#: counts as good as the best; the smallest amount among those is taken.
CLOSE_ENOUGH = 0.05
#: A fault larger than one operation's safe range gets further steps of the same
#: operation, each from the state the one before leaves (the trade works in steps too).
MAX_STEPS = 3
_MAX_PERCENT = {spec.name: next(a.hi for a in spec.amounts if a.name == "amount_percent")
                for spec in OPERATIONS if spec.name in ("needle", "harden")}


@dataclass(frozen=True)
class KeySuggestion:
    """One suggested step for one key and what it is predicted to do (a key whose fault
    exceeds one step's safe range has several, in order).

    ``deviation_before`` / ``deviation_after``: metric -> deviation from the trend per
    dynamic (the evenness's dynamics), before and with the change.
    """

    key: int
    operation: Operation
    deviation_before: dict[str, np.ndarray]
    deviation_after: dict[str, np.ndarray]
    at_limit: bool


@dataclass(frozen=True)
class Suggestion:
    """The suggested changes of every outlier key, and the evenness they start from."""

    evenness: Evenness
    keys: tuple[KeySuggestion, ...]


def _score(dev: dict[str, np.ndarray], scale: dict[str, np.ndarray]) -> float:
    return float(sum(np.nansum((dev[m] / scale[m]) ** 2) for m in VOICING_METRICS))


def suggest(preset: Preset, *, keys: Iterable[int] = range(21, 109), evenness: Evenness | None = None,
            settings: TableSettings = TableSettings(),
            on_key: Callable[[int, int], None] | None = None) -> Suggestion:
    """Felt operations for the outlier keys of ``preset`` (see the module docstring);
    ``on_key(done, total)`` is called after each outlier key (progress)."""
    ev = evenness if evenness is not None else measure(preset, keys=keys, settings=settings)
    out = []
    outliers = ev.flagged_keys()
    for done, key in enumerate(outliers, start=1):
        i = int(np.flatnonzero(ev.keys == key)[0])
        before = {m: ev.deviation[m][i].copy() for m in VOICING_METRICS}
        trend = {m: ev.trend[m][i] for m in VOICING_METRICS}
        # Each metric in units of its flag floor (relative floors scale with the trend).
        scale = {}
        for m in VOICING_METRICS:
            size, relative = FLAG_FLOORS[m]
            scale[m] = np.abs(trend[m]) * size if relative else np.full_like(trend[m], size)
        bright = float(np.nanmean(before["brightness"] / scale["brightness"]))
        loud = float(np.nanmean(before["loudness_phon"] / scale["loudness_phon"]))
        soften = bright > 0 if abs(bright) >= abs(loud) else loud > 0
        op = "needle" if soften else "harden"
        top = _MAX_PERCENT[op]
        amounts = [round(a, 6) for a in np.arange(STEP, top + 1e-9, STEP)]
        current, dev, score = preset, before, _score(before, scale)
        for _ in range(MAX_STEPS):
            cands = [Operation(op=op, keys=(key,), amounts={"amount_percent": a, "where": w})
                     for w in WHERES for a in amounts]
            variants = [(apply_voicing(current, VoicingPlan(name="", description="", changes=(c,))), key)
                        for c in cands]
            tables = simulate_variants(variants, ev.speeds_m_s, settings=settings)
            devs = []
            for t in tables:
                metrics = spectral_metrics(t.freq_hz, t.sigma_per_s, t.amplitude_n.sum(axis=1))
                devs.append({m: metrics[m] - trend[m] for m in VOICING_METRICS})
            scores = np.array([_score(d, scale) for d in devs])
            if scores.min() >= score:
                break  # nothing more to gain
            best = int(np.argmin(scores))
            limit = cands[best].amounts["amount_percent"] >= top - 1e-9
            if limit:  # the fault outlasts this step: take all of it, and go on
                j = best
            else:  # smallest change first; among equal amounts, the better score
                good = scores <= scores.min() + CLOSE_ENOUGH * (score - scores.min())
                j = min(np.flatnonzero(good), key=lambda c: (cands[c].amounts["amount_percent"], scores[c]))
            out.append(KeySuggestion(key=key, operation=cands[j], deviation_before=dev, deviation_after=devs[j],
                                     at_limit=limit))
            current, dev, score = variants[j][0], devs[j], float(scores[j])
            if not limit:
                break  # a fault within one step's range: done
        if on_key is not None:
            on_key(done, len(outliers))
    return Suggestion(evenness=ev, keys=tuple(out))


def plan_toml(s: Suggestion, *, name: str = "suggested: outlier hammers back to the scale") -> str:
    """The suggestion as a voicing plan (format 2 operations, each commented)."""
    dyn = s.evenness.dynamics

    def devs(d: dict[str, np.ndarray]) -> str:
        return ", ".join(f"{n} {d['brightness'][j]:+.2f} / {d['loudness_phon'][j]:+.1f} phon" for j, n in enumerate(dyn))

    lines = [
        "# Suggested by voicer from the predicted evenness of the scale: the felt operation that",
        "# brings each outlier hammer's loudness and brightness back to the trend across the scale.",
        "# A preview to audition and edit (voicer play PRESET --voicing THIS.toml), not an instruction:",
        "# needling cannot be undone, so work in smaller steps than these and listen at pp, mf and ff.",
        "",
        tomli_w.dumps({"format": 2, "name": name,
                       "description": f"{len(s.keys)} key(s): " + ", ".join(key_name(k.key) for k in s.keys)}).rstrip(),
    ]
    for k in s.keys:
        lines += ["",
                  f"# {key_name(k.key)} ({k.key}): {k.operation.describe()}"
                  + (" (the safe range's largest: a further step follows)" if k.at_limit else ""),
                  f"#   off the trend (brightness in harmonics / loudness): {devs(k.deviation_before)}",
                  f"#   predicted after: {devs(k.deviation_after)}",
                  "[[operation]]", tomli_w.dumps(k.operation.to_table()).rstrip()]
    return "\n".join(lines) + "\n"


def write_plan(s: Suggestion, path: str | Path) -> VoicingPlan:
    """Write the suggestion's plan atomically (a replaced file is kept as ``.bak``) after
    checking that it reads back as a valid plan; returns the plan as read back."""
    text = plan_toml(s)
    plan = parse_voicing(tomllib.loads(text), source=str(path))
    atomic_write_bytes(path, text.encode("utf-8"))
    return plan
