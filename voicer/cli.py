"""The ``voicer`` command line.

Every command has ``--help`` with an example. Bad input exits with status 2 and one line
on standard error; nothing else is printed for it. Ctrl-C exits with status 130 and the
line "voicer COMMAND: interrupted" (no traceback).
"""

from __future__ import annotations

__all__ = ["main", "build_parser"]

import argparse
import importlib
import json
import math
import os
import sys
import tomllib
from typing import Callable, NoReturn, Sequence

from . import __version__
from .errors import VoicerError
from .report.scale_table import JSON_PARTIALS, format_scale_table, scale_report
from .resources import find_preset
from .engine.defaults import DEFAULT_GAIN_DB, DEFAULT_SAMPLE_RATE
from .report.inspect import DEFAULT_PARTIALS, format_inspect, inspect_key
from .tone.params import KEY_PARAM_BY_NAME
from .tone.preset import Preset, load_preset

EXIT_BAD_INPUT = 2
#: Ctrl-C: 128 + SIGINT (2), as a shell reports a command killed by it (common practice).
EXIT_INTERRUPTED = 130


def _cmd_scale(args: argparse.Namespace) -> int:
    preset = load_preset(find_preset(args.preset))
    report = scale_report(preset, partials=args.partials)
    if args.json:
        json.dump(report, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print(format_scale_table(report))
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


def _ranged_float(lo: float, hi: float, what: str) -> Callable[[str], float]:
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
        if not lo <= value <= hi:  # also refuses nan
            raise argparse.ArgumentTypeError(f"{what} {text} is outside {lo:g}..{hi:g}")
        return value

    return parse


def _seconds(*, zero_ok: bool) -> Callable[[str], float]:
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds") from None
        if not math.isfinite(value) or value < 0 or (value == 0 and not zero_ok):
            raise argparse.ArgumentTypeError(f"{text} must be a finite number of seconds {'>=' if zero_ok else '>'} 0")
        return value

    return parse


def _latency(text: str) -> str | float:
    if text in ("high", "low"):
        return text
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not 'high', 'low' or a number of seconds") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"latency {value} must be > 0 seconds")
    return value


def _audio_options(parser: argparse.ArgumentParser, *, block: bool = True) -> None:
    parser.add_argument("--sample-rate", type=_ranged_int(8000, 192000, "sample rate"), default=DEFAULT_SAMPLE_RATE,
                        metavar="HZ", help=f"sample rate (default {DEFAULT_SAMPLE_RATE})")
    if block:
        parser.add_argument("--block", type=_ranged_int(16, 8192, "block"), default=256, metavar="N",
                            help="samples per block (default 256)")
        parser.add_argument("--model", default="physical", help="model plugin (default physical)")
    parser.add_argument("--gain-db", type=float, default=DEFAULT_GAIN_DB, metavar="DB",
                        help=f"master gain from bridge force to full scale (default {DEFAULT_GAIN_DB:g})")
    if block:
        parser.add_argument("--room", type=_ranged_float(0.1, 10.0, "room RT60"), metavar="RT60_S",
                            help="add a generated room (the room effect) with this reverberation time, s")
        parser.add_argument("--room-mix", type=_ranged_float(0.0, 1.0, "room mix"), default=0.25, metavar="X",
                            help="share of the room in the output, 0..1 (default 0.25; with --room)")


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{value} must be >= 1")
    return value


class _Parser(argparse.ArgumentParser):
    """Usage errors in one line, like every other error of voicer."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _lazy(module: str, name: str) -> Callable[[argparse.Namespace], int]:
    """A command imported when run (the engine or the analysis is not needed by `scale`)."""
    def run(args: argparse.Namespace) -> int:
        return getattr(importlib.import_module(f"{__package__}.{module}"), name)(args)

    return run


def _audio(name: str) -> Callable[[argparse.Namespace], int]:
    """A sound command (voicer.cli_audio)."""
    return _lazy("cli_audio", name)


def _command(sub: "argparse._SubParsersAction[argparse.ArgumentParser]", name: str, *, help: str,
             description: str, examples: Sequence[str]) -> argparse.ArgumentParser:
    """A subcommand whose --help ends with examples."""
    lead = "example:" if len(examples) == 1 else "examples:"
    return sub.add_parser(name, help=help, description=description,
                          formatter_class=argparse.RawDescriptionHelpFormatter,
                          epilog=lead + "".join(f"\n  {e}" for e in examples))


def _add_preset(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("preset", metavar="PRESET", help="preset file, a bundled name, or 'demo'")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of all commands."""
    parser = _Parser(
        prog="voicer",
        description="Hear a piano voicing job before doing it.",
        epilog="examples:\n  voicer demo\n  voicer scale demo --json\n  voicer inspect demo --key 40 --velocity 90\n"
               "  voicer render demo song.mid -o song.wav\n  voicer play demo --voicing plan.toml",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"voicer {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    demo = _command(
        sub, "demo", help="the demo scenario: evenness, a suggested plan, and the passage as found (A) and voiced (B)",
        description="The demo scenario: the bundled demo instrument as found (a few worn hammers), its\n"
                    "evenness across the scale and a suggested plan (written with a report for the client),\n"
                    "and the demo passage rendered as found (A) and with the plan (B) to WAV files (no audio\n"
                    "device needed), played when an audio device exists.",
        examples=["voicer demo", "voicer demo --out-dir /tmp/demo --no-play"])
    demo.add_argument("--out-dir", default="voicer-demo", metavar="DIR",
                      help="where the WAV files, the plan and the report go (default voicer-demo)")
    demo.add_argument("--no-play", action="store_true", help="only write the files")
    _audio_options(demo, block=False)
    demo.set_defaults(func=_audio("cmd_demo"))

    render = _command(
        sub, "render", help="render a MIDI file to WAV/FLAC",
        description="Render a MIDI file through the predicted piano (with a voicing plan: the voiced piano).",
        examples=["voicer render demo song.mid -o song.wav",
                  "voicer render demo song.mid -o song-B.flac --voicing presets/voicings/kestrel-190-mellow.toml"
                  " --stats-json stats.json",
                  "voicer render demo song.mid -o song-room.wav --room 1.5 --room-mix 0.3"])
    _add_preset(render)
    render.add_argument("midi", metavar="SONG.mid", help="standard MIDI file")
    render.add_argument("-o", "--output", required=True, metavar="OUT.wav", help="output file (.wav or .flac)")
    render.add_argument("--voicing", metavar="PLAN.toml", help="voicing plan to apply before rendering")
    render.add_argument("--tail", type=_seconds(zero_ok=True), default=3.0, metavar="S",
                        help="seconds of ringing after the last event (default 3)")
    render.add_argument("--subtype", metavar="NAME", help="sample format, e.g. PCM_16, PCM_24 (default), FLOAT")
    render.add_argument("--stats-json", metavar="FILE", help="write the render's figures as JSON (see the README)")
    _audio_options(render)
    render.set_defaults(func=_audio("cmd_render"))

    play = _command(
        sub, "play", help="play live from MIDI (or the computer keyboard) with A/B switching",
        description="Play the predicted piano live. With --voicing, state A is the preset and state B the\n"
                    "voiced preset; flip between them with the space bar, --ab-cc or a program change.",
        examples=["voicer play demo",
                  "voicer play demo --voicing presets/voicings/kestrel-190-mellow.toml --midi-in 1 --ab-cc 80",
                  "voicer play demo --midi-file presets/midi/demo-passage.mid --device pulse --block 128",
                  "voicer play demo --room 1.2"])
    _add_preset(play)
    play.add_argument("--voicing", metavar="PLAN.toml", help="voicing plan for state B")
    play.add_argument("--midi-in", metavar="PORT", help="MIDI input by name, part of a name, or number")
    play.add_argument("--midi-virtual", action="store_true",
                      help="open a virtual MIDI input (named by --midi-in, default 'voicer') for other programs")
    play.add_argument("--midi-file", metavar="SONG.mid", help="play a MIDI file in real time instead of a port")
    play.add_argument("--device", metavar="NAME", help="audio output by name, part of a name, or number")
    play.add_argument("--latency", type=_latency, default="high", help="'high', 'low' or seconds (default high)")
    play.add_argument("--ab-cc", type=_ranged_int(0, 127, "controller"), metavar="N",
                      help="MIDI controller whose press flips A/B")
    play.add_argument("--seconds", type=_seconds(zero_ok=False), metavar="S", help="stop after S seconds")
    play.add_argument("--knobs", metavar="FILE.toml",
                      help="MIDI controllers of the live knobs that voice the last state: felt, strike point, hammer "
                           "mass of the keys last played, a save button (default: the bundled presets/knobs.toml)")
    play.add_argument("--no-knobs", action="store_true", help="play without live knobs")
    play.add_argument("--knob-keys", metavar="KEYS",
                      help="keys the knobs act on, e.g. 52-67 or 60,64,67 (default: the keys last played)")
    play.add_argument("--save-plan", metavar="PLAN.toml",
                      help="where the knobs' amounts are saved (default: voicing-DATE-TIME.toml here)")
    _audio_options(play)
    play.set_defaults(func=_audio("cmd_play"))

    devices = _command(sub, "devices", help="list audio outputs and MIDI inputs",
                       description="List the audio output devices and MIDI input ports voicer can use.",
                       examples=["voicer devices"])
    devices.set_defaults(func=_audio("cmd_devices"))

    plugins = _command(sub, "plugins", help="list the plugins found (models, effects, sinks, sources)",
                       description="List every plugin registered under voicer's entry-point groups;\n"
                                   "a broken plugin is shown with its reason.",
                       examples=["voicer plugins"])
    plugins.set_defaults(func=_audio("cmd_plugins"))

    record = _command(
        sub, "record", help="guided recording: asks for each key, saves one FLAC per strike and an index",
        description="Record a piano key by key: each step names the key and dynamic to play, waits for the\n"
                    "strike, captures a fixed length (6 s at A0 to 3 s at C8), checks level and clipping (asking\n"
                    "again when a strike is too soft, clipped or doubled) and saves KKK-NAME-DYN-T.flac with\n"
                    "an entry in takes.json. Run it again on the same folder to continue an interrupted session:\n"
                    "recorded steps are skipped, and delete a take's file to record that step again.",
        examples=["voicer record --keys 21-108 --dynamics mf,ff -o takes/",
                  "voicer record --keys 60,64,67 --dynamics p,mf,ff -o takes/ --device USB --sample-rate 96000",
                  "voicer record --keys 21-108 --dynamics mf -o takes/ --input-file long-take.flac --fast"])
    record.add_argument("--keys", required=True, metavar="KEYS",
                        help="MIDI keys in the order to play: ranges and lists, e.g. 21-108 or 60,64,67")
    record.add_argument("--dynamics", default="mf", metavar="LIST",
                        help="dynamics per key from pp, p, mp, mf, f, ff, e.g. mf,ff (default mf)")
    record.add_argument("-o", "--out", required=True, metavar="DIR", help="folder of the takes (made if missing)")
    record.add_argument("--device", metavar="NAME", help="audio input by name, part of a name, or number")
    record.add_argument("--sample-rate", type=_ranged_int(8000, 192000, "sample rate"), metavar="HZ",
                        help=f"device sample rate (default {DEFAULT_SAMPLE_RATE}; a replayed file keeps its own)")
    record.add_argument("--seconds", type=_seconds(zero_ok=False), metavar="S",
                        help="capture length after each strike, for every key (default 6 s bass to 3 s treble)")
    record.add_argument("--input-file", metavar="FILE",
                        help="replay a recording as if it came from the input (tests, or splitting a long take)")
    record.add_argument("--fast", action="store_true", help="with --input-file: as fast as possible, not in real time")

    record.set_defaults(func=_lazy("cli_record", "cmd_record"))

    scale = _command(
        sub, "scale", help="per-key table of a preset: f0, length, tension, B, unison, partials",
        description="Print what the model believes about every key of a piano preset.",
        examples=["voicer scale presets/pianos/kestrel-190.toml", "voicer scale demo --json"])
    _add_preset(scale)
    scale.add_argument("--json", action="store_true", help="print JSON (schema in the README)")
    scale.add_argument("--partials", type=_positive_int, default=JSON_PARTIALS, metavar="N",
                       help=f"partial frequencies listed per key in JSON (default {JSON_PARTIALS})")
    scale.set_defaults(func=_cmd_scale)

    inspect = _command(
        sub, "inspect", help="the predicted blow of one key: contact, peak force, partials",
        description="Simulate one key struck at one MIDI velocity and show the hammer contact and the\n"
                    "partials it excites (level of the bridge force, deviation from harmonic, decay).",
        examples=["voicer inspect demo --key 40 --velocity 90",
                  "voicer inspect demo --key 60 --velocity 64 --set felt_force_1mm_n=110 --plot c4.png",
                  "voicer inspect demo --key 60 --velocity 64 --json"])
    _add_preset(inspect)
    inspect.add_argument("--key", type=_ranged_int(21, 108, "key"), required=True, help="MIDI key 21..108")
    inspect.add_argument("--velocity", type=_ranged_int(1, 127, "velocity"), default=64, help="MIDI velocity 1..127")
    inspect.add_argument("--set", action="append", metavar="FIELD=VALUE", default=[],
                         help="override a per-key preset field for this key (repeatable)")
    inspect.add_argument("--partials", type=_positive_int, default=DEFAULT_PARTIALS, metavar="N",
                         help=f"partials listed (default {DEFAULT_PARTIALS})")
    inspect.add_argument("--plot", metavar="FILE.png", help="draw pulse, bridge force and spectrum (needs matplotlib)")
    inspect.add_argument("--json", action="store_true", help="print JSON (schema in the README)")
    inspect.set_defaults(func=_cmd_inspect)

    analyze = _command(
        sub, "analyze", help="measure recorded notes: pitch, inharmonicity, partials, decays, strike point, felt",
        description="Find the struck notes of recordings (one note per file, or a take of many) and measure\n"
                    "each: first partial and its distance from equal temperament, B, the partials' levels and\n"
                    "decays, the strike ratio, and the felt and losses fitted against a base preset.",
        examples=["voicer analyze takes/060-C4-mf-1.flac", "voicer analyze take.wav --key 40 --plot c3.png",
                  "voicer analyze takes/*.flac --json > analysis.json"])
    analyze.add_argument("recordings", nargs="+", metavar="RECORDING", help="WAV, FLAC, MP3, OGG ... any sample rate")
    analyze.add_argument("--key", type=_ranged_int(21, 108, "key"), help="report only this key (MIDI 21..108)")
    analyze.add_argument("--base", default="demo", metavar="PRESET",
                         help="preset the felt and losses are fitted against (default demo)")
    analyze.add_argument("--a4", type=_ranged_float(380.0, 480.0, "A4"), default=440.0, metavar="HZ",
                         help="reference of equal temperament (default 440 Hz, ISO 16)")
    analyze.add_argument("--calibration-db", type=_ranged_float(-200.0, 100.0, "calibration"), metavar="DB",
                         help="known recording gain: dBFS of a 1 N bridge-force partial (e.g. a render's --gain-db)")
    analyze.add_argument("--partials", type=_positive_int, default=12, metavar="N", help="partials listed (default 12)")
    analyze.add_argument("--plot", metavar="FILE.png", help="spectrum with the fitted series and model, and decays")
    analyze.add_argument("--json", action="store_true", help="print JSON (schema in the README)")
    analyze.set_defaults(func=_lazy("cli_fit", "cmd_analyze"))

    fit = _command(
        sub, "fit", help="fit a preset to recordings of a real piano",
        description="Analyse recordings and write a preset whose measured keys carry the measured values\n"
                    "(pitch, B as core diameter, strike ratio, felt, losses, and the partials as measured),\n"
                    "the other keys interpolated from them and from the base preset. Never overwrites a file\n"
                    "without --force (then the old one is kept as .bak); a failed fit writes nothing.",
        examples=["voicer fit takes/*.flac --base demo -o client.toml",
                  "voicer fit take.wav --base presets/pianos/kestrel-190.toml -o client.toml --force"])
    fit.add_argument("recordings", nargs="+", metavar="RECORDING", help="WAV, FLAC, MP3, OGG ... any sample rate")
    fit.add_argument("--base", required=True, metavar="PRESET", help="preset for what the recordings do not tell")
    fit.add_argument("-o", "--output", required=True, metavar="OUT.toml", help="the fitted preset")
    fit.add_argument("--force", action="store_true", help="replace an existing output (keeping OUT.toml.bak)")
    fit.add_argument("--calibration-db", type=_ranged_float(-200.0, 100.0, "calibration"), metavar="DB",
                     help="known recording gain: dBFS of a 1 N bridge-force partial")
    fit.set_defaults(func=_lazy("cli_fit", "cmd_fit"))

    compare = _command(
        sub, "compare", help="evenness across the scale, before and after a voicing plan",
        description="Measure every key at pp, mf and ff (loudness, brightness, partials 5-10, attack,\n"
                    "sustain), fit a smooth trend across the scale and flag the keys that stand out;\n"
                    "with a plan, the same for the voiced piano. Predictions: check them by ear.",
        examples=["voicer compare demo",
                  "voicer compare demo --voicing presets/voicings/kestrel-190-mellow.toml --html report.html",
                  "voicer compare client.toml --keys 40-70 --json > evenness.json"])
    _add_preset(compare)
    compare.add_argument("--voicing", metavar="PLAN.toml", help="voicing plan to compare against")
    compare.add_argument("--keys", default="21-108", metavar="RANGE", help="keys measured (default 21-108)")
    compare.add_argument("--dynamic", choices=("pp", "mf", "ff"), default="mf", help="dynamic of the table (default mf)")
    compare.add_argument("--plot", metavar="FILE.png", help="evenness curves (and FILE-2.png: flagged keys' spectra)")
    compare.add_argument("--html", metavar="FILE.html", help="a self-contained report for the client")
    compare.add_argument("--json", action="store_true", help="print JSON (schema in the README)")
    compare.set_defaults(func=_lazy("cli_voicing", "cmd_compare"))

    suggest = _command(
        sub, "suggest", help="write a voicing plan that brings the outlier hammers back to the scale",
        description="Find the keys that stand out from the trend across the scale (as voicer compare does)\n"
                    "and, per key, the smallest felt change (needle or harden, at the crown, the shoulders or\n"
                    "throughout) that brings its loudness and brightness back; write it as a plan to audition.",
        examples=["voicer suggest demo -o plan.toml", "voicer play demo --voicing plan.toml"])
    _add_preset(suggest)
    suggest.add_argument("-o", "--output", required=True, metavar="PLAN.toml", help="the plan written")
    suggest.add_argument("--keys", default="21-108", metavar="RANGE", help="keys considered (default 21-108)")
    suggest.add_argument("--force", action="store_true", help="replace an existing plan (keeping PLAN.toml.bak)")
    suggest.set_defaults(func=_lazy("cli_voicing", "cmd_suggest"))
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
    except KeyboardInterrupt:  # Ctrl-C while tables are built or files written: files are left as they were
        print(f"voicer {args.command}: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # e.g. `voicer scale demo | head`: stop quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
