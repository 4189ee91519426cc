"""Audio input: the capture ring, the input callback, file replay, and PortAudio input devices.

File replay is checked sample for sample against soundfile's own reading of the file. The
PortAudio tests open real input streams through sounddevice on machines without a sound
card, in subprocesses with their own HOME and ``.asoundrc`` (as tests/test_sinks.py does:
PortAudio reads the ALSA configuration when sounddevice is imported). ALSA's ``null``
plugin accepts the stream and calls back, unclocked; its capture samples are not audio
(uninitialised memory), so only the stream's shape and counters are checked.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
import soundfile

from needs import check_portaudio

import voicer
from voicer.errors import ParameterError, RecordingError
from voicer.io.capture import CaptureBuffer, FileInput, InputGuard, format_input_devices

RATE = 48_000


class _Status:
    def __init__(self, overflow: bool = False) -> None:
        self.input_overflow = overflow


def _drain(source: FileInput, buffer: CaptureBuffer, timeout_s: float = 10.0) -> np.ndarray:
    """Everything the source delivers, read as a session reads it (polling)."""
    parts, deadline = [], time.perf_counter() + timeout_s
    while time.perf_counter() < deadline:
        frames, lost = buffer.read()
        assert lost == 0, f"{lost} frames lost"
        parts.append(frames)
        if source.finished and buffer.written == buffer.read_position:
            return np.concatenate(parts, axis=1)
        time.sleep(0.001)
    raise AssertionError("the file input did not finish")


# --- CaptureBuffer --------------------------------------------------------------------------------

def test_ring_returns_every_frame_in_order_across_wraps(rng) -> None:
    ring = CaptureBuffer(2, 1000)
    signal = rng.standard_normal((2, 20_000)).astype(np.float32)
    got, at = [], 0
    while at < signal.shape[1]:
        n = int(rng.integers(1, 300))  # blocks of any size, read at random but in time
        ring.write(signal[:, at:at + n])
        at += n
        if rng.random() < 0.5 or ring.free_frames < 300:
            frames, lost = ring.read()
            assert lost == 0
            got.append(frames)
    frames, lost = ring.read()
    got.append(frames)
    np.testing.assert_array_equal(np.concatenate(got, axis=1), signal)  # copies only: exact
    assert ring.overruns == 0 and ring.written == ring.read_position == signal.shape[1]


def test_ring_reports_frames_lost_when_the_reader_falls_behind(rng) -> None:
    ring = CaptureBuffer(1, 1000)
    signal = rng.standard_normal((1, 5000)).astype(np.float32)
    for at in range(0, 5000, 100):
        ring.write(signal[:, at:at + 100])
    frames, lost = ring.read()
    # The newest capacity minus one block (the largest written) can be trusted; all else is lost.
    assert (lost, frames.shape[1]) == (5000 - 900, 900)
    np.testing.assert_array_equal(frames, signal[:, -900:])
    assert ring.overruns > 0
    assert lost + frames.shape[1] == ring.read_position


def test_ring_free_frames_leave_room_for_a_block() -> None:
    ring = CaptureBuffer(1, 1000)
    assert ring.free_frames == 1000
    ring.write(np.zeros((1, 300), dtype=np.float32))
    assert ring.free_frames == 1000 - 300 - 300
    ring.read()
    assert ring.free_frames == 700


def test_ring_write_allocates_no_arrays(rng) -> None:
    ring = CaptureBuffer(2, 4096)
    block = rng.standard_normal((256, 2)).astype(np.float32)  # as PortAudio hands it: (frames, channels)
    ring.write(block.T)  # warm-up
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        before, _ = tracemalloc.get_traced_memory()
        for _ in range(100):
            ring.write(block.T)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # A block is 2 KiB; views and integers take a few hundred bytes (as in tests/test_renderer.py).
    assert peak - before < 1024


@pytest.mark.parametrize("channels, capacity", [(0, 10), (1, 0), (1.5, 10), (True, 10)])
def test_ring_refuses_bad_sizes(channels, capacity) -> None:
    with pytest.raises(ParameterError, match="must be a positive integer"):
        CaptureBuffer(channels, capacity)


# --- InputGuard -----------------------------------------------------------------------------------

def test_guard_stores_the_transposed_block_and_counts_overflows(rng) -> None:
    ring = CaptureBuffer(2, 1000)
    guard = InputGuard(ring)
    indata = rng.standard_normal((64, 2)).astype(np.float32)
    guard(indata, 64, None, _Status())
    guard(indata, 64, None, _Status(overflow=True))
    frames, _ = ring.read()
    np.testing.assert_array_equal(frames, np.concatenate([indata.T, indata.T], axis=1))
    assert (guard.callbacks, guard.overflows, guard.faults) == (2, 1, 0)


def test_guard_never_raises() -> None:
    guard = InputGuard(CaptureBuffer(2, 1000))
    guard(np.zeros((64, 3), dtype=np.float32), 64, None, _Status())  # 3 channels into a 2-channel ring
    assert guard.faults == 1 and isinstance(guard.last_error, ValueError)


# --- FileInput ------------------------------------------------------------------------------------

@pytest.fixture
def stereo(tmp_path, rng) -> tuple[Path, np.ndarray]:
    data = (0.5 * rng.standard_normal((30_001, 2))).clip(-1, 1).astype(np.float32)
    path = tmp_path / "take.wav"
    soundfile.write(path, data, RATE, subtype="FLOAT")
    return path, data


def test_fast_replay_delivers_the_file_exactly_through_a_small_ring(stereo) -> None:
    path, data = stereo
    source = FileInput(path, block=512, realtime=False)
    assert (source.sample_rate, source.channels, source.frames) == (RATE, 2, len(data))
    ring = CaptureBuffer(2, 2048)  # much smaller than the file: the feeder waits for room
    source.open(ring)
    try:
        got = _drain(source, ring)
    finally:
        source.close()
    reference, _ = soundfile.read(path, dtype="float32", always_2d=True)
    np.testing.assert_array_equal(got, reference.T)  # FLOAT WAV: the same float32 samples
    assert source.guard.callbacks == -(-len(data) // 512) and source.guard.faults == 0
    assert source.error is None


def test_realtime_replay_takes_the_file_s_duration(tmp_path) -> None:
    path = tmp_path / "short.flac"
    soundfile.write(path, np.zeros(int(0.3 * RATE), dtype=np.float32), RATE)
    source = FileInput(path, block=1024, realtime=True)
    ring = CaptureBuffer(1, RATE)
    started = time.perf_counter()
    source.open(ring)
    try:
        got = _drain(source, ring)
    finally:
        source.close()
    elapsed = time.perf_counter() - started
    assert got.shape == (1, int(0.3 * RATE))
    # Each block is delivered once its last frame "has been recorded": not before 0.3 s. The upper
    # bound only says it is paced, not stalled, on a loaded 2-core machine.
    assert 0.3 <= elapsed < 2.0, elapsed


def test_close_stops_a_realtime_replay_at_once(stereo) -> None:
    path, _ = stereo
    source = FileInput(path, realtime=True)
    source.open(CaptureBuffer(2, RATE))
    started = time.perf_counter()
    source.close()
    source.close()  # safe twice
    assert time.perf_counter() - started < 0.2
    assert source.finished


def test_file_input_errors_name_the_file(tmp_path) -> None:
    missing = tmp_path / "no-such-take.flac"
    with pytest.raises(RecordingError, match=f"^{missing}: no such audio file$"):
        FileInput(missing)
    text = tmp_path / "notes.wav"
    text.write_text("the upright in the school hall, tuned last spring\n")
    with pytest.raises(RecordingError, match=f"^{text}: cannot read it as audio"):
        FileInput(text)
    with pytest.raises(RecordingError, match="is not a file"):
        FileInput(tmp_path)


def test_file_input_refuses_a_buffer_of_other_channels(stereo) -> None:
    path, _ = stereo
    with pytest.raises(ParameterError, match="the buffer has 1 channels, the file 2"):
        FileInput(path).open(CaptureBuffer(1, RATE))
    with pytest.raises(ParameterError, match="must hold two blocks"):
        FileInput(path, block=1024).open(CaptureBuffer(2, 1500))


def test_device_table_text() -> None:
    devices = [{"index": 3, "name": "USB measurement mic", "hostapi": "ALSA", "channels": 1,
                "default_samplerate_hz": 48000.0, "default": True}]
    assert format_input_devices(devices).splitlines() == [
        "audio input devices (* = default):", "*   3  USB measurement mic  ALSA      1 ch    48000 Hz"]
    assert "--input-file" in format_input_devices([])


# --- PortAudio input devices, in subprocesses ---------------------------------------------------

_CHILD = r"""
import json, sys, time
from voicer.errors import VoicerError
from voicer.io.capture import CaptureBuffer, PortAudioInput, list_input_devices, resolve_input_device

results = []
for action, arg in json.loads(sys.argv[1]):
    try:
        if action == "devices":
            results.append({"devices": list_input_devices()})
        elif action == "resolve":
            results.append({"index": resolve_input_device(arg)})
        else:
            source = PortAudioInput(arg, sample_rate=48000, channels=1, block=256)
            ring = CaptureBuffer(1, 48000)
            source.open(ring)
            deadline = time.perf_counter() + 5.0
            while ring.written < 48000 and time.perf_counter() < deadline:
                time.sleep(0.01)
            source.close()
            source.close()
            guard = source.guard
            results.append({"device_name": source.device_name, "written": ring.written,
                            "callbacks": guard.callbacks, "faults": guard.faults})
    except VoicerError as exc:
        results.append({"error": str(exc)})
print(json.dumps(results))
"""

NULL_DEVICE = "pcm.!default { type null }\n"
NO_DEVICE = "pcm.!default { type hw card 99 }\n"  # a sound card that does not exist


def _child_env(home: Path, asoundrc: str) -> dict[str, str]:
    home.mkdir(parents=True, exist_ok=True)
    (home / ".asoundrc").write_text(asoundrc)
    env = dict(os.environ, HOME=str(home), XDG_CONFIG_HOME=str(home / ".config"),
               PYTHONPATH=os.pathsep.join([str(Path(voicer.__file__).parents[1]), os.environ.get("PYTHONPATH", "")]))
    env.pop("ALSA_CONFIG_PATH", None)  # ALSA's own system configuration, then the test's .asoundrc
    return env


def _run(home: Path, asoundrc: str, *actions: list) -> list[dict]:
    proc = subprocess.run([sys.executable, "-c", _CHILD, json.dumps(actions)], env=_child_env(home, asoundrc),
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    results = json.loads(proc.stdout)
    for result in results:
        check_portaudio(result.get("error", ""))
    return results


def test_real_input_stream_on_the_null_device(tmp_path) -> None:
    devices, stream, missing = _run(tmp_path / "home", NULL_DEVICE, ["devices", None], ["record", None],
                                    ["resolve", "nosuchdevice"])
    assert [d["name"] for d in devices["devices"]] == ["default"] and devices["devices"][0]["default"]
    assert "error" not in stream, stream["error"]
    assert stream["device_name"] == "default"
    # One second of input arrived through the guard, 256 frames a call (the null plugin is unclocked).
    assert stream["written"] >= 48000 and stream["callbacks"] >= 48000 // 256
    assert stream["faults"] == 0
    assert missing["error"].startswith("audio input device 'nosuchdevice' not found: No input device matching "
                                       "'nosuchdevice' (available: [0] default)"), missing["error"]


def test_no_input_device_at_all(tmp_path) -> None:
    devices, default = _run(tmp_path / "home", NO_DEVICE, ["devices", None], ["record", None])
    assert devices["devices"] == []
    assert default["error"] == ("default audio input device not found: PortAudio sees no input device; choose one "
                                "with --device (index or part of its name), or replay a recording with --input-file")
