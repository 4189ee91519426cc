"""Live input (arrival times -> sample offsets, one block of latency) and the computer keyboard.

References: the MIDI 1.0 specification ("MIDI 1.0": note on with velocity 0 is a note off;
release velocity 64 for senders without release velocity; controller 64 is the damper
pedal, 0-63 off and 64-127 on); common practice for key numbers (C4 = 60, piano compass
21..108) and the major scale (whole, whole, half, whole, whole, whole, half).
"""

from __future__ import annotations

import threading
import time
from typing import Any, Callable, Iterator

import mido
import pytest

from voicer.engine import keyboard as keyboard_module
from voicer.engine.keyboard import KeyboardPlayer
from voicer.engine.live import FLIP, LiveInput

# A block of 512 frames at 65536 Hz lasts exactly 2**-7 s, so quarter periods are exact in binary.
RATE, FRAMES = 65536.0, 512
PERIOD = FRAMES / RATE


class FakeClock:
    """A clock the test moves by hand."""

    def __init__(self, now: float = 0.0) -> None:
        self.now = now

    def __call__(self) -> float:
        return self.now


def note_on(note: int, velocity: int = 90, channel: int = 0) -> mido.Message:
    return mido.Message("note_on", note=note, velocity=velocity, channel=channel)


# --- LiveInput: timing -----------------------------------------------------------------

def test_offsets_keep_the_position_within_the_period() -> None:
    clock = FakeClock(0.0)  # the previous drain (construction) at t = 0
    live = LiveInput(RATE, clock=clock)
    a, b = note_on(60), note_on(64)
    clock.now = 0.25 * PERIOD
    live.push(a)
    clock.now = 0.75 * PERIOD
    live.push(b)
    clock.now = PERIOD
    assert live.drain(FRAMES) == [(FRAMES // 4, a), (3 * FRAMES // 4, b)]
    # The next period: measured from this drain, not from the start.
    c = note_on(67)
    clock.now = 1.5 * PERIOD
    live.push(c)
    clock.now = 2 * PERIOD
    assert live.drain(FRAMES) == [(FRAMES // 2, c)]


def test_latency_is_one_block_whatever_the_arrival() -> None:
    """Arrival at fraction f of a period plays at f of the next block: always one period later."""
    clock = FakeClock(1000.0)  # a perf_counter-like origin
    live = LiveInput(RATE, clock=clock)
    for f in (0.0, 0.1, 0.37, 0.5, 0.9, 0.999):
        start = clock.now
        clock.now = start + f * PERIOD
        live.push(note_on(60))
        arrival = clock.now
        clock.now = start + PERIOD
        [(offset, _)] = live.drain(FRAMES)
        delay = (clock.now + offset / RATE) - arrival
        # int() floors the offset: up to one sample early, never late.
        assert PERIOD - 1 / RATE < delay <= PERIOD + 1e-12, f


def test_offsets_are_clamped_to_the_block() -> None:
    clock = FakeClock(10.0)
    live = LiveInput(RATE, clock=clock)
    clock.now = 9.0  # stamped before the previous drain (a push racing the callback)
    live.push(note_on(60))
    clock.now = 11.0  # stamped at the drain itself: 100 % of the period
    live.push(note_on(62))
    assert [o for o, _ in live.drain(FRAMES)] == [0, FRAMES - 1]


def test_one_frame_block_and_zero_length_period() -> None:
    clock = FakeClock(0.0)
    live = LiveInput(RATE, clock=clock)
    clock.now = 0.5
    live.push(note_on(60))
    clock.now = 1.0
    assert [o for o, _ in live.drain(1)] == [0]
    live.push(note_on(61))  # arrives at the same instant as the drain, which runs again at once
    assert [o for o, _ in live.drain(FRAMES)] == [0]


def test_arrival_order_kept_and_queue_emptied() -> None:
    clock = FakeClock(0.0)
    live = LiveInput(RATE, clock=clock)
    sent: list[Any] = []
    for i, item in enumerate([note_on(60), FLIP, note_on(62), mido.Message("control_change", control=64, value=127),
                              note_on(64)]):
        clock.now = (i // 2) * 0.25 * PERIOD  # pairs share a stamp: order must still hold
        live.push(item)
        sent.append(item)
    clock.now = PERIOD
    events = live.drain(FRAMES)
    assert [m for _, m in events] == sent
    offsets = [o for o, _ in events]
    assert offsets == sorted(offsets) and offsets == [0, 0, 128, 128, 256]
    assert live.drain(FRAMES) == []


# --- LiveInput: messages ----------------------------------------------------------------

def test_note_on_velocity_zero_becomes_note_off() -> None:
    live = LiveInput(RATE, clock=FakeClock())
    live.push(note_on(61, velocity=0, channel=3))
    [(_, msg)] = live.drain(FRAMES)
    # MIDI 1.0: note on with velocity 0 means note off; release velocity 64 (40H) by default.
    assert (msg.type, msg.channel, msg.note, msg.velocity) == ("note_off", 3, 61, 64)


def test_engine_messages_pass_unchanged_and_others_are_dropped() -> None:
    live = LiveInput(RATE, clock=FakeClock())
    kept = [note_on(60, velocity=100, channel=9), mido.Message("note_off", note=60, velocity=30),
            mido.Message("control_change", channel=1, control=67, value=100), mido.Message("program_change", program=5)]
    for msg in [kept[0], mido.Message("pitchwheel", pitch=100), kept[1], mido.Message("clock"),
                mido.Message("sysex", data=[1, 2]), kept[2], mido.Message("aftertouch", value=3), kept[3]]:
        live.push(msg)
    assert [m for _, m in live.drain(FRAMES)] == kept
    assert live.received == len(kept)  # counts the MIDI messages taken in, not the dropped ones


def test_flip_command_passes_through() -> None:
    live = LiveInput(RATE, clock=FakeClock())
    live.push(FLIP)
    assert live.drain(FRAMES) == [(0, "flip")]
    assert live.received == 0  # a command is not a MIDI message


def test_messages_from_another_thread_are_delivered() -> None:
    live = LiveInput(RATE)  # the real clock, as in use
    notes = [21 + i % 88 for i in range(500)]

    def midi_thread() -> None:
        for n in notes:
            live.push(note_on(n))
        live.push(FLIP)

    thread = threading.Thread(target=midi_thread)
    thread.start()
    thread.join(timeout=5)
    assert not thread.is_alive()
    events = live.drain(FRAMES)
    assert [m.note for _, m in events[:-1]] == notes and events[-1][1] == FLIP
    assert all(0 <= o <= FRAMES - 1 for o, _ in events)
    offsets = [o for o, _ in events]
    assert offsets == sorted(offsets)  # arrival order is time order on one thread


# --- KeyboardPlayer -------------------------------------------------------------------------

class FakeTimer:
    """Records what KeyboardPlayer schedules instead of running a thread."""

    made: list["FakeTimer"] = []

    def __init__(self, interval: float, function: Callable[..., None], args: tuple = (), kwargs: Any = None) -> None:
        self.interval, self.function, self.args = interval, function, args
        self.daemon = False
        self.started = False
        FakeTimer.made.append(self)

    def start(self) -> None:
        self.started = True

    def fire(self) -> None:
        self.function(*self.args)


@pytest.fixture
def timers(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[FakeTimer]]:
    FakeTimer.made = []
    monkeypatch.setattr(keyboard_module.threading, "Timer", FakeTimer)
    yield FakeTimer.made


def player(**kwargs: Any) -> tuple[KeyboardPlayer, list[Any]]:
    sent: list[Any] = []
    return KeyboardPlayer(sent.append, **kwargs), sent


def notes_of(sent: list[Any]) -> list[int]:
    return [m.note for m in sent if not isinstance(m, str) and m.type == "note_on"]


def test_a_at_octave_4_is_middle_c_then_released(timers: list[FakeTimer]) -> None:
    kb, sent = player(velocity=100, hold_s=0.25)
    kb.press("a")
    assert sent == [mido.Message("note_on", note=60, velocity=100)]  # C4 = 60 (common practice)
    [timer] = timers
    assert timer.interval == 0.25 and timer.daemon and timer.started
    kb.press("x")  # moving the octave while the note is held must not change which note is released
    timer.fire()
    assert sent[-1].type == "note_off" and sent[-1].note == 60


def test_note_off_arrives_after_hold_s() -> None:
    """Real timer: the release comes by itself, not before hold_s."""
    got = threading.Event()
    times: list[float] = []

    def send(msg: Any) -> None:
        times.append(time.monotonic())
        if msg.type == "note_off":
            got.set()

    kb = KeyboardPlayer(send, hold_s=0.03)
    start = time.monotonic()
    kb.press("a")
    assert got.wait(timeout=2.0), "no note_off within 2 s"
    # threading.Timer waits on the monotonic clock; 1 ms allows for reading the clock.
    assert times[-1] - start >= 0.03 - 1e-3


def test_key_rows_follow_the_piano_layout(timers: list[FakeTimer]) -> None:
    kb, sent = player()
    for c in "asdfghjkl":
        kb.press(c)
    # Home row = white keys: C major scale from C4 (common practice), on to D5.
    assert notes_of(sent) == [60, 62, 64, 65, 67, 69, 71, 72, 74]
    sent.clear()
    for c in "wetyuo":
        kb.press(c)
    assert notes_of(sent) == [61, 63, 66, 68, 70, 73]  # the black keys between them


def test_octave_keys_shift_by_12(timers: list[FakeTimer]) -> None:
    kb, sent = player()
    kb.press("x")
    kb.press("a")
    kb.press("z")
    kb.press("z")
    kb.press("z")
    kb.press("a")
    assert notes_of(sent) == [72, 36]


def test_octave_is_bounded(timers: list[FakeTimer]) -> None:
    kb, sent = player()
    for _ in range(20):
        kb.press("x")
    kb.press("k")  # C above 'a': C8 = 108, the top of the piano (common practice)
    kb.press("o")  # 109: beyond the compass, not sent
    kb.press("z")
    kb.press("a")  # one octave down from the bound, not from octave 24
    assert notes_of(sent) == [108, 84]
    sent.clear()
    for _ in range(20):
        kb.press("z")
    kb.press("a")  # 12: below A0, not sent
    kb.press("h")  # A0 = 21, the bottom of the piano
    kb.press("x")
    kb.press("a")
    assert notes_of(sent) == [21, 24]
    # Each sent note has its release scheduled; none for the notes that were not sent.
    assert [t.args[0].note for t in timers] == [108, 84, 21, 24]


def test_p_toggles_the_sustain_pedal(timers: list[FakeTimer]) -> None:
    kb, sent = player()
    for _ in range(3):
        kb.press("p")
    # MIDI 1.0: controller 64 is the damper pedal; 127 = down, 0 = up.
    assert [(m.type, m.control, m.value) for m in sent] == [("control_change", 64, 127), ("control_change", 64, 0),
                                                            ("control_change", 64, 127)]
    assert kb.sustain is True


def test_space_flips_q_quits_others_ignored(timers: list[FakeTimer]) -> None:
    kb, sent = player()
    for c in "1b\n\t;":
        kb.press(c)
    assert sent == [] and not timers
    kb.press(" ")
    assert sent == ["flip"] and FLIP == "flip"
    assert not kb.quit.is_set()
    kb.press("q")
    assert kb.quit.is_set() and sent == ["flip"]


def reader(chars: str) -> tuple[Callable[[], str], list[str]]:
    """read_char over ``chars``, then '' (end of input); reading past that is an error."""
    left = list(chars) + [""]

    def read() -> str:
        assert left, "run() read again after end of input"
        return left.pop(0)
    return read, left


def test_run_stops_at_q(timers: list[FakeTimer]) -> None:
    kb, sent = player()
    read, left = reader("aAqs")
    kb.run(read)
    assert notes_of(sent) == [60, 60]  # upper case plays the same key
    assert left == ["s", ""]  # nothing read after q


def test_run_stops_at_end_of_input(timers: list[FakeTimer]) -> None:
    kb, sent = player()
    read, left = reader("d ")
    kb.run(read)
    assert kb.quit.is_set() and left == []
    assert notes_of(sent) == [64] and sent[-1] == FLIP


def test_keyboard_into_live_input(timers: list[FakeTimer]) -> None:
    clock = FakeClock(0.0)
    live = LiveInput(RATE, clock=clock)
    kb = KeyboardPlayer(live.push, velocity=70)
    clock.now = 0.5 * PERIOD
    kb.press("a")
    kb.press(" ")
    timers[0].fire()
    clock.now = PERIOD
    events = live.drain(FRAMES)
    assert [(o, m if isinstance(m, str) else (m.type, m.note)) for o, m in events] == [
        (FRAMES // 2, ("note_on", 60)), (FRAMES // 2, "flip"), (FRAMES // 2, ("note_off", 60))]
