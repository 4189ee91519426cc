"""Guided recording (``voicer record``): plan, strike detection, checks, takes, index, resume.

Every session here reads a synthetic recording through :class:`voicer.io.capture.FileInput`,
i.e. through the same callback and ring a microphone's blocks take. The recording is made
here with plain numpy, independently of voicer: decaying tones (four harmonics, 2 ms attack)
at the equal-tempered frequencies of the planned keys, f = 440 * 2 ** ((m - 69) / 12) (ISO 16
for A4), in Gaussian background noise, after a stretch of digital silence. The onset of
every strike is known by construction; so is which strike is clipped or too soft.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import threading
import tracemalloc
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
import soundfile

from needs import check_portaudio

import voicer
from voicer import cli_record
from voicer.analysis import guided
from voicer.analysis.guided import (
    INDEX_NAME,
    PRE_ROLL_S,
    GuidedSession,
    Prompt,
    Step,
    StrikeDetector,
    TakeIndex,
    capture_seconds,
    parse_dynamics,
    parse_keys,
    plan_steps,
)
from voicer.cli import main
from voicer.errors import ParameterError, VoicerError
from voicer.io.capture import FileInput

RATE = 44_100
NOISE_DB = -85.0  # RMS of the background noise, dB re full scale
SILENCE_S = 0.3  # digital silence at the start, then noise
FIRST_S, SPACING_S = 0.5, 1.0  # strike times: FIRST_S + i * SPACING_S (+ up to 10 ms)
DECAY_S = 0.08  # amplitude time constant: a strike is 110 dB down by the next one
SECONDS = 0.6  # capture length used here (the defaults, 3-6 s, would make the tests slow)
HOP = round(0.005 * RATE)  # the detector's hop
# libsndfile writes PCM_24 as round(x * 0x7FFFFF) and reads it back as n / 0x800000: the scale
# mismatch and the rounding stay below two steps of 2**-23 (as in tests/test_sinks.py).
PCM_24_ATOL = 2.0**-22

KEYS, DYNAMICS = [60, 64, 67], ["mf", "ff"]
MF, FF = 0.3, 0.8  # peak amplitudes of the two dynamics
SOFT = 10 ** (-57 / 20)  # far too soft: under the -50 dBFS limit, yet a clear rise over the noise
# The strikes of the recording: (key, peak, asked for step). The clipped ff and the soft mf
# are each played again.
STRIKES = [(60, MF, 1), (60, 3.0, 2), (60, FF, 2), (64, SOFT, 3), (64, MF, 3), (64, FF, 4), (67, MF, 5),
           (67, FF, 6)]
EXPECTED_FILES = ["060-C4-ff-1.flac", "060-C4-mf-1.flac", "064-E4-ff-1.flac", "064-E4-mf-1.flac",
                  "067-G4-ff-1.flac", "067-G4-mf-1.flac"]


def et_hz(key: int) -> float:
    """Equal temperament from A4 = 440 Hz (ISO 16)."""
    return 440.0 * 2.0 ** ((key - 69) / 12)


def synth(strikes, rng, *, tail_s: float = 0.5, decay_s: float = DECAY_S, spacing_s: float = SPACING_S,
          times_s: list[float] | None = None, channels: int = 1) -> tuple[np.ndarray, list[int]]:
    """A recording of ``strikes`` [(key, peak), ...]: float32 (frames, channels), onset frames.

    Strikes come every ``spacing_s`` from FIRST_S on (or at ``times_s``), each up to 10 ms late.
    """
    times_s = times_s or [FIRST_S + i * spacing_s for i in range(len(strikes))]
    x = rng.normal(0.0, 10 ** (NOISE_DB / 20), (round((times_s[-1] + SECONDS + tail_s) * RATE), channels))
    x[:round(SILENCE_S * RATE)] = 0.0
    onsets = []
    for (key, peak), time_s in zip(strikes, times_s):
        onset = round((time_s + rng.uniform(0, 0.01)) * RATE)
        t = np.arange(min(len(x) - onset, round(20 * decay_s * RATE))) / RATE  # then 170 dB down
        tone = sum(np.sin(2 * np.pi * n * et_hz(key) * t + n) / n for n in range(1, 5))
        tone *= np.exp(-t / decay_s) * np.minimum(t / 0.002, 1.0)
        x[onset:onset + len(t)] += (peak / np.abs(tone).max() * tone)[:, None]
        onsets.append(onset)
    return np.clip(x, -1.0, 1.0).astype(np.float32), onsets  # a clipped strike sits at full scale


def write(path: Path, x: np.ndarray) -> Path:
    soundfile.write(path, x, RATE, subtype="FLOAT")  # float WAV: the input replays bit for bit
    return path


@pytest.fixture(scope="module")
def recording(tmp_path_factory) -> tuple[Path, np.ndarray, list[int]]:
    """The session of STRIKES (read only: sessions write into their own folders)."""
    x, onsets = synth([(key, peak) for key, peak, _ in STRIKES], np.random.default_rng(20261202))
    return write(tmp_path_factory.mktemp("input") / "session.wav", x), x, onsets


class Log:
    """Collects prompts and messages; optionally interrupts at a step."""

    def __init__(self, raise_at: int | None = None, stop=None) -> None:
        self.prompts: list[Prompt] = []
        self.messages: list[str] = []
        self.raise_at, self.stop = raise_at, stop

    def prompt(self, p: Prompt) -> None:
        self.prompts.append(p)
        if p.index == self.raise_at:
            if self.stop is not None:
                self.stop.set()
            else:
                raise RuntimeError(f"interrupted at step {p.index}")


def session(folder: Path, log: Log, **options) -> GuidedSession:
    return GuidedSession(folder, plan_steps(KEYS, DYNAMICS), seconds=SECONDS, on_prompt=log.prompt,
                         on_message=log.messages.append, stop=log.stop, **options)


def dominant_hz(x: np.ndarray) -> float:
    """Frequency of the strongest spectral peak (Hann window, zero-padded 8x)."""
    n = 8 * len(x)
    spectrum = np.abs(np.fft.rfft(x * np.hanning(len(x)), n))
    return float(np.argmax(spectrum) * RATE / n)


def check_takes(folder: Path, source: np.ndarray, onsets: list[int], expect: dict[str, int]) -> list[dict]:
    """The files of ``expect`` {file: strike number} hold that strike, exactly; returns the index."""
    index = json.loads((folder / INDEX_NAME).read_text())
    assert index["format"] == 1
    by_file = {entry["file"]: entry for entry in index["takes"]}
    assert sorted(by_file) == sorted(expect)
    for name, strike in expect.items():
        entry = by_file[name]
        key, peak, _ = STRIKES[strike]
        data, rate = soundfile.read(folder / name, dtype="float64")
        info = soundfile.info(folder / name)
        assert (info.format, info.subtype, rate, info.channels) == ("FLAC", "PCM_24", RATE, 1)
        assert (entry["key"], entry["dynamic"], entry["sample_rate"]) == (key, name.split("-")[2], RATE)
        assert len(data) == entry["frames"] == round(PRE_ROLL_S * RATE) + round(SECONDS * RATE)
        start = round(entry["input_start_s"] * RATE)
        # The take is the input from PRE_ROLL_S before the strike on, sample for sample.
        np.testing.assert_allclose(data, source[start:start + len(data), 0], rtol=0, atol=PCM_24_ATOL)
        detected = start + round(entry["strike_s"] * RATE)
        # Detection is causal and hop-quantised: the hop holding the onset, or the next one.
        assert -HOP <= detected - onsets[strike] <= HOP, (name, detected - onsets[strike])
        assert entry["strike_s"] == pytest.approx(PRE_ROLL_S, abs=1 / RATE)
        # The strike is the planned key: its fundamental at the ET frequency (0.5 % is a twelfth of
        # a semitone; the zero-padded bin is 0.2 Hz).
        assert dominant_hz(data[round(PRE_ROLL_S * RATE):]) == pytest.approx(et_hz(key), rel=0.005), name
        assert entry["peak_dbfs"] == pytest.approx(20 * np.log10(np.abs(data).max()), abs=1e-3)
        assert entry["peak_dbfs"] == pytest.approx(20 * np.log10(peak), abs=0.01)
        assert entry["clipped_fraction"] == 0.0
        assert entry["background_db"] is not None and entry["background_db"] < NOISE_DB + 10
        assert datetime.fromisoformat(entry["recorded_at"]).tzinfo is not None
        assert not entry["truncated"] and not entry["adopted"]
    return index["takes"]


# --- plan -------------------------------------------------------------------------------------------

def test_keys_from_ranges_and_lists() -> None:
    assert parse_keys("21-108") == list(range(21, 109))
    assert parse_keys("60,64,67") == [60, 64, 67]
    assert parse_keys(" 21-23, 60 ,108-106") == [21, 22, 23, 60, 108, 107, 106]  # order kept, ranges downwards


@pytest.mark.parametrize("text, message", [
    ("20-30", "key 20 is outside 21..108 (A0..C8)"), ("100-109", "key 109 is outside 21..108"),
    ("60,c4", "'c4' is not a key number or a range like 21-108"), ("", "'' is not a key number"),
    ("60,,64", "'' is not a key number"), ("60-64,62", "key 62 is listed twice"), ("60-", "'60-' is not a key")])
def test_keys_refused(text, message) -> None:
    with pytest.raises(ParameterError, match=re.escape(f"keys {text!r}: {message}")):
        parse_keys(text)


def test_dynamics() -> None:
    assert parse_dynamics("mf,ff") == ["mf", "ff"]
    assert parse_dynamics("pp, p,mp,mf,f,ff") == ["pp", "p", "mp", "mf", "f", "ff"]
    with pytest.raises(ParameterError, match="'fff' is not one of pp, p, mp, mf, f, ff"):
        parse_dynamics("mf,fff")
    with pytest.raises(ParameterError, match="mf is listed twice"):
        parse_dynamics("mf,ff,mf")


def test_plan_names_and_capture_lengths() -> None:
    assert plan_steps([60, 61], ["mf", "ff"]) == [Step(60, "mf"), Step(60, "ff"), Step(61, "mf"), Step(61, "ff")]
    assert Step(60, "mf").file_name(1) == "060-C4-mf-1.flac"
    assert Step(61, "ff").file_name(2) == "061-C#4-ff-2.flac"
    assert Step(21, "pp").file_name(1) == "021-A0-pp-1.flac"
    assert str(Prompt(3, 176, Step(60, "ff"), attempt=2)) == "step 3 of 176: play C4 (key 60) ff (attempt 2)"
    lengths = [capture_seconds(k) for k in range(21, 109)]
    assert (lengths[0], lengths[-1]) == (6.0, 3.0)
    assert np.all(np.diff(lengths) < 0)


# --- strike detection ---------------------------------------------------------------------------

def _triggers(x: np.ndarray, block: int, **options) -> list[tuple[int, float]]:
    detector = StrikeDetector(RATE, **options)
    found = []
    for at in range(0, len(x), block):
        found += detector.process(x[at:at + block].T)
    return found


def test_detector_finds_each_strike_within_a_hop_whatever_the_block(rng) -> None:
    x, onsets = synth([(k, a) for k, a in [(60, MF), (72, FF), (48, SOFT), (84, MF)]], rng, channels=2)
    results = [_triggers(x, block) for block in (37, 1024, len(x))]
    assert results[0] == results[1] == results[2]  # block-size invariant (style.md, item 6)
    frames = [frame for frame, _ in results[0]]
    assert len(frames) == len(onsets), frames
    for frame, onset in zip(frames, onsets):
        assert -HOP <= frame - onset <= HOP
    # Before the first strike, the background is climbing (2 s) from digital silence towards the noise.
    assert results[0][0][1] < NOISE_DB
    # Later ones see the noise itself (the previous strike has decayed 110 dB); the background
    # follows the lower part of the 10 ms levels, within 1.5 dB of the noise's RMS.
    for _, background in results[0][1:]:
        assert NOISE_DB - 1.5 < background < NOISE_DB + 0.5, background


@pytest.mark.parametrize("noise_db", [-90.0, -60.0, -20.0])
def test_detector_ignores_steady_noise(rng, noise_db) -> None:
    x = rng.normal(0.0, 10 ** (noise_db / 20), (10 * RATE, 1))
    assert _triggers(x, 1024) == []


def test_detector_fires_once_per_strike_and_again_on_a_second(rng) -> None:
    # A slowly decaying note (4 s time constant, as a bass string's aftersound) must not trigger
    # again while it rings; a second strike 0.3 s later does; one inside the hold-off does not.
    x, _ = synth([(40, FF)], rng, decay_s=4.0, tail_s=4.0)
    assert len(_triggers(x, 1024)) == 1
    for gap_s, expected in ((0.3, 2), (0.05, 1)):
        # 0.05 then 0.8 of full scale: the second strike lifts the level by some 24 dB.
        y, _ = synth([(40, 0.05), (40, FF)], rng, decay_s=4.0, spacing_s=gap_s, tail_s=1.0)
        assert len(_triggers(y, 1024)) == expected, gap_s


# --- sessions -----------------------------------------------------------------------------------------

def test_session_records_every_step_and_asks_again_for_the_clipped_and_the_soft(tmp_path, recording) -> None:
    path, x, onsets = recording
    folder = tmp_path / "takes"
    log = Log()
    result = session(folder, log).run(FileInput(path, realtime=False))
    assert result.complete and not result.stopped and not result.input_ended
    assert (result.total, result.skipped, len(result.saved)) == (6, 0, 6)
    # Strike 2 (the clipped ff) and strike 4 (the soft mf) are the refused ones.
    expect = {"060-C4-mf-1.flac": 0, "060-C4-ff-1.flac": 2, "064-E4-mf-1.flac": 4, "064-E4-ff-1.flac": 5,
              "067-G4-mf-1.flac": 6, "067-G4-ff-1.flac": 7}
    check_takes(folder, x, onsets, expect)
    assert sorted(p.name for p in folder.iterdir()) == sorted([*EXPECTED_FILES, INDEX_NAME])  # no leftovers
    assert [(p.index, p.attempt) for p in log.prompts] == [(1, 1), (2, 1), (2, 2), (3, 1), (3, 2), (4, 1), (5, 1),
                                                           (6, 1)]
    assert str(log.prompts[0]) == "step 1 of 6: play C4 (key 60) mf"
    assert [step for step, _ in result.refused] == [Step(60, "ff"), Step(64, "mf")]
    clipped, soft = (reason for _, reason in result.refused)
    # The clipped fraction named is that of the take (0.1 s before the strike + 0.6 s): here the
    # share of its samples at full scale, counted directly.
    start = onsets[1] - round(PRE_ROLL_S * RATE)
    window = x[start:start + round((PRE_ROLL_S + SECONDS) * RATE), 0]
    percent = float(clipped.split("is clipped: ")[1].split(" %")[0])
    assert percent == pytest.approx(100 * np.mean(np.abs(window) >= 1.0), abs=0.1), clipped
    assert clipped.startswith(f"{path} at ")
    peak_dbfs = 20 * np.log10(np.abs(x[onsets[3] - RATE // 20:onsets[3] + RATE // 2]).max())  # SOFT, plus noise
    assert soft == (f"too soft: peak {peak_dbfs:.1f} dBFS, needs -50 dBFS or more "
                    "(strike harder or raise the input gain)")
    assert f"saved 060-C4-mf-1.flac: peak {20 * np.log10(MF):.1f} dBFS, 0.7 s" in log.messages
    assert [m for m in log.messages if m.startswith("refused")] == [f"refused C4 (key 60) ff: {clipped}",
                                                                    f"refused E4 (key 64) mf: {soft}"]


def test_a_second_strike_inside_the_take_is_asked_again(tmp_path, rng) -> None:
    # Strike 2 comes 0.3 s after strike 1, inside its 0.6 s take; strike 3 is clean.
    x, onsets = synth([(60, MF), (60, MF), (60, MF)], rng, times_s=[0.5, 0.8, 2.0])
    log = Log()
    result = GuidedSession(tmp_path / "t", [Step(60, "mf")], seconds=SECONDS, on_prompt=log.prompt,
                           on_message=log.messages.append).run(FileInput(write(tmp_path / "in.wav", x),
                                                                         realtime=False))
    assert result.complete
    [(step, reason)] = result.refused
    assert reason.startswith("struck again 0.3") and reason.endswith("let the note ring until the next prompt")
    assert [(p.index, p.attempt) for p in log.prompts] == [(1, 1), (1, 2)]
    [entry] = result.saved
    detected = round(entry["input_start_s"] * RATE) + round(entry["strike_s"] * RATE)
    assert -HOP <= detected - onsets[2] <= HOP


def test_resume_after_an_interruption_continues_where_it_stopped(tmp_path, recording, rng) -> None:
    path, x, onsets = recording
    folder = tmp_path / "takes"
    first = Log(raise_at=3)
    with pytest.raises(RuntimeError, match="interrupted at step 3"):
        session(folder, first).run(FileInput(path, realtime=False))
    saved = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in folder.glob("*.flac")}
    assert sorted(saved) == ["060-C4-ff-1.flac", "060-C4-mf-1.flac"]
    assert [e["file"] for e in TakeIndex(folder).takes] == ["060-C4-mf-1.flac", "060-C4-ff-1.flac"]

    # The technician goes on playing: the second input holds the strikes from the soft one on.
    rest_at = onsets[3] - round(0.3 * RATE)
    rest = write(tmp_path / "rest.wav", x[rest_at:])
    second = Log()
    result = session(folder, second).run(FileInput(rest, realtime=False))
    assert result.complete and (result.skipped, len(result.saved)) == (2, 4)
    assert [(p.index, p.attempt) for p in second.prompts] == [(3, 1), (3, 2), (4, 1), (5, 1), (6, 1)]
    assert second.messages[0] == (f"recording 4 of 6 steps into {folder} from {rest} at {RATE} Hz, 1 channel "
                                  "(2 recorded already)")
    for name, (data, mtime) in saved.items():  # not re-recorded, not touched
        assert (folder / name).read_bytes() == data and (folder / name).stat().st_mtime_ns == mtime
    takes = json.loads((folder / INDEX_NAME).read_text())["takes"]
    assert sorted(e["file"] for e in takes) == EXPECTED_FILES
    for entry in takes:  # the second session's positions are in the second file
        if entry["file"] not in saved:
            entry["input_start_s"] += rest_at / RATE
    (folder / INDEX_NAME).write_text(json.dumps({"format": 1, "takes": takes}))
    check_takes(folder, x, onsets, {"060-C4-mf-1.flac": 0, "060-C4-ff-1.flac": 2, "064-E4-mf-1.flac": 4,
                                    "064-E4-ff-1.flac": 5, "067-G4-mf-1.flac": 6, "067-G4-ff-1.flac": 7})

    # A third run has nothing to do and records nothing.
    third = Log()
    result = session(folder, third).run(FileInput(rest, realtime=False))
    assert result.complete and result.skipped == 6 and not result.saved and not third.prompts
    assert third.messages == [f"all 6 steps are recorded in {folder} already"]


def test_stop_event_ends_the_session_and_keeps_what_was_saved(tmp_path, recording) -> None:
    path, _, _ = recording
    folder = tmp_path / "takes"
    log = Log(raise_at=4, stop=threading.Event())  # set while step 4 waits for its strike
    result = session(folder, log).run(FileInput(path, realtime=False))
    assert result.stopped and not result.complete
    assert [e["file"] for e in result.saved] == ["060-C4-mf-1.flac", "060-C4-ff-1.flac", "064-E4-mf-1.flac"]
    assert sorted(p.name for p in folder.iterdir()) == sorted([*(e["file"] for e in result.saved), INDEX_NAME])
    assert [e["file"] for e in TakeIndex(folder).takes] == [e["file"] for e in result.saved]


def test_an_interruption_between_the_take_and_the_index_loses_nothing(tmp_path, recording, monkeypatch) -> None:
    # Ctrl-C right after a take's file is in place and before the index is written (the index
    # write is interrupted too): the next session adopts the file instead of recording it again.
    path, x, onsets = recording
    folder = tmp_path / "takes"

    def interrupted(self) -> None:
        raise KeyboardInterrupt

    with monkeypatch.context() as mp:
        mp.setattr(TakeIndex, "save", interrupted)
        with pytest.raises(KeyboardInterrupt):
            session(folder, Log()).run(FileInput(path, realtime=False))
    assert sorted(p.name for p in folder.iterdir()) == ["060-C4-mf-1.flac"]  # no index, no temporary file
    log = Log(raise_at=2)
    with pytest.raises(RuntimeError):
        session(folder, log).run(FileInput(path, realtime=False))
    assert log.messages[0] == f"adopted 060-C4-mf-1.flac into {INDEX_NAME} (it was saved but not indexed)"
    [entry] = TakeIndex(folder).takes
    assert (entry["file"], entry["key"], entry["dynamic"], entry["adopted"]) == ("060-C4-mf-1.flac", 60, "mf", True)
    assert entry["peak_dbfs"] == pytest.approx(20 * np.log10(MF), abs=0.01)
    assert entry["strike_s"] is None and entry["clipped_fraction"] == 0.0
    assert [p.index for p in log.prompts] == [2]  # step 1 is done


def test_a_deleted_take_is_recorded_again(tmp_path, recording, rng) -> None:
    path, _, _ = recording
    folder = tmp_path / "takes"
    session(folder, Log()).run(FileInput(path, realtime=False))
    kept = {p.name: p.read_bytes() for p in folder.glob("*.flac") if p.name != "064-E4-mf-1.flac"}
    (folder / "064-E4-mf-1.flac").unlink()  # the technician wants E4 mf again
    log = Log()
    x, onsets = synth([(64, MF)], rng)
    result = session(folder, log).run(FileInput(write(tmp_path / "again.wav", x), realtime=False))
    assert result.complete and [e["file"] for e in result.saved] == ["064-E4-mf-1.flac"]
    assert log.messages[0] == f"{INDEX_NAME} lists 064-E4-mf-1.flac but the file is gone: E4 (key 64) mf is recorded again"
    assert [p.index for p in log.prompts] == [3]
    assert {p.name: p.read_bytes() for p in folder.glob("*.flac") if p.name != "064-E4-mf-1.flac"} == kept
    assert sorted(e["file"] for e in TakeIndex(folder).takes) == EXPECTED_FILES
    data, _ = soundfile.read(folder / "064-E4-mf-1.flac")
    start = round(result.saved[0]["input_start_s"] * RATE)
    assert -HOP <= start + round(PRE_ROLL_S * RATE) - onsets[0] <= HOP
    np.testing.assert_allclose(data, x[start:start + len(data), 0], rtol=0, atol=PCM_24_ATOL)


def test_a_file_in_the_way_is_never_written_over(tmp_path, recording) -> None:
    path, _, _ = recording
    folder = tmp_path / "takes"
    folder.mkdir()
    junk = b"not a take: notes on the action regulation\n"
    (folder / "060-C4-mf-1.flac").write_bytes(junk)  # a take's name, but not audio
    log = Log()
    result = session(folder, log).run(FileInput(path, realtime=False))
    assert result.complete and result.saved[0]["file"] == "060-C4-mf-2.flac"
    assert (folder / "060-C4-mf-1.flac").read_bytes() == junk
    assert log.messages[0].startswith("left 060-C4-mf-1.flac alone: not a usable take"), log.messages
    assert "060-C4-mf-1.flac" not in TakeIndex(folder).files


def test_an_index_that_is_not_one_is_left_alone(tmp_path, recording) -> None:
    path, _, _ = recording
    folder = tmp_path / "takes"
    folder.mkdir()
    (folder / INDEX_NAME).write_text('{"takes": "the Tuesday client"}')
    with pytest.raises(VoicerError, match=f"^{folder / INDEX_NAME}: not a takes index of format 1"):
        session(folder, Log())
    (folder / INDEX_NAME).write_text('{"format": 1, "takes": [{"key": 12, "dynamic": "mf", "file": "x.flac"}]}')
    with pytest.raises(VoicerError, match="take 1 needs a key 21..108"):
        session(folder, Log())
    (folder / INDEX_NAME).write_text("{")
    with pytest.raises(VoicerError, match="cannot read the takes index"):
        session(folder, Log())
    assert (folder / INDEX_NAME).read_text() == "{"


def test_the_input_ending_keeps_a_shortened_last_take(tmp_path, rng) -> None:
    x, onsets = synth([(60, MF), (64, MF)], rng, tail_s=-0.3)  # the file ends 0.3 s into the second take
    log = Log()
    steps = plan_steps([60, 64, 67], ["mf"])
    result = GuidedSession(tmp_path / "t", steps, seconds=SECONDS, on_prompt=log.prompt,
                           on_message=log.messages.append).run(FileInput(write(tmp_path / "in.wav", x),
                                                                         realtime=False))
    assert result.input_ended and not result.complete
    first, second = result.saved
    assert not first["truncated"] and second["truncated"]
    # The second take runs from 0.1 s before its strike to the end of the file.
    assert second["frames"] == len(x) - round(second["input_start_s"] * RATE) < first["frames"]
    assert second["duration_s"] == pytest.approx(PRE_ROLL_S + 0.3, abs=0.015)  # strike up to 10 ms late, 1 hop
    assert [p.index for p in log.prompts] == [1, 2, 3]


# --- the command ---------------------------------------------------------------------------------------

def record(capsys, *argv) -> tuple[int, str, str]:
    try:
        code = main(["record", *map(str, argv)])
    except SystemExit as exc:  # argparse's refusals
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def test_record_command_end_to_end(capsys, tmp_path, recording) -> None:
    path, x, onsets = recording
    folder = tmp_path / "takes"
    args = ["--keys", "60,64,67", "--dynamics", "mf,ff", "-o", folder, "--input-file", path, "--fast",
            "--seconds", SECONDS]
    code, out, err = record(capsys, *args)
    assert (code, err) == (0, ""), err
    lines = out.splitlines()
    assert lines[0] == f"  recording 6 of 6 steps into {folder} from {path} at {RATE} Hz, 1 channel"
    assert lines[1] == "step 1 of 6: play C4 (key 60) mf"
    assert "step 2 of 6: play C4 (key 60) ff (attempt 2)" in lines
    assert lines[-1] == f"done: all 6 steps recorded in {folder}; 6 takes saved now, 2 strikes asked again"
    assert sorted(p.name for p in folder.iterdir()) == sorted([*EXPECTED_FILES, INDEX_NAME])
    before = {p.name: p.read_bytes() for p in folder.iterdir()}
    code, out, _ = record(capsys, *args)
    assert code == 0 and out.splitlines()[0] == f"  all 6 steps are recorded in {folder} already"
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before


def test_record_command_ctrl_c_keeps_the_takes_and_the_rerun_continues(capsys, tmp_path, recording,
                                                                        monkeypatch) -> None:
    path, x, onsets = recording
    folder = tmp_path / "takes"
    say = cli_record._say

    def ctrl_c_at_step_3(text: str) -> None:
        if text.startswith("step 3 of 6"):
            raise KeyboardInterrupt
        say(text)

    monkeypatch.setattr(cli_record, "_say", ctrl_c_at_step_3)
    code, out, _ = record(capsys, "--keys", "60,64,67", "--dynamics", "mf,ff", "-o", folder, "--input-file", path,
                          "--fast", "--seconds", SECONDS)
    assert code == cli_record.EXIT_INTERRUPTED == 130
    assert out.splitlines()[-1] == (f"interrupted at step 3 of 6: every take saved so far is kept in {folder}; "
                                    "run the same command again to continue")
    assert sorted(p.name for p in folder.iterdir()) == ["060-C4-ff-1.flac", "060-C4-mf-1.flac", INDEX_NAME]
    monkeypatch.setattr(cli_record, "_say", say)
    rest = write(tmp_path / "rest.wav", x[onsets[3] - round(0.3 * RATE):])
    code, out, _ = record(capsys, "--keys", "60,64,67", "--dynamics", "mf,ff", "-o", folder, "--input-file", rest,
                          "--fast", "--seconds", SECONDS)
    assert code == 0 and "(2 recorded already)" in out.splitlines()[0]
    assert out.splitlines()[1] == "step 3 of 6: play E4 (key 64) mf"
    assert sorted(p.name for p in folder.iterdir()) == sorted([*EXPECTED_FILES, INDEX_NAME])


@pytest.mark.parametrize("case", ["key range", "dynamic", "fast alone", "missing file", "text file", "rate",
                                  "device and file", "seconds", "out is a file"])
def test_record_command_bad_input_exits_2_with_one_line(capsys, tmp_path, recording, case) -> None:
    path, _, _ = recording
    folder = tmp_path / "takes"
    args = ["--keys", "60", "--dynamics", "mf", "-o", folder, "--input-file", path, "--fast"]
    if case == "key range":
        args[1], expected = "20-30", "voicer record: error: keys '20-30': key 20 is outside 21..108 (A0..C8)"
    elif case == "dynamic":
        args[3], expected = "fff", "voicer record: error: dynamics 'fff': 'fff' is not one of pp, p, mp, mf, f, ff"
    elif case == "fast alone":
        args = args[:6] + ["--fast"]
        expected = "voicer record: error: --fast replays --input-file as fast as possible; give --input-file FILE"
    elif case == "missing file":
        args[7] = tmp_path / "no-such.flac"
        expected = f"voicer record: error: {args[7]}: no such audio file"
    elif case == "text file":
        args[7] = tmp_path / "notes.wav"
        args[7].write_text("hammers reshaped in 2019\n")
        expected = f"voicer record: error: {args[7]}: cannot read it as audio"
    elif case == "rate":
        args += ["--sample-rate", "48000"]
        expected = f"voicer record: error: --sample-rate 48000 does not match {path} ({RATE} Hz)"
    elif case == "device and file":
        args += ["--device", "USB"]
        expected = "voicer record: error: --device and --input-file exclude each other"
    elif case == "seconds":
        args += ["--seconds", "0"]
        expected = "voicer record: error: argument --seconds: 0 must be a finite number of seconds > 0"
    else:
        folder.write_text("")
        expected = f"voicer record: error: {folder}: is not a folder"
    code, out, err = record(capsys, *args)
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith(expected), err
    assert not folder.is_dir()


def _voicer(home: Path, *args: str) -> subprocess.CompletedProcess:
    home.mkdir(parents=True, exist_ok=True)
    (home / ".asoundrc").write_text("pcm.!default { type null }\n")  # as tests/test_cli_audio.py
    env = dict(os.environ, HOME=str(home), XDG_CONFIG_HOME=str(home / ".config"),
               PYTHONPATH=os.pathsep.join([str(Path(voicer.__file__).parents[1]), os.environ.get("PYTHONPATH", "")]))
    env.pop("ALSA_CONFIG_PATH", None)
    return subprocess.run([sys.executable, "-m", "voicer", *args], env=env, capture_output=True, text=True,
                          timeout=60, stdin=subprocess.DEVNULL)


def test_record_command_names_a_missing_device(tmp_path) -> None:
    folder = tmp_path / "takes"
    proc = _voicer(tmp_path / "home", "record", "--keys", "21-108", "--dynamics", "mf,ff", "-o", str(folder),
                   "--device", "nosuchdevice")
    lines = [line for line in proc.stderr.splitlines() if not line.startswith("ALSA lib ")]  # libasound's own
    check_portaudio(proc.stderr)
    assert proc.returncode == 2 and proc.stdout == "", proc.stderr
    assert len(lines) == 1 and lines[0].startswith(
        "voicer record: error: audio input device 'nosuchdevice' not found: No input device matching 'nosuchdevice' "
        "(available: [0] default); choose one with --device"), proc.stderr
    assert not folder.exists()


def test_the_command_line_does_not_load_audio_input_until_record_runs(tmp_path) -> None:
    code = ("import sys, voicer.cli; voicer.cli.build_parser(); "
            "print([m for m in ('sounddevice', 'voicer.io.capture', 'voicer.analysis.guided') if m in sys.modules])")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0 and proc.stdout.strip() == "[]", proc.stdout + proc.stderr


def test_waiting_for_a_strike_holds_no_more_than_the_buffer(tmp_path, rng, monkeypatch) -> None:
    # Two minutes of room noise before the strike (the technician was called away): the
    # session keeps only the recent input while it waits, not all of it. The ring is made
    # small (its least, 32768 frames: 4 s here) so that it is small beside the input.
    monkeypatch.setattr(guided, "BUFFER_S", 1.0)
    rate = 8000
    x = rng.normal(0.0, 1e-3, 120 * rate + rate).astype(np.float32)
    t = np.arange(rate) / rate
    x[-rate:] += (0.3 * np.sin(2 * np.pi * et_hz(60) * t) * np.exp(-t / DECAY_S)).astype(np.float32)
    path = tmp_path / "wait.flac"
    soundfile.write(path, x, rate, subtype="PCM_16")
    source = FileInput(path, realtime=False)
    del x
    tracemalloc.start()
    try:
        result = GuidedSession(tmp_path / "t", [Step(60, "mf")], seconds=0.5).run(source)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert result.complete and len(result.saved) == 1
    # The input is 3.8 MB of float32, the ring 128 kB; a read of all of it, its energies and
    # the chunk kept from the read before take a few times that.
    assert peak < 2e6, peak
