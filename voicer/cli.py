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
import tomllib
from typing import Callable, Sequence

from . import __version__
from .errors import VoicerError
from .report.scale_table import JSON_PARTIALS, format_scale_table, scale_report
from .resources import DEMO_PIANO, find_preset
from .report.inspect import DEFAULT_PARTIALS, format_inspect, inspect_key
from .tone.params import KEY_PARAM_BY_NAME
from .tone.preset import Preset, load_preset

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
    print("\nNext: hear what one blow does, e.g.  voicer inspect demo --key 60 --velocity 64")
    return 0


def _parse_set(preset: Preset, key: int, items: list[str]) -> Preset:
    """Apply repeated ``--set FIELD=VALUE`` to one key, validated like the preset."""
    values: dict[str, object] = {}
    for item in items:
        field, sep, text = item.partition("=")
        field = field.strip()
        if not sep or not field:
            raise VoicerError(f"--set {item!r}: expected FIELD=VALUE, e.g. --set strike_ratio=0.12")
        if field not in KEY_PARAM_BY_NAME:
            raise VoicerError(f"--set {field}: not a per-key field; per-key fields are: {', '.join(KEY_PARAM_BY_NAME)}")
        try:
            values[field] = tomllib.loads(f"v = {text.strip()}")["v"]
        except tomllib.TOMLDecodeError:
            values[field] = text.strip()  # let validation name it as the wrong type
    return preset.with_key_values(key, values)


def _cmd_inspect(args: argparse.Namespace) -> int:
    preset = load_preset(find_preset(args.preset))
    if args.set:
        preset = _parse_set(preset, args.key, args.set)
    report = inspect_key(preset, args.key, args.velocity, partials=args.partials)
    if args.plot:
        from .report.plots import plot_inspect

        plot_inspect(report, args.plot)
    public = {k: v for k, v in report.items() if not k.startswith("_")}
    if args.json:
        json.dump(public, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print(format_inspect(public))
        if args.plot:
            print(f"plot written to {args.plot}")
    return 0


def _ranged_int(lo: int, hi: int, what: str) -> Callable[[str], int]:
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if not lo <= value <= hi:
            raise argparse.ArgumentTypeError(f"{what} {value} is outside {lo}..{hi}")
        return value

    return parse


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
        epilog="examples:\n  voicer demo\n  voicer scale demo --json\n  voicer inspect demo --key 40 --velocity 90",
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

    inspect = sub.add_parser(
        "inspect", help="the predicted blow of one key: contact, peak force, partials",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Simulate one key struck at one MIDI velocity and show the hammer contact and the\n"
                    "partials it excites (level of the bridge force, deviation from harmonic, decay).",
        epilog="examples:\n  voicer inspect demo --key 40 --velocity 90\n"
               "  voicer inspect demo --key 60 --velocity 64 --set felt_force_1mm_n=110 --plot c4.png\n"
               "  voicer inspect demo --key 60 --velocity 64 --json")
    inspect.add_argument("preset", metavar="PRESET", help="preset file, a bundled name, or 'demo'")
    inspect.add_argument("--key", type=_ranged_int(21, 108, "key"), required=True, help="MIDI key 21..108")
    inspect.add_argument("--velocity", type=_ranged_int(1, 127, "velocity"), default=64, help="MIDI velocity 1..127")
    inspect.add_argument("--set", action="append", metavar="FIELD=VALUE", default=[],
                         help="override a per-key preset field for this key (repeatable)")
    inspect.add_argument("--partials", type=_positive_int, default=DEFAULT_PARTIALS, metavar="N",
                         help=f"partials listed (default {DEFAULT_PARTIALS})")
    inspect.add_argument("--plot", metavar="FILE.png", help="draw pulse, bridge force and spectrum (needs matplotlib)")
    inspect.add_argument("--json", action="store_true", help="print JSON (schema in the README)")
    inspect.set_defaults(func=_cmd_inspect)
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
