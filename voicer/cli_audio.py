"""The sound commands of the command line: render, play, demo, devices, plugins.

Everything these commands play through or read from (the model, the room, the file and
PortAudio sinks, the MIDI file and port sources) comes through the plugin host, like a
third-party plugin would: a broken plugin is reported by name on standard error and
skipped.
"""

from __future__ import annotations

__all__ = ["cmd_render", "cmd_play", "cmd_demo", "cmd_devices", "cmd_plugins", "render_file", "Plugins"]

import argparse
import contextlib
import json
import math
import sys
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from threadpoolctl import threadpool_limits

from .engine.host import Effect, PluginInfo, discover, format_plugins, load_plugin
from .engine.keyboard import HELP, KNOB_HELP, KeyboardPlayer, raw_terminal
from .engine.knob_state import keys_text, parse_key_spec
from .engine.knobs import KnobMap, load_knobs
from .engine.live import LiveInput
from .engine.live_knobs import LiveKnobs
from .engine.offline import RenderResult, render_events
from .engine.renderer import Renderer
from .engine.rebuild import LIVE_MODELS
from .engine.session import prepare_states, table_settings
from .errors import VoicerError
from .io.atomic import atomic_write_bytes
from .io.sinks import format_devices, list_output_devices
from .io.sources import format_ports
from .resources import DEMO_PIANO, find_preset, presets_dir
from .tone.preset import Preset, load_preset
from .tone.voicing import load_voicing

if TYPE_CHECKING:  # pragma: no cover
    from .io.sinks import PortAudioSink
    from .io.sources import MidiPortSource

CHANNELS = 2
DEMO_MIDI = "demo-passage.mid"
#: The wear the demo scenario plants in the demo instrument ("the piano as found").
DEMO_WEAR = "kestrel-190-wear.toml"


def _tty() -> bool:
    return sys.stderr.isatty()


class Plugins:
    """The plugins a command uses, discovered once; each broken one is reported on
    standard error by name, with its reason, and skipped (``voicer plugins`` lists them)."""

    def __init__(self) -> None:
        self.found: list[PluginInfo] = discover()
        for p in self.found:
            if p.cls is None:
                print(f"voicer: skipping the broken {p.kind} plugin {p.name!r} ({p.target}): {p.error}",
                      file=sys.stderr)

    def get(self, kind: str, name: str) -> type:
        """The class of the usable plugin ``name`` of ``kind`` (see :func:`load_plugin`)."""
        return load_plugin(kind, name, self.found)


def _effects(plugins: Plugins, room_s: float | None, mix: float, *, sample_rate: int, block: int) -> list[Effect]:
    """The effects the options ask for (--room: the ``room`` effect plugin), prepared."""
    if room_s is None:
        return []
    room = plugins.get("effects", "room")(rt60_s=room_s, wet_mix=mix)
    room.prepare(sample_rate, block, 1)
    return [room]


def render_file(preset: Preset, midi: str | Path, out: str | Path, *, voicing: str | Path | None, sample_rate: int,
                block: int, gain_db: float, tail_s: float, subtype: str | None, model: str = "physical",
                state: str = "B", room_s: float | None = None, room_mix: float = 0.25,
                plugins: Plugins | None = None) -> RenderResult:
    """Render a MIDI file through one voicing state (A: the preset, B: with the plan) to a
    file, with a generated room if ``room_s`` (its RT60) is given; the source, the sink,
    the model and the room come from ``plugins`` (default: discovered now)."""
    plugins = plugins if plugins is not None else Plugins()
    source = plugins.get("sources", "midi-file")(midi)
    with plugins.get("sinks", "file")(out, subtype=subtype) as sink:  # checks the output before the tables are built
        sink.open(sample_rate=sample_rate, channels=CHANNELS, block=block)
        states = prepare_states(preset, voicing if state == "B" else None, sample_rate=sample_rate, block=block,
                                model=model, both=False, progress=_tty(), plugins=plugins.found)
        renderer = Renderer(states, gain_db=gain_db,
                            effects=_effects(plugins, room_s, room_mix, sample_rate=sample_rate, block=block))
        result = render_events(renderer, source.events(), sink, tail_s=tail_s, channels=CHANNELS, progress=_tty())
    return result


def _stats_json(result: RenderResult, *, sample_rate: int, block: int, state: str) -> dict[str, object]:
    st = result.stats
    return {
        "sample_rate": sample_rate,
        "block": block,
        "frames": result.frames,
        "duration_s": result.frames / sample_rate,
        "state": state,
        "peak_partials": st.peak_partials,
        "mean_partials": st.mean_partials,
        "peak_dbfs": st.peak_dbfs if math.isfinite(st.peak_dbfs) else None,  # null: silence
        "nonfinite": st.nonfinite,
        "late_blocks": 0,  # offline: nothing can be late
        "render_s": result.render_s,
    }


def _summary(path: str | Path, result: RenderResult, sample_rate: int) -> str:
    st, seconds = result.stats, result.frames / sample_rate
    speed = seconds / result.render_s if result.render_s > 0 else float("inf")
    return (f"wrote {path}: {seconds:.1f} s, peak {st.peak_dbfs:.1f} dBFS, {st.mean_partials:.0f} partials on "
            f"average (peak {st.peak_partials}), rendered in {result.render_s:.2f} s ({speed:.0f}x real time)"
            + (f", {st.nonfinite} non-finite samples zeroed" if st.nonfinite else ""))


def cmd_render(args: argparse.Namespace) -> int:
    preset = load_preset(find_preset(args.preset))
    state = "B" if args.voicing else "A"
    result = render_file(preset, args.midi, args.output, voicing=args.voicing, sample_rate=args.sample_rate,
                         block=args.block, gain_db=args.gain_db, tail_s=args.tail, subtype=args.subtype,
                         model=args.model, state=state, room_s=args.room, room_mix=args.room_mix)
    print(_summary(args.output, result, args.sample_rate))
    if args.stats_json:
        data = _stats_json(result, sample_rate=args.sample_rate, block=args.block, state=state)
        atomic_write_bytes(args.stats_json, (json.dumps(data, indent=1) + "\n").encode(), backup=False)
    return 0


def _feed_file(source: Any, live: LiveInput, stop: threading.Event) -> None:
    """Send a MIDI file source's events in real time (a thread)."""
    start = time.perf_counter()
    for t, message in source.events():
        while not stop.is_set() and time.perf_counter() - start < t:
            stop.wait(min(0.005, max(t - (time.perf_counter() - start), 0.0)))
        if stop.is_set():
            return
        live.push(message)


def cmd_play(args: argparse.Namespace) -> int:
    # One BLAS thread in the audio process: with two, a block stalled for up to 8 ms
    # while the other core was busy (measured on the target machine).
    with threadpool_limits(limits=1):
        return _play(args)


def _knob_map(args: argparse.Namespace) -> KnobMap | None:
    """The knobs' mapping, checked against the other options before any table is built."""
    if args.no_knobs:
        given = [name for name, value in (("--knobs", args.knobs), ("--knob-keys", args.knob_keys),
                                          ("--save-plan", args.save_plan)) if value is not None]
        if given:
            raise VoicerError(f"--no-knobs turns the knobs off; {' and '.join(given)} would do nothing")
        return None
    mapping = load_knobs(args.knobs)
    if args.model not in LIVE_MODELS:
        raise VoicerError(f"live knobs rebuild tables with the {' or '.join(LIVE_MODELS)} model, not "
                          f"'{args.model}'; add --no-knobs to play it")
    used = mapping.controllers()
    if args.ab_cc is not None and args.ab_cc in used:
        raise VoicerError(f"--ab-cc {args.ab_cc} is also {used[args.ab_cc]} in {mapping.source}; choose another")
    if args.save_plan is not None and not Path(args.save_plan).resolve().parent.is_dir():
        raise VoicerError(f"--save-plan {args.save_plan}: no such folder {Path(args.save_plan).resolve().parent}")
    return mapping


def _play(args: argparse.Namespace) -> int:
    preset = load_preset(find_preset(args.preset))
    mapping = _knob_map(args)
    key_range = parse_key_spec(args.knob_keys) if mapping is not None and args.knob_keys else None
    plugins = Plugins()
    states = prepare_states(preset, args.voicing, sample_rate=args.sample_rate, block=args.block, model=args.model,
                            progress=_tty(), plugins=plugins.found)
    renderer = Renderer(states, gain_db=args.gain_db, ab_cc=args.ab_cc,
                        effects=_effects(plugins, args.room, args.room_mix, sample_rate=args.sample_rate,
                                         block=args.block))
    knobs: LiveKnobs | None = None
    if mapping is not None:
        knobs = LiveKnobs(mapping, renderer, root=preset, base_plan=load_voicing(args.voicing) if args.voicing else None,
                          key_range=key_range, model=args.model, settings=table_settings(args.sample_rate),
                          save_path=args.save_plan)
    live = LiveInput(args.sample_rate, tap=knobs.tap if knobs is not None else None)
    stop = threading.Event()
    source: MidiPortSource | None = None
    keyboard: KeyboardPlayer | None = None
    feeder: threading.Thread | None = None
    if args.midi_file:
        song = plugins.get("sources", "midi-file")(args.midi_file)  # fails early on a bad file
        feeder = threading.Thread(target=_feed_file, args=(song, live, stop), daemon=True)
    elif args.midi_in is not None or args.midi_virtual or not sys.stdin.isatty():
        source = plugins.get("sources", "midi-port")(args.midi_in, virtual=args.midi_virtual)
    sink = plugins.get("sinks", "portaudio")(args.device, latency=args.latency)
    sink.open(sample_rate=args.sample_rate, channels=CHANNELS, block=args.block,
              callback=lambda out: renderer.process(out, live.drain(out.shape[1])))
    started = False
    try:
        if knobs is not None:
            knobs.start()
        if source is not None:
            source.open(live.push)
            print(f"MIDI input: {source.port_name}", file=sys.stderr)
        elif feeder is not None:
            feeder.start()
        else:
            keyboard = KeyboardPlayer(live.push, knobs=mapping)
            print(HELP, file=sys.stderr)
            if mapping is not None:
                print(KNOB_HELP, file=sys.stderr)
        ab = " / ".join(s.name for s in states)
        print(f"playing {preset.instrument['name'] or args.preset}, states {ab}; Ctrl-C to stop", file=sys.stderr)
        if knobs is not None:
            print(_knobs_line(mapping, knobs), file=sys.stderr)
        started = True
        _run_live(renderer, sink, live, keyboard, stop, seconds=args.seconds, knobs=knobs)
    except KeyboardInterrupt:
        pass
    finally:
        stop.set()
        renderer.stop()
        time.sleep(0.1)  # let the fade reach the speakers
        sink.close()
        if source is not None:
            source.close()
        if started:
            print(file=sys.stderr)  # end the status line
    problems = [f"{n} {what}" for n, what in ((sink.late_blocks, "late blocks"), (sink.faults, "callback faults"),
                                              (renderer.stats.nonfinite, "non-finite samples")) if n]
    print(f"stopped: {renderer.stats.frames / args.sample_rate:.1f} s played"
          + (f"; {', '.join(problems)}" if problems else ""), file=sys.stderr)
    if knobs is not None:
        for line in knobs.close():
            print(line, file=sys.stderr)
    return 0


def _knobs_line(mapping: KnobMap, knobs: LiveKnobs) -> str:
    """Which controller does what, once at the start."""
    parts = [f"{k.name} CC {k.cc}" for k in mapping.knobs]
    parts += [f"{what} CC {cc}" for what, cc in (("save", mapping.save_cc), ("target", mapping.target_cc))
              if cc is not None]
    state = knobs.knobs
    target = f"keys {keys_text(state.key_range)}" if state.on_range else "the keys last played"
    return f"knobs on state {knobs.state_name}, {target}: {', '.join(parts) or 'none mapped'}"


def _status(renderer: Renderer, sink: PortAudioSink) -> str:
    voices, partials = renderer.meter.take()  # peaks since the last status line
    return (f"\rstate {renderer.state_name}  voices {voices:3d}  partials {partials:6d}"
            f"  load {100 * sink.load:5.1f} %  late {sink.late_blocks}   ")


def _run_live(renderer: Renderer, sink: PortAudioSink, live: LiveInput, keyboard: KeyboardPlayer | None,
              stop: threading.Event, *, seconds: float | None, knobs: LiveKnobs | None = None) -> None:
    deadline = None if seconds is None else time.perf_counter() + seconds
    width = 0  # the longest status line so far: a shorter one is padded to overwrite it
    with contextlib.ExitStack() as stack:
        if keyboard is not None:
            read_char = stack.enter_context(raw_terminal())
            threading.Thread(target=keyboard.run, args=(read_char,), daemon=True).start()
        while not stop.is_set():
            if keyboard is not None and keyboard.quit.is_set():
                break
            if deadline is not None and time.perf_counter() >= deadline:
                break
            line = _status(renderer, sink) + (knobs.status() if knobs is not None else "")
            width = max(width, len(line))
            sys.stderr.write(line.ljust(width))
            sys.stderr.flush()
            stop.wait(0.25)


def cmd_demo(args: argparse.Namespace) -> int:
    from .report.compare import compare, format_outliers, write_report
    from .report.suggest import suggest, write_plan
    from .tone.voicing import apply_voicing

    preset_path = find_preset(DEMO_PIANO)
    wear = presets_dir() / "voicings" / DEMO_WEAR
    found = apply_voicing(load_preset(preset_path), load_voicing(wear))
    midi = presets_dir() / "midi" / DEMO_MIDI
    out_dir = Path(args.out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    print(f"voicer demo: {found.instrument['name']} ({preset_path.name}) as found ({wear.name}), passage {midi.name}")
    suggestion = suggest(found)
    voicing = out_dir / "suggested-plan.toml"
    voiced = apply_voicing(found, write_plan(suggestion, voicing))
    result = compare(found, voiced, plan_name="the suggested plan")
    print(format_outliers(result))
    report = write_report(result, out_dir / "report.html")
    print(f"  suggested plan: {voicing}; report for the client: {report}")
    print("  state A: the piano as found; state B: with the suggested plan (a preview, not a promise)")
    plugins = Plugins()
    files = []
    for state in ("A", "B"):
        path = out_dir / f"demo-{state}.wav"
        rendered = render_file(found, midi, path, voicing=voicing, sample_rate=args.sample_rate, block=256,
                               gain_db=args.gain_db, tail_s=3.0, subtype=None, state=state, plugins=plugins)
        print("  " + _summary(path, rendered, args.sample_rate))
        files.append(path)
    print(f"files: {', '.join(str(p.resolve()) for p in files)}")
    if not args.no_play:
        _play_files(files, plugins)
    return 0


def _play_files(files: list[Path], plugins: Plugins) -> None:
    """Play rendered files through the default device, if there is one, saying what was
    played (or skipped with Ctrl-C) and any late or silenced blocks."""
    import soundfile as sf

    for path in files:
        data, rate = sf.read(path, dtype="float32", always_2d=True)
        pos = [0]

        def fill(out, data=data, pos=pos):
            n = out.shape[1]
            chunk = data[pos[0]:pos[0] + n].T
            out[:, : chunk.shape[1]] = chunk
            out[:, chunk.shape[1]:] = 0.0
            pos[0] += n

        sink = plugins.get("sinks", "portaudio")()
        try:
            sink.open(sample_rate=rate, channels=data.shape[1], block=512, callback=fill)
        except VoicerError as exc:
            print(f"not playing: {exc}")
            return
        print(f"playing {path.name} ({len(data) / rate:.0f} s; Ctrl-C to skip)")
        skipped = False
        try:
            while pos[0] < len(data):
                time.sleep(0.1)
        except KeyboardInterrupt:
            skipped = True
        finally:
            sink.close()
        played = min(pos[0], len(data)) / rate
        problems = [f"{n} {what}" for n, what in ((sink.late_blocks, "late blocks"), (sink.faults, "silenced blocks"))
                    if n]
        print(f"{'skipped' if skipped else 'played'} {path.name} after {played:.1f} s on {sink.device_name}"
              + (f"; {', '.join(problems)}" if problems else ""))


def cmd_devices(args: argparse.Namespace) -> int:
    print("audio outputs:")
    try:
        print(format_devices(list_output_devices()))
    except VoicerError as exc:
        print(f"  none: {exc}")
    print("MIDI inputs:")
    print(format_ports())
    return 0


def cmd_plugins(args: argparse.Namespace) -> int:
    # Not through Plugins: this lists the broken ones itself.
    print(format_plugins(discover()))
    return 0
