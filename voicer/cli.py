"""The ``voicer`` command line.

Every command has ``--help`` with an example. Bad input exits with status 2 and one line
on standard error; nothing else is printed for it.
"""

from __future__ import annotations

__all__ = ["main", "build_parser"]

import argparse
import json
import os
import sys
from typing import Callable, Sequence

from . import __version__
from .errors import VoicerError
from .report.scale_table import JSON_PARTIALS, format_scale_table, scale_report
from .resources import DEMO_PIANO, find_preset
from .tone.preset import load_preset

EXIT_BAD_INPUT = 2


def _cmd_scale(args: argparse.Namespace) -> int:
    preset = load_preset(find_preset(args.preset))
    report = scale_report(preset, partials=args.partials)
    if args.json:
        json.dump(report, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print(format_scale_table(report))
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    path = find_preset(DEMO_PIANO)
    preset = load_preset(path)
    print(f"voicer demo: the bundled instrument {DEMO_PIANO} ({path})\n")
    print(format_scale_table(scale_report(preset)))
    return 0


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{value} must be >= 1")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of all commands."""
    parser = argparse.ArgumentParser(
        prog="voicer",
        description="Hear a piano voicing job before doing it.",
        epilog="example:\n  voicer demo\n  voicer scale demo --json",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"voicer {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    demo = sub.add_parser(
        "demo", help="show the bundled demo instrument", formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Show what voicer predicts for the bundled demo instrument (no audio device needed).",
        epilog="example:\n  voicer demo")
    demo.set_defaults(func=_cmd_demo)

    scale = sub.add_parser(
        "scale", help="per-key table of a preset: f0, length, tension, B, unison, partials",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Print what the model believes about every key of a piano preset.",
        epilog="examples:\n  voicer scale presets/pianos/kestrel-190.toml\n  voicer scale demo --json")
    scale.add_argument("preset", metavar="PRESET", help="preset file, a bundled name, or 'demo'")
    scale.add_argument("--json", action="store_true", help="print JSON (schema in the README)")
    scale.add_argument("--partials", type=_positive_int, default=JSON_PARTIALS, metavar="N",
                       help=f"partial frequencies listed per key in JSON (default {JSON_PARTIALS})")
    scale.set_defaults(func=_cmd_scale)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    func: Callable[[argparse.Namespace], int] = args.func
    try:
        return func(args)
    except VoicerError as exc:
        print(f"voicer {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:  # e.g. `voicer scale demo | head`: stop quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
