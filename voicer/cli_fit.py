"""The commands that read recordings: ``voicer analyze`` and ``voicer fit``."""

from __future__ import annotations

__all__ = ["cmd_analyze", "cmd_fit", "analysis_json"]

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any, Sequence

from tqdm import tqdm

from .errors import VoicerError
from .io.atomic import check_output
from .physics.tuning import key_name
from .resources import find_preset
from .tone.preset import Preset, load_preset, save_preset
from .tone.tables import TableSettings
from .analysis.fit import FitResult, fit_key, fit_recordings
from .analysis.note import NoteAnalysis, RecordingAnalysis, analyze_recording
from .analysis.preset_out import KeyFit


def _tty() -> bool:
    return sys.stderr.isatty()


def _analyze_all(paths: Sequence[str], *, a4_hz: float) -> list[RecordingAnalysis]:
    """Every recording, with one progress bar over the notes of all of them."""
    out = []
    with tqdm(total=0, unit="note", desc="analysis", disable=not _tty(), leave=False) as bar:
        for path in paths:
            def step(done: int, total: int) -> None:
                if bar.total < bar.n + total - done + 1:
                    bar.total = bar.n + total - done + 1
                bar.update(1)

            out.append(analyze_recording(path, a4_hz=a4_hz, on_note=step))
    return out


def _finite(x: float | None, digits: int | None = None) -> float | None:
    """A number for JSON (rounded to ``digits`` if given), or None where it is not finite:
    JSON has no NaN or Infinity (RFC 8259), and the writer refuses them."""
    if x is None or not math.isfinite(x):
        return None
    return float(x) if digits is None else round(float(x), digits)


def _strike_json(note: NoteAnalysis, fit: KeyFit | None) -> dict[str, Any]:
    """The strike ratio as the key's fit reads it (through the base preset's soundboard
    where it describes one), else the note's own."""
    if fit is not None and fit.strike_ratio is not None:
        ratio, unc, quality = fit.strike_ratio, fit.strike_uncertainty, fit.strike_quality
    elif note.strike is not None:
        ratio, unc, quality = note.strike.ratio, note.strike.uncertainty, note.strike.quality
    else:
        return {"strike_ratio": None, "strike_ratio_uncertainty": None, "strike_quality": None}
    # an uncertainty the fit could not bound (degenerate covariance) is infinite: null
    return {"strike_ratio": round(ratio, 4), "strike_ratio_uncertainty": _finite(unc, 4),
            "strike_quality": quality}


def _note_json(note: NoteAnalysis, fit: KeyFit | None) -> dict[str, Any]:
    out: dict[str, Any] = {
        "file": note.path, "key": note.key, "name": key_name(note.key), "onset_s": round(note.onset_s, 4),
        "level_dbfs": round(note.level_db, 2), "f0_hz": round(note.first_partial_hz, 4),
        "cents_from_et": round(note.cents_from_et, 2),
        "b": _finite(note.b), "b_uncertainty": _finite(note.b_uncertainty),
        **_strike_json(note, fit),
        "partials": [{"n": p.n, "freq_hz": round(p.freq_hz, 4), "level_db": _finite(p.level_db, 2),
                      "level_uncertainty_db": _finite(p.level_uncertainty_db, 2),
                      "t60_s": _finite(p.t60_s, 3), "t60_uncertainty_s": _finite(p.t60_uncertainty_s, 3),
                      "knee_s": _finite(p.knee_s, 3),
                      "after_level_db": _finite(p.after_level_db, 2), "after_t60_s": _finite(p.after_t60_s, 3),
                      "beat_hz": _finite(p.beat_hz, 3),
                      "decay_quality": p.decay_quality} for p in note.partials],
        "unresolved": list(note.unresolved),
        "quality": note.quality,
        "notes": list(note.notes),
    }
    if fit is not None and fit.felt is not None:
        out["felt_force_1mm_n"] = round(fit.felt.force_1mm_n, 3)
        out["felt_force_factor"] = round(fit.felt.force_factor, 3)
        out["felt_exponent"] = round(fit.felt.exponent, 3)
        out["hammer_speed_m_s"] = round(fit.felt.speeds_m_s[0], 3)
        out["felt_quality"] = fit.felt.quality
    if fit is not None and fit.losses is not None:
        out["loss_b1_per_s"], out["loss_b3_s"] = fit.losses.b1_per_s, fit.losses.b3_s
    return out


def analysis_json(analyses: Sequence[RecordingAnalysis], fits: Sequence[KeyFit | None]) -> dict[str, Any]:
    """The ``voicer analyze --json`` object (schema in the README)."""
    notes = [n for a in analyses for n in a.notes]
    return {
        "recordings": [{"file": a.path, "sample_rate": a.sample_rate, "notes": len(a.notes),
                        "pitch_offset_cents": round(a.take.pitch_offset_cents, 2),
                        "steady_tones": [{"freq_hz": round(t.freq_hz, 3), "level_db": round(t.level_db, 1),
                                          "mains": t.mains} for t in a.steady],
                        "skipped": [{"time_s": round(t, 3), "reason": r} for t, r in a.skipped]} for a in analyses],
        "notes": [_note_json(n, f) for n, f in zip(notes, fits)],
    }


def _format_note(note: NoteAnalysis, fit: KeyFit | None, partials: int) -> str:
    rel = 100 * note.b_uncertainty / note.b if note.b > 0 else float("inf")
    head = (f"{key_name(note.key):>4} (key {note.key}) at {note.onset_s:7.2f} s: first partial "
            f"{note.first_partial_hz:9.3f} Hz ({note.cents_from_et:+6.1f} cents from ET), B {note.b:.3g} ± {rel:.1f} %")
    if note.strike is not None:
        head += f", strike ratio {note.strike.ratio:.3f} ± {note.strike.uncertainty:.3f} ({note.strike.quality})"
    head += f"; quality {note.quality}"
    lines = [head]
    if fit is not None and fit.felt is not None:
        f = fit.felt
        lines.append(f"      felt {f.force_1mm_n:.1f} N at 1 mm (x/÷ {f.force_factor:.2f}), exponent {f.exponent:.2f}, "
                     f"hammer {f.speeds_m_s[0]:.2f} m/s, level misfit {f.residual_db:.1f} dB ({f.quality})")
    if fit is not None and fit.losses is not None:
        lines.append(f"      losses b1 {fit.losses.b1_per_s:.3g} 1/s, b3 {fit.losses.b3_s:.3g} s ({fit.losses.quality})")
    lines.append("       n   freq_hz  level_db   t60_s  aftersound")
    for p in note.partials[:partials]:
        after = (f"T60 {p.after_t60_s:.1f} s from {p.knee_s:.2f} s" if p.after_t60_s is not None and p.knee_s is not None
                 else "")
        if p.beat_hz is not None:
            after += f"{', ' if after else ''}beats {p.beat_hz:.2f} Hz"
        lines.append(f"    {p.n:4d} {p.freq_hz:9.2f} {p.level_db:9.1f} {p.t60_s:7.2f}  {after}")
    if note.unresolved:
        lines.append(f"      not resolved by the recording (not invented): n = {', '.join(map(str, note.unresolved))}")
    lines.extend(f"      note: {r}" for r in note.notes)
    return "\n".join(lines)


def _base(args: argparse.Namespace) -> Preset:
    return load_preset(find_preset(args.base))


def cmd_analyze(args: argparse.Namespace) -> int:
    analyses = _analyze_all(args.recordings, a4_hz=args.a4)
    base = _base(args)
    settings = TableSettings()
    notes = [n for a in analyses for n in a.notes]
    if args.key is not None:
        notes = [n for n in notes if n.key == args.key]
        if not notes:
            found = sorted({n.key for a in analyses for n in a.notes})
            raise VoicerError(f"--key {args.key}: no note of that key; the recordings hold keys {found}")
        analyses = [RecordingAnalysis(path=a.path, sample_rate=a.sample_rate, take=a.take, steady=a.steady,
                                      notes=tuple(n for n in a.notes if n.key == args.key), skipped=a.skipped)
                    for a in analyses]
    fits = [fit_key(base, n.key, [n], calibration_db=args.calibration_db, settings=settings)
            for n in tqdm(notes, unit="note", desc="fit", disable=not _tty(), leave=False)]
    if args.json:
        json.dump(analysis_json(analyses, fits), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    else:
        for a in analyses:
            tones = ", ".join(f"{t.freq_hz:.1f} Hz{' (mains)' if t.mains else ''}" for t in a.steady) or "none"
            print(f"{a.path}: {len(a.notes)} note(s), pitch offset {a.take.pitch_offset_cents:+.1f} cents, "
                  f"steady tones kept out: {tones}")
            for t, reason in a.skipped:
                print(f"  skipped at {t:.2f} s: {reason}")
            for n in a.notes:
                print(_format_note(n, fits[notes.index(n)], args.partials))
    if args.plot:
        from .report.fit_plots import plot_note

        note = notes[0]
        plot_note(note, fits[0], base, args.plot)
        print(f"wrote {args.plot} ({key_name(note.key)} at {note.onset_s:.2f} s)", file=sys.stderr)
    return 0


def cmd_fit(args: argparse.Namespace) -> int:
    out = Path(args.output)
    check_output(out, suffix=".toml", what="a preset", force=args.force)
    base = _base(args)
    analyses = _analyze_all(args.recordings, a4_hz=base.instrument["a4_hz"])
    with tqdm(total=0, unit="key", desc="fit", disable=not _tty(), leave=False) as bar:
        def step(done: int, total: int) -> None:
            bar.total = total
            bar.update(1)

        result = fit_recordings(analyses, base, calibration_db=args.calibration_db, source=str(out), on_key=step)
    save_preset(result.preset, out)  # atomic; an existing file is kept as .bak
    print(_fit_summary(result, out))
    return 0


def _fit_summary(result: FitResult, out: Path) -> str:
    good = [f for f in result.fits if f.quality != "poor"]
    offset = result.preset.provenance.get("pitch_offset_cents", 0.0)
    lines = [f"wrote {out}: {len(good)} key(s) fitted of {len(result.fits)} found, "
             f"A4 = {result.preset.instrument['a4_hz']:.2f} Hz ({offset:+.1f} cents)"]
    for f in result.fits:
        parts = [f"B {f.b:.3g}" if f.b is not None else ""]
        if f.strike_ratio is not None:
            parts.append(f"strike {f.strike_ratio:.3f}")
        if f.felt is not None:
            parts.append(f"felt {f.felt.force_1mm_n:.1f} N ({f.felt.quality})")
        lines.append(f"  {key_name(f.key):>4} ({f.key}): {', '.join(p for p in parts if p)}; quality {f.quality}")
    for key, reason in result.unfitted:
        lines.append(f"  {key_name(key)} ({key}) kept from the base: {reason}")
    lines.append("These are predictions from recordings: check them by ear before any needle touches a hammer.")
    return "\n".join(lines)
