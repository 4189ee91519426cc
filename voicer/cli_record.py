"""``voicer record``: guided recording of a piano, key by key, into a folder of takes.

Imported only when the command runs (``voicer.cli`` declares the options), so that the
other commands do not load the analysis package.
"""

from __future__ import annotations

__all__ = ["cmd_record", "EXIT_INTERRUPTED"]

import argparse

from .analysis.guided import GuidedSession, Prompt, SessionResult, parse_dynamics, parse_keys, plan_steps
from .engine.defaults import DEFAULT_SAMPLE_RATE
from .errors import ParameterError
from .io.capture import FileInput, PortAudioInput

#: Exit status after Ctrl-C (128 + SIGINT, the shell's convention).
EXIT_INTERRUPTED = 130


def _say(text: str) -> None:
    print(text, flush=True)


def cmd_record(args: argparse.Namespace) -> int:
    steps = plan_steps(parse_keys(args.keys), parse_dynamics(args.dynamics))
    if args.input_file is None:
        if args.fast:
            raise ParameterError("--fast replays --input-file as fast as possible; give --input-file FILE")
        source: FileInput | PortAudioInput = PortAudioInput(
            args.device, sample_rate=args.sample_rate or DEFAULT_SAMPLE_RATE, channels=1)
    else:
        if args.device is not None:
            raise ParameterError("--device and --input-file exclude each other: record from a device or "
                                 "replay a file")
        source = FileInput(args.input_file, realtime=not args.fast)
        if args.sample_rate is not None and args.sample_rate != source.sample_rate:
            raise ParameterError(f"--sample-rate {args.sample_rate} does not match {args.input_file} "
                                 f"({source.sample_rate} Hz): a file replays at its own rate")
    last: list[Prompt] = []

    def prompt(p: Prompt) -> None:
        last[:] = [p]
        _say(str(p))

    session = GuidedSession(args.out, steps, seconds=args.seconds, on_prompt=prompt,
                            on_message=lambda text: _say(f"  {text}"))
    try:
        result = session.run(source)
    except KeyboardInterrupt:
        where = f" at step {last[0].index} of {last[0].total}" if last else ""
        _say(f"\ninterrupted{where}: every take saved so far is kept in {args.out}; "
             "run the same command again to continue")
        return EXIT_INTERRUPTED
    _say(_summary(result, args.out))
    return 0


def _summary(result: SessionResult, folder: str) -> str:
    again = f", {len(result.refused)} strikes asked again" if result.refused else ""
    saved = f"{len(result.saved)} takes saved now{again}"
    if result.complete:
        return f"done: all {result.total} steps recorded in {folder}; {saved}"
    left = result.total - result.skipped - len(result.saved)
    return (f"the input ended with {left} of {result.total} steps still to record; {saved}; "
            "run again with the same folder to continue")
