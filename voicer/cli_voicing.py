"""The voicing commands: compare (evenness before/after a plan), suggest (a plan for the outliers)."""

from __future__ import annotations

__all__ = ["cmd_compare", "cmd_suggest"]

import argparse
import json
import sys
from pathlib import Path

from tqdm import tqdm

from .engine.knob_state import parse_key_spec
from .errors import VoicerError
from .io.atomic import check_output
from .resources import find_preset
from .tone.preset import load_preset
from .tone.voicing import apply_voicing, load_voicing


def cmd_compare(args: argparse.Namespace) -> int:
    from .report.compare import compare, comparison_json, format_comparison

    preset = load_preset(find_preset(args.preset))
    voiced = plan_name = None
    if args.voicing:
        plan = load_voicing(args.voicing)
        voiced = apply_voicing(preset, plan)
        plan_name = plan.name or Path(args.voicing).stem
    keys = parse_key_spec(args.keys, "--keys")
    if len(keys) < 8:
        raise VoicerError(f"--keys {args.keys}: evenness needs a trend over at least 8 keys")
    result = compare(preset, voiced, keys=keys, plan_name=plan_name)
    if args.plot:
        from .report.compare import plot_comparison

        figs = plot_comparison(result)
        path = Path(args.plot)
        figs[0].savefig(path, dpi=110)
        for i, fig in enumerate(figs[1:], start=2):
            fig.savefig(path.with_name(f"{path.stem}-{i}{path.suffix}"), dpi=110)
    if args.html:
        from .report.compare import write_report

        write_report(result, args.html)
    if args.json:
        json.dump(comparison_json(result), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print(format_comparison(result, dynamic=args.dynamic))
        for what, path in (("plot", args.plot), ("report", args.html)):
            if path:
                print(f"{what} written to {path}")
    return 0


def cmd_suggest(args: argparse.Namespace) -> int:
    from .report.suggest import suggest, write_plan

    out = Path(args.output)
    check_output(out, suffix=".toml", what="a voicing plan", force=args.force)
    preset = load_preset(find_preset(args.preset))
    with tqdm(total=0, unit="key", desc="suggest", disable=not sys.stderr.isatty(), leave=False) as bar:
        def step(done: int, total: int) -> None:
            bar.total = total
            bar.update(1)

        result = suggest(preset, keys=parse_key_spec(args.keys, "--keys"), on_key=step)
    write_plan(result, out)
    if not result.keys:
        print(f"wrote {out}: no outlier hammer found, the plan changes nothing")
        return 0
    print(f"wrote {out}: {len(result.keys)} key(s)")
    for k in result.keys:
        print(f"  {k.key:3d}: {k.operation.describe()}" + (" (the safe range's largest)" if k.at_limit else ""))
    print(f"audition it: voicer play {args.preset} --voicing {out}   (A/B with the space bar)")
    print("Predictions: work in smaller steps and listen; needling cannot be undone.")
    return 0
