"""Evenness before and after a voicing plan: the table, JSON, plots and the client's report.

``voicer compare`` measures the preset (:func:`voicer.report.evenness.measure`) and, with
a plan, the voiced preset, each against its own robust trend across the compass (the
trend barely moves when a few keys change, so "after" is judged against the same smooth
scale), and reports per key and dynamic the metrics, the trend and the deviation, the
flagged keys and the rms deviations.
"""

from __future__ import annotations

__all__ = ["Comparison", "compare", "comparison_json", "format_comparison", "format_outliers", "plot_comparison",
           "write_report"]

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np

from ..physics.tuning import key_name
from ..tone.preset import Preset
from ..tone.tables import simulate_blows
from .evenness import METRIC_INFO, METRICS, VOICING_METRICS, Evenness, measure

#: The summary's metrics and their JSON names.
SUMMARY = (("brightness", "brightness"), ("loudness_phon", "loudness"), ("high_partials_db", "high_partials"))


@dataclass(frozen=True)
class Comparison:
    """Evenness of a preset and, with a plan, of the voiced preset."""

    before: Evenness
    after: Evenness | None
    preset: Preset
    voiced: Preset | None
    plan_name: str | None = None


def compare(preset: Preset, voiced: Preset | None = None, *, keys: Iterable[int] = range(21, 109),
            dynamics: Sequence[str] = ("pp", "mf", "ff"), plan_name: str | None = None) -> Comparison:
    """Measure ``preset`` and ``voiced`` (the same preset with a plan applied) over ``keys``."""
    keys = list(keys)
    before = measure(preset, keys=keys, dynamics=dynamics)
    after = measure(voiced, keys=keys, dynamics=dynamics) if voiced is not None else None
    return Comparison(before=before, after=after, preset=preset, voiced=voiced, plan_name=plan_name)


def _num(x: float) -> float | None:
    return round(float(x), 4) if np.isfinite(x) else None


def comparison_json(c: Comparison) -> dict[str, Any]:
    """The ``voicer compare --json`` object (schema in the README)."""
    b, a = c.before, c.after
    rows = []
    for i, key in enumerate(b.keys):
        for j, dyn in enumerate(b.dynamics):
            row: dict[str, Any] = {"key": int(key), "name": key_name(int(key)), "dynamic": dyn,
                                   "hammer_speed_m_s": round(float(b.speeds_m_s[j]), 4)}
            for label, ev in (("before", b), ("after", a)):
                if ev is None:
                    continue
                row[label] = {m: _num(ev.values[m][i, j]) for m in METRICS}
                row[f"trend_{label}"] = {m: _num(ev.trend[m][i, j]) for m in METRICS}
                row[f"deviation_{label}"] = {m: _num(ev.deviation[m][i, j]) for m in METRICS}
                row[f"flagged_{label}"] = [m for m in METRICS if bool(ev.flagged[m][i, j])]
            rows.append(row)
    # Over all keys, and over the outlier hammers alone: the compass-wide figure also
    # holds what no voicing mends (the top octaves' single-dynamic dips, 1.7 phon rms on
    # the demo), which can hide a plan that evens its keys.
    outliers = b.flagged_keys()
    summary: dict[str, Any] = {"outlier_keys": outliers}
    for metric, name in SUMMARY:
        for label, ev in (("before", b), ("after", a)):
            if ev is None:
                continue
            summary[f"{name}_rms_dev_{label}"] = _num(ev.rms_deviation(metric))
            summary[f"{name}_rms_dev_outliers_{label}"] = _num(ev.rms_deviation(metric, keys=outliers)) if outliers \
                else None
    out: dict[str, Any] = {
        "preset": c.preset.source or c.preset.instrument["name"], "voicing": c.plan_name,
        "dynamics": list(b.dynamics), "metrics": {m: {"unit": METRIC_INFO[m][0], "meaning": METRIC_INFO[m][1]}
                                                  for m in METRICS},
        "keys": rows, "flagged_keys": b.flagged_keys(), "summary": summary,
    }
    if a is not None:
        out["flagged_keys_after"] = a.flagged_keys()
    return out


def format_comparison(c: Comparison, *, dynamic: str = "mf") -> str:
    """The per-key table at one dynamic (flagged keys marked), then the summary."""
    b, a = c.before, c.after
    j = b.dynamics.index(dynamic)
    head = f"{'key':>9}  {'loudness phon':>13} {'dev':>6}"
    head += f" {'after':>7} {'dev':>6}" if a is not None else ""
    head += f"  {'brightness':>10} {'dev':>6}"
    head += f" {'after':>7} {'dev':>6}" if a is not None else ""
    lines = [f"evenness at {dynamic} ({b.speeds_m_s[j]:.2f} m/s); dev = deviation from the trend across the scale; "
             f"* flagged", head]
    flagged = set(b.flagged_keys())
    for i, key in enumerate(b.keys):
        mark = "*" if int(key) in flagged else " "
        row = f"{mark}{key_name(int(key)):>4} ({int(key):3d})  "
        for m, width in (("loudness_phon", 13), ("brightness", 10)):
            row += f"{b.values[m][i, j]:{width}.2f} {b.deviation[m][i, j]:+6.2f}"
            if a is not None:
                row += f" {a.values[m][i, j]:7.2f} {a.deviation[m][i, j]:+6.2f}"
            row += "  "
        lines.append(row.rstrip())
    lines.append(f"flagged keys (loudness or brightness, any dynamic): "
                 f"{', '.join(f'{key_name(k)} ({k})' for k in b.flagged_keys()) or 'none'}")
    if a is not None:
        lines.append(f"flagged after the plan: {', '.join(f'{key_name(k)} ({k})' for k in a.flagged_keys()) or 'none'}")
    for metric, name in SUMMARY:
        unit = METRIC_INFO[metric][0]
        text = f"rms deviation of {name}: {b.rms_deviation(metric):.3f} {unit}"
        if a is not None:
            text += f" before, {a.rms_deviation(metric):.3f} {unit} after"
        lines.append(text)
    return "\n".join(lines)


def format_outliers(c: Comparison) -> str:
    """The short evenness table: the outlier keys with their deviations per dynamic, and
    the rms deviations (before and after a plan)."""
    b, a = c.before, c.after
    keys = sorted(set(b.flagged_keys()) | set(a.flagged_keys() if a is not None else []))
    lines = [f"evenness across the scale (deviation from the trend; brightness in harmonics, loudness in phon; "
             f"{' / '.join(b.dynamics)}):"]
    for key in keys:
        i = int(np.flatnonzero(b.keys == key)[0])
        row = f"  {key_name(key):>4} ({key:3d})  brightness " + " ".join(f"{v:+.2f}" for v in b.deviation["brightness"][i])
        row += "  loudness " + " ".join(f"{v:+.1f}" for v in b.deviation["loudness_phon"][i])
        if a is not None:
            row += "  -> after: " + " ".join(f"{v:+.2f}" for v in a.deviation["brightness"][i])
            row += " / " + " ".join(f"{v:+.1f}" for v in a.deviation["loudness_phon"][i])
        lines.append(row)
    if not keys:
        lines.append("  no outlier hammer")
    for metric, name in SUMMARY[:2]:
        text = f"  rms deviation of {name}: {b.rms_deviation(metric):.3f}"
        if a is not None:
            text += f" -> {a.rms_deviation(metric):.3f}"
            if keys:
                text += f" (outlier keys: {b.rms_deviation(metric, keys=keys):.3f} -> " \
                        f"{a.rms_deviation(metric, keys=keys):.3f})"
        lines.append(text + f" {METRIC_INFO[metric][0]}")
    return "\n".join(lines)


def _spectra(preset: Preset, keys: Sequence[int], speed: float) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    tables = simulate_blows(preset, keys, [speed]).tables
    out = {}
    for k in keys:
        t = tables[k]
        amp = np.abs(t.amplitude_n[0].sum(axis=0))
        out[k] = (np.arange(1, amp.size + 1), 20 * np.log10(np.maximum(amp, 1e-12)))
    return out


def plot_comparison(c: Comparison, *, spectra_keys: Sequence[int] | None = None, dynamic: str = "mf") -> list[Any]:
    """Figures: the evenness curves (loudness and brightness at every dynamic, before
    and after, with the trend), and the spectra of up to six flagged keys before and
    after at ``dynamic``."""
    from .plots import _pyplot

    plt = _pyplot()
    b, a = c.before, c.after
    figs = []
    fig, axes = plt.subplots(len(VOICING_METRICS), 1, figsize=(9.0, 7.0), sharex=True)
    for ax, metric in zip(axes, VOICING_METRICS):
        for j, dyn in enumerate(b.dynamics):
            color = f"C{j}"
            ax.plot(b.keys, b.trend[metric][:, j], color=color, lw=1.0)
            ax.plot(b.keys, b.values[metric][:, j], "o", color=color, ms=3, label=f"{dyn} before")
            if a is not None:
                ax.plot(a.keys, a.values[metric][:, j], "x", color=color, ms=5, label=f"{dyn} after")
            hit = b.flagged[metric][:, j]
            ax.plot(b.keys[hit], b.values[metric][hit, j], "o", mfc="none", mec="red", ms=9)
        ax.set_ylabel(f"{metric} ({METRIC_INFO[metric][0]})")
        ax.grid(alpha=0.3)
    axes[0].legend(fontsize="x-small", ncol=3)
    axes[-1].set_xlabel("MIDI key (lines: trend across the scale; red rings: flagged)")
    fig.suptitle("evenness across the scale" + (f": {c.plan_name}" if c.plan_name else ""))
    fig.tight_layout()
    figs.append(fig)
    keys = list(spectra_keys if spectra_keys is not None else b.flagged_keys())[:6]
    if keys:
        speed = float(b.speeds_m_s[b.dynamics.index(dynamic)])
        before = _spectra(c.preset, keys, speed)
        after = _spectra(c.voiced, keys, speed) if c.voiced is not None else None
        fig, axes = plt.subplots(len(keys), 1, figsize=(9.0, 2.2 * len(keys)), squeeze=False)
        for ax, k in zip(axes[:, 0], keys):
            n, lv = before[k]
            ax.plot(n, lv, "o-", ms=3, lw=0.8, label="before")
            if after is not None:
                n2, lv2 = after[k]
                ax.plot(n2, lv2, "x-", ms=4, lw=0.8, label="after")
            ax.set(ylabel="dB re 1 N", title=f"{key_name(k)} ({k}) at {dynamic}", xlim=(0.5, min(n[-1], 40) + 0.5))
            ax.set_ylim(bottom=max(lv.max() - 80, float(np.min(lv))))
            ax.grid(alpha=0.3)
        axes[0, 0].legend(fontsize="small")
        axes[-1, 0].set_xlabel("partial number")
        fig.tight_layout()
        figs.append(fig)
    return figs


def write_report(c: Comparison, path: str | Path, *, dynamic: str = "mf") -> Path:
    """The client's report: one self-contained HTML file (plots embedded)."""
    from .html import Section, figure_png, write_html

    b, a = c.before, c.after
    j = b.dynamics.index(dynamic)
    from ..errors import VoicerError

    notes = []
    try:
        figs = [(figure_png(f), alt) for f, alt in zip(plot_comparison(c, dynamic=dynamic),
                                                       ("evenness across the scale", "spectra of the flagged keys"))]
    except VoicerError as exc:  # no matplotlib: the report without its plots
        figs, notes = [], [f"(No plots in this report: {exc}.)"]
    flagged = set(b.flagged_keys())
    columns = ["key", "loudness (phon)", "deviation"] + (["after", "deviation after"] if a else []) \
        + ["brightness", "deviation"] + (["after", "deviation after"] if a else [])
    rows = []
    for i, key in enumerate(b.keys):
        row: list[Any] = [f"{key_name(int(key))} ({int(key)})"]
        for m in ("loudness_phon", "brightness"):
            row += [float(b.values[m][i, j]), float(b.deviation[m][i, j])]
            if a is not None:
                row += [float(a.values[m][i, j]), float(a.deviation[m][i, j])]
        rows.append(row)
    summary = [f"Flagged keys: {', '.join(f'{key_name(k)} ({k})' for k in sorted(flagged)) or 'none'}."]
    for metric, name in SUMMARY[:2]:
        text = f"Deviation of {name} from the smooth trend (rms): {b.rms_deviation(metric):.3f} " \
               f"{METRIC_INFO[metric][0]}"
        summary.append(text + (f" before, {a.rms_deviation(metric):.3f} after." if a is not None else "."))
    title = f"Evenness of {c.preset.instrument['name'] or 'the piano'}" + (f", with {c.plan_name}" if c.plan_name else "")
    sections = [Section("Summary", paragraphs=summary + notes, figures=figs[:1]),
                Section(f"Per key at {dynamic}", columns=columns, rows=rows,
                        highlight=frozenset(i for i, k in enumerate(b.keys) if int(k) in flagged), figures=figs[1:])]
    caution = ("These are predictions of a model, not measurements of the piano. Voicing is done in small steps, "
               "re-tested at pp, mf and ff; needling cannot be undone, so the technician's ears decide.")
    return write_html(path, title, sections, caution=caution)
