"""The sound commands: ``voicer render``, ``voicer play`` and ``voicer devices``.

``render`` runs in-process and its files are read back with soundfile. ``play`` and
``devices`` run as real commands in subprocesses with a test-local HOME whose
``.asoundrc`` chooses the ALSA device (see tests/test_sinks.py): the ``null`` plugin opens
and calls back, unclocked, and never reaches a speaker; a card that does not exist gives
a machine without a usable audio output. Every test shares one table cache, built once
in-process by the ``cache`` fixture; the subprocesses run in two batches (``runs``).
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import mido
import numpy as np
import pytest
import soundfile

from needs import check_portaudio

import voicer
from voicer.cli import main
from voicer.engine.offline import STOP_FADE_S
from voicer.engine.safety import DEFAULT_CEILING_DBFS
from voicer.engine.session import prepare_states
from voicer.resources import presets_dir

RATE = 48_000
DEMO_MIDI = presets_dir() / "midi" / "demo-passage.mid"
MELLOW = presets_dir() / "voicings" / "kestrel-190-mellow.toml"
STATS_FIELDS = {"sample_rate", "block", "frames", "peak_partials", "mean_partials", "peak_dbfs", "nonfinite",
                "late_blocks", "render_s"}

# libsndfile writes PCM_24 as round(x * 0x7FFFFF) and reads it back as n / 0x800000: the scale
# mismatch and the rounding stay below two steps of 2**-23 (as in tests/test_sinks.py).
PCM_24_ATOL = 2.0**-22
# The same for PCM_16 (round(x * 0x7FFF), read as n / 0x8000): half a step of rounding plus
# |x| <= 1 step of scale mismatch, i.e. at most 1.5 steps of 2**-15.
PCM_16_ATOL = 1.5 * 2.0**-15

# The short passage written by the ``midi`` fixture: three notes entering 0.25 s apart,
# all released at LAST_EVENT_S.
SHORT_NOTES = [(0.0, 60, 80), (0.25, 64, 90), (0.5, 67, 100)]
LAST_EVENT_S = 1.0
FLIP_AT_S = 0.5  # the A/B passage adds a program change here (it flips A/B by default)

NULL_DEVICE = "pcm.!default { type null }\n"
NO_DEVICE = "pcm.!default { type hw card 99 }\n"  # a sound card that does not exist
PLAY_SECONDS = 2.0
STATUS = re.compile(r"state (?P<state>[AB])  voices +(?P<voices>\d+)  partials +(?P<partials>\d+)"
                    r"  load +(?P<load>\d+\.\d) %  late (?P<late>\d+)")
STOPPED = re.compile(r"stopped: (?P<played>\d+\.\d) s played(?P<problems>;.*)?$")


# --- fixtures ------------------------------------------------------------------------------

def _write_midi(path: Path, *, flip: bool = False) -> Path:
    """SHORT_NOTES at 120 bpm (480 ticks a beat: 960 ticks a second), optionally a program change."""
    ticks_per_s = 960
    events = [(t, mido.Message("note_on", note=k, velocity=v)) for t, k, v in SHORT_NOTES]
    events += [(LAST_EVENT_S, mido.Message("note_off", note=k, velocity=64)) for _, k, _ in SHORT_NOTES]
    if flip:
        events.append((FLIP_AT_S, mido.Message("program_change", program=1)))
    events.sort(key=lambda e: e[0])
    midi_file = mido.MidiFile(type=0, ticks_per_beat=480)
    track = mido.MidiTrack([mido.MetaMessage("set_tempo", tempo=500_000, time=0)])
    now = 0
    for t, message in events:
        tick = round(t * ticks_per_s)
        track.append(message.copy(time=tick - now))
        now = tick
    midi_file.tracks.append(track)
    midi_file.save(path)
    assert mido.MidiFile(path).length == pytest.approx(LAST_EVENT_S, abs=1e-9)
    return path


@pytest.fixture(scope="module")
def midi(tmp_path_factory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("midi")
    silent = mido.MidiFile(type=0, ticks_per_beat=480)
    silent.tracks.append(mido.MidiTrack([mido.Message("control_change", control=64, value=127, time=0),
                                         mido.Message("control_change", control=64, value=0, time=480)]))
    silent.save(folder / "pedal-only.mid")
    return {"short": _write_midi(folder / "short.mid"), "ab": _write_midi(folder / "ab.mid", flip=True),
            "silent": folder / "pedal-only.mid"}


@pytest.fixture(scope="module")
def cache(tmp_path_factory, demo) -> Path:
    """One table cache for the whole file, holding the demo's tables for states A and B."""
    folder = tmp_path_factory.mktemp("cache")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("VOICER_CACHE_DIR", str(folder))
        prepare_states(demo, MELLOW, sample_rate=RATE, block=256)
    return folder


@pytest.fixture(autouse=True)
def shared_cache(private_cache, cache, monkeypatch):
    """Replaces conftest's per-test cache by this file's (still private to the test run)."""
    monkeypatch.setenv("VOICER_CACHE_DIR", str(cache))


def run(capsys, *argv: str | Path) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def render(capsys, tmp_path: Path, out_name: str, *extra: str | Path, midi_path: Path,
           tail: str | None = "0.5") -> tuple[Path, dict, str]:
    out, stats = tmp_path / out_name, tmp_path / f"{out_name}.json"
    argv = ["render", "demo", midi_path, "-o", out, "--stats-json", stats, *extra]
    if tail is not None:
        argv += ["--tail", tail]
    code, stdout, err = run(capsys, *argv)
    assert code == 0, err
    return out, json.loads(stats.read_text()), stdout


def centroid_hz(data: np.ndarray, rate: int) -> float:
    """Power-weighted mean frequency of the first channel (the mix is mono on both channels)."""
    power = np.abs(np.fft.rfft(data[:, 0])) ** 2
    freqs = np.fft.rfftfreq(len(data), 1.0 / rate)
    return float((freqs * power).sum() / power.sum())


# --- voicer render ---------------------------------------------------------------------------

def test_render_short_passage_to_wav(capsys, tmp_path, midi) -> None:
    out, stats, stdout = render(capsys, tmp_path, "short.wav", midi_path=midi["short"])
    info = soundfile.info(out)
    assert (info.format, info.subtype, info.samplerate, info.channels) == ("WAV", "PCM_24", RATE, 2)
    # Last event, tail and the closing fade (voicer.engine.offline), plus the one sample of the event itself.
    assert info.frames == round((LAST_EVENT_S + 0.5 + STOP_FADE_S) * RATE) + 1
    data, _ = soundfile.read(out, always_2d=True)

    assert STATS_FIELDS <= set(stats), STATS_FIELDS - set(stats)
    assert (stats["sample_rate"], stats["block"], stats["state"]) == (RATE, 256, "A")
    assert stats["frames"] == info.frames
    assert (stats["nonfinite"], stats["late_blocks"]) == (0, 0)
    assert isinstance(stats["peak_partials"], int) and stats["peak_partials"] > 0
    assert 0 < stats["mean_partials"] <= stats["peak_partials"]
    assert stats["render_s"] > 0
    # The stats are taken before the float32/PCM_24 conversion: the file's peak matches within PCM_24_ATOL.
    assert abs(10 ** (stats["peak_dbfs"] / 20) - np.abs(data).max()) <= PCM_24_ATOL
    # 20 log10(10**(-1/20)) is -1 only up to float64 rounding (~1e-15 dB); 1e-9 dB is far above that.
    assert stats["peak_dbfs"] <= DEFAULT_CEILING_DBFS + 1e-9
    # An mf chord at the default gain came out at -14 dBFS when this test was written; -40 dBFS
    # only guards against a render that is silent or lost its gain.
    assert stats["peak_dbfs"] > -40
    np.testing.assert_array_equal(data[:, 0], data[:, 1])  # one piano mix on both channels
    assert stdout.startswith(f"wrote {out}: 1.6 s, peak {stats['peak_dbfs']:.1f} dBFS, ")


def test_render_demo_passage(capsys, tmp_path) -> None:
    out, stats, _ = render(capsys, tmp_path, "demo.wav", midi_path=DEMO_MIDI, tail=None)
    info = soundfile.info(out)
    assert (info.samplerate, info.channels, stats["frames"]) == (RATE, 2, info.frames)
    # The default tail is 3 s; mido's length runs to the passage's last event; the renderer adds
    # STOP_FADE_S of fade and one sample. 0.1 s is a "that is the passage" margin.
    expected_s = mido.MidiFile(DEMO_MIDI).length + 3.0 + STOP_FADE_S
    assert info.frames / RATE == pytest.approx(expected_s, abs=0.1)
    data, _ = soundfile.read(out, always_2d=True)
    assert abs(10 ** (stats["peak_dbfs"] / 20) - np.abs(data).max()) <= PCM_24_ATOL
    assert -40 < stats["peak_dbfs"] <= DEFAULT_CEILING_DBFS + 1e-9  # tolerances as in the short render
    assert (stats["nonfinite"], stats["late_blocks"]) == (0, 0)
    assert stats["render_s"] > 0 and 0 < stats["mean_partials"] <= stats["peak_partials"]


def test_render_loud_gain_stays_under_the_ceiling(capsys, tmp_path, midi) -> None:
    # 30 dB above the default gain drives the chord well past the limiter's knee (6 dB under the ceiling).
    out, stats, _ = render(capsys, tmp_path, "loud.wav", "--gain-db", "-20", midi_path=midi["short"])
    data, _ = soundfile.read(out, always_2d=True)
    ceiling = 10 ** (DEFAULT_CEILING_DBFS / 20)
    assert stats["peak_dbfs"] <= DEFAULT_CEILING_DBFS + 1e-9
    assert stats["peak_dbfs"] > DEFAULT_CEILING_DBFS - 0.1  # pressed against it, not far below
    assert np.abs(data).max() <= ceiling + PCM_24_ATOL


def test_render_voicing_plan_changes_the_sound(capsys, tmp_path, midi) -> None:
    a_path, a_stats, _ = render(capsys, tmp_path, "a.wav", midi_path=midi["short"])
    b_path, b_stats, _ = render(capsys, tmp_path, "b.wav", "--voicing", MELLOW, midi_path=midi["short"])
    assert (a_stats["state"], b_stats["state"]) == ("A", "B")
    a, _ = soundfile.read(a_path, always_2d=True)
    b, _ = soundfile.read(b_path, always_2d=True)
    assert a.shape == b.shape
    assert np.abs(a - b).max() > 100 * PCM_24_ATOL, "the voicing plan is not heard"
    # The plan softens the felt of keys 52-81 (all three notes): softer felt means a longer
    # contact and a darker tone (common practice of voicing), so the spectral centroid falls.
    assert centroid_hz(b, RATE) < centroid_hz(a, RATE)


def test_render_flac_and_pcm16(capsys, tmp_path, midi) -> None:
    exact, _, _ = render(capsys, tmp_path, "float.wav", "--subtype", "FLOAT", midi_path=midi["short"])
    wav, _, _ = render(capsys, tmp_path, "x.wav", midi_path=midi["short"])
    flac, _, _ = render(capsys, tmp_path, "x.flac", midi_path=midi["short"])
    pcm16, _, _ = render(capsys, tmp_path, "x16.wav", "--subtype", "PCM_16", midi_path=midi["short"])
    info = soundfile.info(flac)
    assert (info.format, info.subtype, info.samplerate, info.channels) == ("FLAC", "PCM_24", RATE, 2)
    assert soundfile.info(pcm16).subtype == "PCM_16"
    # IEEE-float WAV holds the rendered float32 samples bit for bit (tests/test_sinks.py).
    reference, _ = soundfile.read(exact, always_2d=True, dtype="float32")
    for path, atol in ((wav, PCM_24_ATOL), (flac, PCM_24_ATOL), (pcm16, PCM_16_ATOL)):
        data, _ = soundfile.read(path, always_2d=True, dtype="float32")
        np.testing.assert_allclose(data, reference, rtol=0, atol=atol, err_msg=str(path.name))


def test_render_stats_of_silence_are_valid_json(capsys, tmp_path, midi) -> None:
    # A passage with only pedal events renders silence: its peak has no finite level in dBFS.
    out, stats_path = tmp_path / "silence.wav", tmp_path / "silence.json"
    code, _, err = run(capsys, "render", "demo", midi["silent"], "-o", out, "--tail", "0.5",
                       "--stats-json", stats_path)
    assert code == 0, err
    assert not np.any(soundfile.read(out)[0]), "a passage without notes must render silence"
    text = stats_path.read_text()

    def not_json(constant: str) -> None:
        raise AssertionError(f"--stats-json wrote {constant}, which is not JSON (RFC 8259 has no NaN or "
                             f"infinities; other JSON readers reject the file): {text}")

    stats = json.loads(text, parse_constant=not_json)
    assert stats["peak_partials"] == 0 and stats["nonfinite"] == 0


@pytest.mark.parametrize("case", ["missing midi", "not midi", "mp3", "missing folder", "unknown top entry",
                                  "unknown field", "missing plan", "unknown model"])
def test_render_bad_input_exits_2_with_one_line(capsys, tmp_path, midi, case) -> None:
    song, out, extra = midi["short"], tmp_path / "out.wav", []
    plan = tmp_path / "plan.toml"
    if case == "missing midi":
        song = tmp_path / "no-such-song.mid"
        expected = f"{song}: no such MIDI file"
    elif case == "not midi":
        song = tmp_path / "notes.mid"
        song.write_text("these are my notes on the recital piano, not a MIDI file\n")
        expected = f"{song}: not a readable Standard MIDI File"
    elif case == "mp3":
        out = tmp_path / "out.mp3"
        expected = f"{out}: cannot write audio with extension '.mp3'; allowed: .wav, .flac"
    elif case == "missing folder":
        out = tmp_path / "no-such-folder" / "out.wav"
        expected = f"{out}: cannot write: {out.parent} does not exist"
    elif case == "unknown top entry":
        plan.write_text('format = 1\nhammer_colour = "red"\n')
        extra = ["--voicing", plan]
        expected = f"{plan}: unknown table or value 'hammer_colour'"
    elif case == "unknown field":
        plan.write_text('format = 1\n[[change]]\nkeys = "52-67"\nfield = "felt_hardness"\nfactor = 0.9\n')
        extra = ["--voicing", plan]
        expected = f"{plan}: change 1: field 'felt_hardness' is not a per-key number"
    elif case == "missing plan":
        plan = tmp_path / "no-such-plan.toml"
        extra = ["--voicing", plan]
        expected = f"{plan}: cannot read the voicing plan"
    else:
        extra = ["--model", "nope"]
        expected = "no models plugin named 'nope' (available: additive, physical"
    code, stdout, err = run(capsys, "render", "demo", song, "-o", out, "--tail", "0.5", *extra)
    assert code == 2 and stdout == ""
    assert err.count("\n") == 1 and err.endswith("\n"), f"expected one line on stderr, got {err!r}"
    assert err.startswith(f"voicer render: error: {expected}"), err
    leftovers = sorted(p.name for p in tmp_path.iterdir() if p.suffix in (".wav", ".mp3", ".tmp"))
    assert leftovers == [], f"a failed render left files behind: {leftovers}"


@pytest.mark.parametrize("tail", ["-5", "-0.8", "nan", "inf"])
def test_render_refuses_a_tail_that_is_not_a_duration(capsys, tmp_path, midi, tail) -> None:
    # A negative tail cuts the passage short (-5 gives an empty file and "peak_dbfs": -Infinity,
    # which is not JSON); NaN and inf cannot be turned into a number of samples.
    out = tmp_path / "out.wav"
    argv = ["render", "demo", str(midi["short"]), "-o", str(out), "--tail", tail]
    try:
        code = main(argv)
    except SystemExit as exc:  # refused by argparse, as --block and --latency are
        code = exc.code
    except Exception as exc:
        pytest.fail(f"`voicer {' '.join(argv)}` crashed with {type(exc).__name__}: {exc} instead of exiting 2")
    _, err = capsys.readouterr()
    written = f"{soundfile.info(out).frames} frames written" if out.exists() else "no file written"
    assert code == 2, (f"`--tail {tail}` was accepted (exit {code}, {written}); "
                       f"a tail must be a finite number of seconds >= 0")
    assert "tail" in err.strip().splitlines()[-1], err


SLOW_S = 1.0  # a slowed step in the timing test: far above the short render (~0.1 s)


def test_render_s_is_the_rendering_alone(capsys, tmp_path, midi, monkeypatch) -> None:
    """render_s in --stats-json is the wall time of rendering alone (issue 4): building the
    tables and writing the file, each slowed here by SLOW_S, are left out."""
    import voicer.cli_audio as cli_audio
    from voicer.io.sinks import FileSink

    real_prepare, real_write = cli_audio.prepare_states, FileSink._write
    writes = []

    def slow_prepare(*args, **kwargs):
        time.sleep(SLOW_S)
        return real_prepare(*args, **kwargs)

    def slow_write(self, block):
        if not writes:
            time.sleep(SLOW_S)  # a slow disk, once
        writes.append(block.shape[1])
        real_write(self, block)

    monkeypatch.setattr(cli_audio, "prepare_states", slow_prepare)
    monkeypatch.setattr(FileSink, "_write", slow_write)
    started = time.perf_counter()
    _, stats, stdout = render(capsys, tmp_path, "timed.wav", midi_path=midi["short"])
    wall = time.perf_counter() - started
    assert sum(writes) == stats["frames"]  # every block went through the slowed write
    assert 0 < stats["render_s"] < SLOW_S, stats["render_s"]  # not the slow write
    assert stats["render_s"] < wall - 2 * SLOW_S, (stats["render_s"], wall)  # nor the building
    assert f"rendered in {stats['render_s']:.2f} s" in stdout


def test_render_takes_its_source_and_sink_from_the_plugin_host(capsys, tmp_path, midi, monkeypatch) -> None:
    """The MIDI file source and the file sink of `voicer render` are the classes the plugin
    host registers (voicer.sources midi-file, voicer.sinks file), not imported ones."""
    import dataclasses

    import voicer.cli_audio as cli_audio
    from voicer.engine.host import discover
    from voicer.io.sinks import FileSink
    from voicer.io.sources import MidiFileSource

    made = []

    class CountedSink(FileSink):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            made.append("sink")

    class CountedSource(MidiFileSource):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            made.append("source")

    swap = {("sinks", "file"): CountedSink, ("sources", "midi-file"): CountedSource}
    monkeypatch.setattr(cli_audio, "discover", lambda: [dataclasses.replace(p, cls=swap.get((p.kind, p.name), p.cls))
                                                      for p in discover()])
    out, stats, _ = render(capsys, tmp_path, "hosted.wav", midi_path=midi["short"])
    assert sorted(made) == ["sink", "source"]
    assert soundfile.info(out).frames == stats["frames"]


def test_a_broken_plugin_is_named_and_skipped(capsys, tmp_path, midi, monkeypatch) -> None:
    """A third-party sink whose module is missing, installed as a real distribution (a
    .dist-info folder on sys.path, found by importlib.metadata): `voicer render` names it
    on standard error with the reason, and renders through the built-in file sink."""
    site = tmp_path / "site"
    dist = site / "voicer_broken_sink-0.1.dist-info"
    dist.mkdir(parents=True)
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: voicer-broken-sink\nVersion: 0.1\n")
    (dist / "entry_points.txt").write_text("[voicer.sinks]\nbroken-sink = voicer_no_such_module:Sink\n")
    monkeypatch.syspath_prepend(str(site))
    out = tmp_path / "despite.wav"
    code, stdout, err = run(capsys, "render", "demo", midi["short"], "-o", out, "--tail", "0.5")
    assert code == 0 and stdout.startswith(f"wrote {out}")
    assert soundfile.info(out).frames > 0
    assert err.splitlines() == ["voicer: skipping the broken sinks plugin 'broken-sink' (voicer_no_such_module:Sink): "
                                "cannot be loaded: ModuleNotFoundError: No module named 'voicer_no_such_module'"]


def test_demo_playback_goes_through_the_registered_live_sink(capsys, tmp_path, monkeypatch, rng) -> None:
    """The demo's playback (voicer.cli_audio._play_files) opens the live sink the plugin
    host registers as ``portaudio`` and hands it the file's samples, block by block; here an
    in-memory real-time sink that calls back from its own thread, as PortAudio does."""
    import dataclasses
    import threading

    import voicer.cli_audio as cli_audio
    from voicer.engine.host import discover

    class MemoryLiveSink:
        name, realtime, device_name, late_blocks, faults = "memory", True, "memory", 0, 0
        blocks: list[np.ndarray] = []

        def open(self, *, sample_rate, channels, block, callback=None):
            self.stop = threading.Event()
            buf = np.zeros((channels, block), dtype=np.float32)

            def run():
                while not self.stop.wait(0.0005):  # paced, so that the copies stay few
                    callback(buf)
                    MemoryLiveSink.blocks.append(buf.copy())

            self.thread = threading.Thread(target=run, daemon=True)
            self.thread.start()

        def write(self, block):
            raise AssertionError("a real-time sink is not written to")

        def close(self):
            self.stop.set()
            self.thread.join()

    monkeypatch.setattr(cli_audio, "discover", lambda: [
        dataclasses.replace(p, cls=MemoryLiveSink) if (p.kind, p.name) == ("sinks", "portaudio") else p
        for p in discover()])
    path = tmp_path / "take.wav"
    music = (0.25 * rng.standard_normal((RATE // 2, 2))).astype(np.float32)
    soundfile.write(path, music, RATE, subtype="FLOAT")
    cli_audio._play_files([path], cli_audio.Plugins())
    out = capsys.readouterr().out.splitlines()
    assert out == ["playing take.wav (0 s; Ctrl-C to skip)", "played take.wav after 0.5 s on memory"]
    played = np.concatenate(MemoryLiveSink.blocks, axis=1).T
    np.testing.assert_array_equal(played[: len(music)], music)  # FLOAT WAV: exact
    assert np.all(played[len(music):] == 0.0)  # silence after the end


def test_ctrl_c_while_building_tables_exits_130_and_keeps_the_old_file(tmp_path) -> None:
    """Ctrl-C (SIGINT) during `voicer render`'s table building: one line, no traceback,
    exit status 130 (128 + SIGINT, the shell's convention), and the output file as it was:
    the file sink writes to a temporary file, deleted on the way out."""
    import signal

    out = tmp_path / "out" / "song.wav"
    out.parent.mkdir()
    out.write_bytes(b"the previous render")
    home = _home(tmp_path / "home", NULL_DEVICE)
    # An empty table cache: the tables take seconds to build.
    proc = _start(home, tmp_path / "empty-cache", "render", "demo", DEMO_MIDI, "-o", out)
    deadline = time.perf_counter() + 30.0
    # The sink opens its temporary file just before the tables are built.
    while not list(out.parent.glob(".song.wav.*.tmp")) and proc.poll() is None and time.perf_counter() < deadline:
        time.sleep(0.02)
    assert proc.poll() is None, proc.communicate()
    time.sleep(0.3)
    proc.send_signal(signal.SIGINT)
    result = Result(proc, timeout=30.0)
    assert not result.timed_out
    assert "Traceback" not in result.stderr, result.stderr
    assert result.returncode == 130, result.stderr
    assert [line for line in result.lines if line] == ["voicer render: interrupted"], result.stderr
    assert out.read_bytes() == b"the previous render"
    assert sorted(p.name for p in out.parent.iterdir()) == ["song.wav"]  # no temporary file left


# --- voicer play and voicer devices, in subprocesses ------------------------------------------

def _home(folder: Path, asoundrc: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / ".asoundrc").write_text(asoundrc)
    return folder


def _start(home: Path, cache_dir: Path, *args: str | Path) -> subprocess.Popen:
    env = dict(os.environ, HOME=str(home), XDG_CONFIG_HOME=str(home / ".config"), VOICER_CACHE_DIR=str(cache_dir),
               PYTHONPATH=os.pathsep.join([str(Path(voicer.__file__).parents[1]), os.environ.get("PYTHONPATH", "")]))
    env.pop("ALSA_CONFIG_PATH", None)  # ALSA's own system configuration, then the test's .asoundrc
    # stdin is not a terminal: `voicer play` never puts a terminal into raw mode here.
    return subprocess.Popen([sys.executable, "-m", "voicer", *map(str, args)], env=env, stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


class Result:
    def __init__(self, proc: subprocess.Popen, timeout: float) -> None:
        self.timed_out = False
        try:
            self.stdout, self.stderr = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.timed_out = True
            proc.kill()  # only this child, which this file started
            self.stdout, self.stderr = proc.communicate()
        self.returncode = proc.returncode

    def check_portaudio(self) -> None:
        """Skip (fail on CI) when PortAudio is missing: voicer then says to install libportaudio2."""
        check_portaudio(self.stdout + self.stderr)

    @property
    def lines(self) -> list[str]:
        """voicer's lines on stderr. libasound prints its own 'ALSA lib ...' diagnostics on the
        same stream (e.g. when the sequencer is absent); those are not voicer's and are left out."""
        return [line for line in re.split(r"[\r\n]", self.stderr) if not line.startswith("ALSA lib ")]

    def statuses(self) -> list[re.Match]:
        return [m for m in map(STATUS.search, self.lines) if m]


@pytest.fixture(scope="module")
def runs(tmp_path_factory, cache, midi) -> dict[str, Result]:
    """Every subprocess of this file, in two batches.

    On the unclocked null device a playing process renders as fast as it can and keeps a core
    busy, so no more than two plays run side by side; the short commands go with the first.
    """
    root = tmp_path_factory.mktemp("homes")
    null, none = _home(root / "null", NULL_DEVICE), _home(root / "none", NO_DEVICE)
    seconds = str(PLAY_SECONDS)
    batches = [
        {"play": (null, "play", "demo", "--midi-file", midi["short"], "--seconds", seconds, "--block", "256"),
         "no_device": (none, "play", "demo", "--seconds", seconds),
         "midi_in": (null, "play", "demo", "--midi-in", "nosuchport", "--seconds", seconds),
         "devices": (null, "devices"),
         # Not in the next batch: that one times the refusal of --seconds nan.
         "midi_virtual": (null, "play", "demo", "--midi-virtual", "--seconds", seconds)},
        {"play_ab": (null, "play", "demo", "--midi-file", midi["ab"], "--seconds", seconds, "--block", "256",
                     "--voicing", MELLOW),
         "play_128": (null, "play", "demo", "--midi-file", midi["short"], "--seconds", seconds, "--block", "128"),
         "seconds_nan": (null, "play", "demo", "--midi-file", midi["short"], "--seconds", "nan")},
    ]
    results = {}
    for batch in batches:
        started = time.perf_counter()
        procs = {name: _start(home, cache, *args) for name, (home, *args) in batch.items()}
        for name, proc in procs.items():
            if name == "seconds_nan":
                # Refusing takes ~1 s on a quiet machine; still playing after 6 s, it was accepted.
                timeout = max(6.0 - (time.perf_counter() - started), 0.1)
            else:
                # Start-up and a 2 s run take ~3 s on a quiet machine; 30 s allows for a loaded CI machine.
                timeout = 30.0
            results[name] = Result(proc, timeout=timeout)
    return results


def _check_play(result: Result, demo, states: str) -> list[re.Match]:
    result.check_portaudio()
    assert result.returncode == 0, result.stderr
    assert f"playing {demo.instrument['name']}, states {states}; Ctrl-C to stop" in result.lines, result.stderr
    statuses = result.statuses()
    # One status line every 0.25 s over PLAY_SECONDS.
    assert len(statuses) >= 4, result.stderr
    assert max(int(m["voices"]) for m in statuses) >= 1, f"no note of the MIDI file was heard: {result.stderr}"
    assert max(int(m["partials"]) for m in statuses) > 0, result.stderr
    # The null device takes blocks as fast as they come: it is never starved (tests/test_sinks.py).
    assert {m["late"] for m in statuses} == {"0"}, result.stderr
    stopped = [m for m in map(STOPPED.match, result.lines) if m]
    assert len(stopped) == 1, result.stderr
    assert stopped[0]["problems"] is None, f"the live run had problems: {stopped[0].group(0)}"
    # Unclocked, the null device plays faster than real time (the load figure shows > 10x headroom);
    # a clocked device would give about PLAY_SECONDS.
    assert float(stopped[0]["played"]) >= PLAY_SECONDS, stopped[0].group(0)
    return statuses


def test_play_midi_file_on_the_null_device(runs, demo) -> None:
    statuses = _check_play(runs["play"], demo, "A")
    assert {m["state"] for m in statuses} == {"A"}


def test_play_with_voicing_flips_between_a_and_b(runs, demo) -> None:
    statuses = _check_play(runs["play_ab"], demo, "A / B")
    states = [m["state"] for m in statuses]
    # The passage's program change at FLIP_AT_S flips to B; the first status comes before any event.
    assert states[0] == "A" and states[-1] == "B", states


def test_play_block_128(runs, demo) -> None:
    _check_play(runs["play_128"], demo, "A")


def test_play_without_an_audio_device(runs) -> None:
    result = runs["no_device"]
    result.check_portaudio()
    assert result.returncode == 2 and result.stdout == ""
    assert len(result.lines) == 2 and result.lines[1] == "", f"expected one line on stderr, got {result.stderr!r}"
    line = result.lines[0]
    assert line.startswith("voicer play: error: default audio output device not found"), line
    assert "`voicer devices`" in line and "`voicer render`" in line, line


@pytest.fixture(scope="module")
def midi_in_line(runs) -> str:
    result = runs["midi_in"]
    result.check_portaudio()
    assert result.returncode == 2 and result.stdout == "", result.stderr
    errors = [line for line in result.lines if line.startswith("voicer play: error: ")]
    assert len(errors) == 1, result.stderr
    return errors[0]


def test_play_unknown_midi_input_message(midi_in_line) -> None:
    if Path("/dev/snd/seq").exists():  # a machine with the ALSA sequencer: the port is looked up
        assert re.search(r"no MIDI input port matches 'nosuchport'|no MIDI input ports found", midi_in_line)
    else:
        assert "MIDI ports are unavailable" in midi_in_line, midi_in_line
    assert "computer keyboard" in midi_in_line and "`voicer render`" in midi_in_line, midi_in_line


def test_play_unknown_midi_input_is_one_line(runs, midi_in_line) -> None:
    assert runs["midi_in"].lines == [midi_in_line, ""], (
        "bad input must give one line on stderr (voicer/cli.py), but `voicer play --midi-in nosuchport` "
        f"printed {runs['midi_in'].stderr!r} (without libasound's own 'ALSA lib' lines: {runs['midi_in'].lines!r}); "
        "the empty line comes from the unconditional print(file=sys.stderr) in cmd_play's finally block")


def test_play_virtual_midi_input(runs) -> None:
    """A virtual MIDI input goes through python-rtmidi; without the ALSA sequencer (this
    machine) that is one clear line, exit 2."""
    result = runs["midi_virtual"]
    result.check_portaudio()
    if Path("/dev/snd/seq").exists():
        assert result.returncode == 0, result.stderr
    else:
        assert result.returncode == 2 and len([line for line in result.lines if line]) == 1, result.stderr
        assert "MIDI ports are unavailable" in result.stderr


def test_play_refuses_seconds_nan(runs) -> None:
    result = runs["seconds_nan"]
    result.check_portaudio()
    assert not result.timed_out, ("`voicer play --seconds nan` was accepted and never stopped "
                                  "(perf_counter() >= nan is always false); it must exit 2")
    assert result.returncode == 2, result.stderr
    errors = [line for line in result.lines if line.startswith("voicer play: error: ")]
    assert len(errors) == 1 and "seconds" in errors[0], result.stderr


def test_devices_lists_outputs_and_midi_inputs(runs) -> None:
    result = runs["devices"]
    result.check_portaudio()
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert lines[:2] == ["audio outputs:", "audio output devices (* = default):"], result.stdout
    assert re.match(r"\*   0  default  ALSA +\d+ ch +\d+ Hz$", lines[2]), lines[2]
    assert "MIDI inputs:" in lines
    midi_section = lines[lines.index("MIDI inputs:") + 1:]
    assert len(midi_section) >= 1, result.stdout
    assert midi_section[0] == "MIDI input ports:" or midi_section[0].startswith("no MIDI input ports ("), midi_section
