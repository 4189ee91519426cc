"""Fit a preset to analysed recordings: per key, then across the scale.

Per key, from all its analysed notes: pitch and B (weighted means), strike ratio (from
the weak-partial pattern), felt (levels matched by the contact model, see
:mod:`voicer.analysis.felt_fit`), losses b1, b3 (from the prompt decays), and the measured
partials of its best note for the additive replay. Recordings in one folder are taken as
one take (one microphone gain): a guided recording session writes one folder, and its
dynamics then tell the felt's exponent.
"""

from __future__ import annotations

__all__ = ["DYNAMIC_VELOCITY", "UNDECAYED_T60_S", "FitResult", "dynamic_of", "fit_key", "fit_recordings"]

import datetime as _dt
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from .. import __version__
from ..errors import PresetError
from ..physics.body import BodyModel, body_modes, modal_sum
from ..tone.measured import parse_measured_key
from ..tone.preset import Preset
from ..tone.tables import TableSettings
from ..tone.velocity import DYNAMIC_VELOCITY, hammer_speed  # markings in file names
from .felt_fit import FeltFit, StrikeLevels, fit_felt
from .losses import LossFit, fit_losses
from .note import MIN_STRIKE_PARTIALS, NoteAnalysis, RecordingAnalysis, has_level
from .strike import fit_strike_ratio
from .preset_out import KeyFit, fitted_preset

#: T60 stored for an aftersound that did not decay measurably within the note: longer than
#: any piano partial rings (the longest bass aftersounds last some tens of seconds, from
#: memory), so the replay holds it as measured, without inventing a decay.
UNDECAYED_T60_S = 100.0
_DYNAMIC = re.compile(r"(?:^|[-_ .])(" + "|".join(sorted(DYNAMIC_VELOCITY, key=len, reverse=True)) + r")(?=$|[-_ .])")


def dynamic_of(path: str | Path) -> str | None:
    """The dynamic marking in a file name (``060-C4-mf-1.flac`` -> ``mf``), if any."""
    m = _DYNAMIC.search(Path(path).stem.lower())
    return m.group(1) if m else None


@dataclass(frozen=True)
class FitResult:
    """A fitted preset and how it was reached."""

    preset: Preset
    fits: tuple[KeyFit, ...]
    unfitted: tuple[tuple[int, str], ...]  # (key, reason)


def _weighted(values: Sequence[float], sigmas: Sequence[float]) -> tuple[float, float]:
    v, s = np.asarray(values, dtype=float), np.maximum(np.asarray(sigmas, dtype=float), 1e-300)
    w = 1.0 / s**2
    return float(np.sum(w * v) / np.sum(w)), float(np.sqrt(1.0 / np.sum(w)))


def _nan(x: float | None) -> float:
    return float("nan") if x is None else float(x)


def _valid_partials(key: int, measured: dict[str, Any], remarks: list[str]) -> dict[str, Any]:
    """``measured`` without the partials a preset would refuse (a value outside its
    range: one odd partial must not fail the whole fit), each named in ``remarks``."""
    arrays = [name for name, v in measured.items() if isinstance(v, list)]
    keep = []
    for j, n in enumerate(measured["n"]):
        one = {**{k: v for k, v in measured.items() if k not in arrays}, **{k: [measured[k][j]] for k in arrays}}
        try:
            parse_measured_key(key, one, {})
        except PresetError as exc:
            remarks.append(f"partial {n} left out of the replay: {exc.field}: {exc.reason}")
            continue
        keep.append(j)
    return {k: ([v[j] for j in keep] if k in arrays else v) for k, v in measured.items()}


def _levelled(base: Preset, notes: Sequence[NoteAnalysis]) -> list[tuple[list[Any], np.ndarray]]:
    """Per note, its partials with a level and those levels as the model sees them: the
    model's levels are the strings' force on the bridge, a recording hears it through the
    soundboard, so where the base preset describes its board (``body = "modal"``) its
    gain is taken out (a recording of an unknown board: the levels as heard)."""
    modes = body_modes(BodyModel.from_fields(base.instrument)) if base.instrument["body"] == "modal" else None
    out = []
    for n in notes:
        parts = [p for p in n.partials if has_level(p)]
        level = np.array([p.level_db for p in parts])
        if modes is not None and parts:
            level = level - 20.0 * np.log10(np.abs(modal_sum(np.array([p.freq_hz for p in parts]), modes)))
        out.append((parts, level))
    return out


def fit_key(base: Preset, key: int, notes: Sequence[NoteAnalysis], *, calibration_db: float | None = None,
            settings: TableSettings = TableSettings()) -> KeyFit:
    """Everything for one key from its notes (at least one, all of this key)."""
    usable = [n for n in notes if n.quality != "poor"] or list(notes)
    best = max(usable, key=lambda n: (n.quality == "good", len(n.partials)))
    f1 = float(np.mean([n.first_partial_hz for n in usable]))
    cents = float(np.mean([n.cents_from_et for n in usable]))
    b, b_unc = _weighted([n.b for n in usable], [n.b_uncertainty for n in usable])
    remarks: list[str] = []
    levelled = _levelled(base, usable)
    if base.instrument["body"] != "modal":  # each note's own strike fit saw these levels
        strikes = [n.strike for n in usable if n.strike is not None and n.strike.quality != "poor"]
    else:
        fits = [fit_strike_ratio([p.n for p in parts], level) for parts, level in levelled
                if len(parts) >= MIN_STRIKE_PARTIALS]
        strikes = [f for f in fits if f.quality != "poor"]
    beta = beta_unc = None
    beta_quality = "poor"
    if strikes:
        beta, beta_unc = _weighted([s.ratio for s in strikes], [s.uncertainty for s in strikes])
        beta_quality = "good" if any(s.quality == "good" for s in strikes) else "fair"
    else:
        remarks.append("strike ratio not fitted (no clear pattern of weak partials): kept from the base")
    felt_preset = base.with_key_values(key, {"strike_ratio": beta}) if beta is not None else base
    levels = []
    for n, (parts, level) in zip(usable, levelled):
        mark = dynamic_of(n.path)
        prior = float(hammer_speed(DYNAMIC_VELOCITY[mark], base.instrument)) if mark else None
        levels.append(StrikeLevels(n=np.array([p.n for p in parts], dtype=np.int64), level_db=level,
                                   take=str(Path(n.path).parent), speed_prior_m_s=prior))
    felt: FeltFit | None = None
    try:
        felt = fit_felt(felt_preset, key, levels, calibration_db=calibration_db, settings=settings)
    except ValueError as exc:
        remarks.append(f"felt not fitted: {exc}")
    losses: LossFit | None = None
    parts = [p for p in best.partials if p.decay_quality != "poor"]
    try:
        losses = fit_losses([p.freq_hz for p in parts], [p.t60_s for p in parts],
                            t60_uncertainty_s=[p.t60_uncertainty_s for p in parts])
    except ValueError as exc:
        remarks.append(f"losses not fitted: {exc}")
    measured = None
    if felt is not None:
        j = usable.index(best)
        gain = felt.gain_db[str(Path(best.path).parent)]
        # Replayed: every partial with a level and a measured decay, kept even where its T60
        # is too uncertain to fit losses to (the best estimate there is); an aftersound that
        # does not decay measurably within the note is held at UNDECAYED_T60_S.
        replay = [p for p in best.partials if has_level(p) and 0 < p.t60_s < UNDECAYED_T60_S]

        measured = {
            "speed_m_s": round(felt.speeds_m_s[j], 4),
            "n": [p.n for p in replay],
            "freq_hz": [round(p.freq_hz, 4) for p in replay],
            "level_db": [round(p.level_db - gain, 2) for p in replay],
            "t60_s": [round(p.t60_s, 4) for p in replay],
            "after_level_db": [_nan(None if p.after_level_db is None else round(p.after_level_db - gain, 2))
                               for p in replay],
            "after_t60_s": [_nan(None if p.after_t60_s is None else round(min(p.after_t60_s, UNDECAYED_T60_S), 4))
                            for p in replay],
        }
        measured = _valid_partials(key, measured, remarks)
        flat = [n for n, t in zip(measured["n"], measured["after_t60_s"]) if t == UNDECAYED_T60_S]
        if flat:
            remarks.append(f"aftersound of partial(s) {', '.join(map(str, flat))} did not decay measurably "
                           f"within the note: stored with T60 {UNDECAYED_T60_S:g} s")
    quality = best.quality
    return KeyFit(key=key, sources=tuple((n.path, n.onset_s) for n in notes), first_partial_hz=f1,
                  cents_from_et=cents, b=b, b_uncertainty=b_unc, strike_ratio=beta, strike_uncertainty=beta_unc,
                  strike_quality=beta_quality, felt=felt, losses=losses, measured=measured, quality=quality,
                  notes=tuple(remarks) + tuple(r for n in notes for r in n.notes) + (felt.notes if felt else ()))


def fit_recordings(analyses: Sequence[RecordingAnalysis], base: Preset, *, calibration_db: float | None = None,
                   settings: TableSettings = TableSettings(), source: str | None = None,
                   on_key: Callable[[int, int], None] | None = None) -> FitResult:
    """The fitted preset from analysed recordings (every key that has a note).

    Parameters
    ----------
    analyses : sequence of RecordingAnalysis
    base : Preset
        What is not measured comes from here (string lengths, windings, hammer mass and
        width, keys without a note beyond the measured span).
    calibration_db : float, optional
        The recording gain when known (dBFS of a 1 N bridge-force partial).
    settings : TableSettings
        Contact simulation settings for the felt fit.
    source : str, optional
        Output file name (for error messages of the new preset).
    on_key : callable, optional
        ``on_key(done, total)`` after each key (progress).
    """
    by_key: dict[int, list[NoteAnalysis]] = {}
    for a in analyses:
        for n in a.notes:
            by_key.setdefault(n.key, []).append(n)
    fits = []
    for i, key in enumerate(sorted(by_key)):
        fits.append(fit_key(base, key, by_key[key], calibration_db=calibration_db, settings=settings))
        if on_key is not None:
            on_key(i + 1, len(by_key))
    provenance: dict[str, Any] = {
        "fitted_at": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0),
        "tool": f"voicer {__version__}",
        "base": base.source or base.instrument["name"],
        "recordings": [a.path for a in analyses],
    }
    if calibration_db is not None:
        provenance["calibration_db"] = float(calibration_db)
    preset = fitted_preset(base, fits, provenance=provenance, source=source)
    unfitted = tuple((f.key, "; ".join(f.notes) or "poor analysis") for f in fits if f.quality == "poor")
    return FitResult(preset=preset, fits=tuple(fits), unfitted=unfitted)
