"""MIDI sources: normalisation, Standard MIDI Files, live ports, and the demo passage.

References: the MIDI 1.0 Detailed Specification ("MIDI 1.0") for messages and running
status; the Standard MIDI File specification ("SMF spec", MIDI 1.0 supplement) for
chunks, variable-length quantities, tempo and running status in files; mido as the
reference reader where named.
"""

from __future__ import annotations

import os
import re
import struct
import threading
from pathlib import Path

import mido
import pytest

from voicer.engine.host import Source
from voicer.errors import VoicerError
from voicer.io.midi import normalize
from voicer.io.sources import MidiFileSource, MidiPortSource, format_ports, list_input_ports
from voicer.resources import presets_dir

DEMO = presets_dir() / "midi" / "demo-passage.mid"
NO_SEQUENCER = not os.path.exists("/dev/snd/seq")  # the device ALSA's sequencer client opens


# --- building Standard MIDI Files by hand (SMF spec) --------------------------------

def vlq(n: int) -> bytes:
    """Variable-length quantity: 7 bits a byte, most significant first, bit 7 set on all but the last."""
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append(0x80 | (n & 0x7F))
        n >>= 7
    return bytes(reversed(out))


def chunk(kind: bytes, data: bytes) -> bytes:
    """A chunk: 4-byte type, 32-bit big-endian length, data."""
    return kind + struct.pack(">L", len(data)) + data


def smf(fmt: int, division: int, *tracks: bytes) -> bytes:
    """A whole file: MThd (format, number of tracks, division) followed by MTrk chunks."""
    return chunk(b"MThd", struct.pack(">hhH", fmt, len(tracks), division)) + b"".join(chunk(b"MTrk", t) for t in tracks)


END_OF_TRACK = vlq(0) + b"\xff\x2f\x00"


def tempo_event(delta: int, us_per_quarter: int) -> bytes:
    """Set Tempo meta event: FF 51 03 tt tt tt (SMF spec)."""
    return vlq(delta) + b"\xff\x51\x03" + us_per_quarter.to_bytes(3, "big")


def write(tmp_path: Path, name: str, data: bytes) -> Path:
    path = tmp_path / name
    path.write_bytes(data)
    return path


def test_vlq_helper_matches_the_smf_spec_examples():
    # SMF spec, "Variable Length Quantities": the table of examples.
    examples = {0x00: "00", 0x40: "40", 0x7F: "7f", 0x80: "81 00", 0x2000: "c0 00", 0x3FFF: "ff 7f",
                0x4000: "81 80 00", 0x1FFFFF: "ff ff 7f", 0x200000: "81 80 80 00", 0x8000000: "c0 80 80 00",
                0xFFFFFFF: "ff ff ff 7f"}
    for value, encoded in examples.items():
        assert vlq(value) == bytes.fromhex(encoded), hex(value)


# --- normalisation ------------------------------------------------------------------

def test_note_on_velocity_zero_becomes_note_off():
    # MIDI 1.0: a Note On with velocity 0 is a Note Off; 40H is the velocity of a sender without velocity data.
    out = normalize(mido.Message("note_on", channel=9, note=61, velocity=0, time=0.25))
    assert out == mido.Message("note_off", channel=9, note=61, velocity=64, time=0.25)


def test_engine_messages_are_kept_with_their_channel():
    for message in (mido.Message("note_on", channel=3, note=60, velocity=1),
                    mido.Message("note_off", channel=4, note=60, velocity=0),
                    mido.Message("control_change", channel=5, control=64, value=127),
                    mido.Message("program_change", channel=15, program=0)):
        assert normalize(message) == message


def test_everything_else_is_dropped():
    for message in (mido.Message("sysex", data=[0x7E, 0x7F, 0x09, 0x01]),
                    mido.Message("pitchwheel", channel=0, pitch=100),
                    mido.Message("aftertouch", channel=0, value=10),
                    mido.Message("polytouch", channel=0, note=60, value=10),
                    mido.Message("clock"),
                    mido.MetaMessage("set_tempo", tempo=500000)):
        assert normalize(message) is None, message


# --- MIDI files ---------------------------------------------------------------------

def test_running_status_file_built_by_hand(tmp_path):
    # SMF spec: running status applies within a track; a data byte (< 80H) where a
    # status byte is expected repeats the previous status. Division 96 ticks per quarter,
    # tempo 500000 us per quarter, so one tick is 0.5 / 96 s.
    track = (tempo_event(0, 500_000)
             + vlq(0) + b"\x91\x3c\x40"      # note on, channel 2, C4, velocity 64
             + vlq(96) + b"\x40\x50"         # running status: note on E4, velocity 80
             + vlq(96) + b"\x43\x60"         # running status: note on G4, velocity 96
             + vlq(200) + b"\x3c\x00"        # running status, velocity 0: C4 off (2-byte delta)
             + vlq(0) + b"\x40\x00"          # E4 off at the same time
             + vlq(16) + b"\xb1\x40\x7f"     # new status: control change 64 (sustain) on
             + vlq(8) + b"\x40\x00"          # running status: sustain off
             + END_OF_TRACK)
    source = MidiFileSource(write(tmp_path, "running.mid", smf(0, 96, track)))
    tick = 0.5 / 96
    expected = [
        (0 * tick, mido.Message("note_on", channel=1, note=60, velocity=64)),
        (96 * tick, mido.Message("note_on", channel=1, note=64, velocity=80)),
        (192 * tick, mido.Message("note_on", channel=1, note=67, velocity=96)),
        (392 * tick, mido.Message("note_off", channel=1, note=60, velocity=64)),
        (392 * tick, mido.Message("note_off", channel=1, note=64, velocity=64)),
        (408 * tick, mido.Message("control_change", channel=1, control=64, value=127)),
        (416 * tick, mido.Message("control_change", channel=1, control=64, value=0)),
    ]
    events = list(source.events())
    assert [m for _, m in events] == [m for _, m in expected]
    assert [t for t, _ in events] == pytest.approx([t for t, _ in expected], abs=1e-9)
    assert source.duration_s == pytest.approx(416 * tick, abs=1e-9)


def test_tempo_change_timing(tmp_path):
    # SMF spec: seconds = ticks * (us per quarter) / 1e6 / division, with the tempo in
    # force at each tick. 480 ticks per quarter; 120 bpm (500000 us) until tick 960, then
    # 60 bpm (1000000 us). The tempo map is in track 1 (format 1), the notes in track 2.
    conductor = tempo_event(0, 500_000) + tempo_event(960, 1_000_000) + END_OF_TRACK
    notes = b"".join(vlq(480 if i else 0) + bytes([0x90, 60 + i, 100]) for i in range(5)) + END_OF_TRACK
    source = MidiFileSource(write(tmp_path, "tempo.mid", smf(1, 480, conductor, notes)))
    events = list(source.events())
    assert [m.note for _, m in events] == [60, 61, 62, 63, 64]
    assert [t for t, _ in events] == pytest.approx([0.0, 0.5, 1.0, 2.0, 3.0], abs=1e-9)


def test_events_at_the_same_time_keep_file_order(tmp_path):
    # SMF spec (format 1: tracks play together) with mido's merge as the reference for
    # ties: earlier tracks first, then order within a track.
    first = (vlq(0) + b"\x90\x3c\x40" + vlq(240) + b"\x90\x40\x40" + vlq(0) + b"\xb0\x40\x7f"
             + vlq(0) + b"\x90\x3c\x00" + END_OF_TRACK)
    second = vlq(240) + b"\xc0\x05" + vlq(0) + b"\x90\x30\x50" + END_OF_TRACK
    source = MidiFileSource(write(tmp_path, "ties.mid", smf(1, 480, first, second)))
    events = list(source.events())
    at_240 = [m for t, m in events if t == pytest.approx(0.25, abs=1e-9)]
    assert at_240 == [mido.Message("note_on", note=64, velocity=64),
                      mido.Message("control_change", control=64, value=127),
                      mido.Message("note_off", note=60, velocity=64),
                      mido.Message("program_change", program=5),
                      mido.Message("note_on", note=48, velocity=80)]
    times = [t for t, _ in events]
    assert times == sorted(times)


def test_file_messages_carry_no_time_of_their_own(tmp_path):
    track = vlq(0) + b"\x90\x3c\x40" + vlq(480) + b"\x3c\x00" + END_OF_TRACK
    events = list(MidiFileSource(write(tmp_path, "t.mid", smf(0, 480, track))).events())
    assert [m.time for _, m in events] == [0, 0]


@pytest.mark.parametrize(("name", "data", "reason"), [
    ("text.mid", b"this is not a MIDI file at all\n", "not a readable Standard MIDI File"),
    ("short.mid", b"MThd\x00\x00\x00\x06\x00", "ends in the middle of a chunk"),
    # SMF spec: data bytes are 00H..7FH; a note-on key of 80H is malformed.
    ("baddata.mid", smf(0, 96, vlq(0) + b"\x90\x80\x40" + END_OF_TRACK), "not a readable Standard MIDI File"),
    # SMF spec: format 2 holds independent sequences, which cannot be merged in time.
    ("format2.mid", smf(2, 96, END_OF_TRACK), "format 2"),
    # SMF spec: a division with bit 15 set is SMPTE timing (here -25 fps, 40 ticks a frame).
    ("smpte.mid", smf(0, 0xE728, END_OF_TRACK), "SMPTE"),
    ("zero.mid", smf(0, 0, END_OF_TRACK), "0 ticks per quarter note"),
])
def test_bad_files_name_the_file(tmp_path, name, data, reason):
    path = write(tmp_path, name, data)
    with pytest.raises(VoicerError, match=re.escape(str(path)) + ".*" + reason):
        MidiFileSource(path)


def test_missing_file_and_folder_name_the_path(tmp_path):
    missing = tmp_path / "nowhere.mid"
    with pytest.raises(VoicerError, match=re.escape(f"{missing}: no such MIDI file")):
        MidiFileSource(missing)
    with pytest.raises(VoicerError, match=re.escape(f"{tmp_path}: is a folder, not a MIDI file")):
        MidiFileSource(tmp_path)


def test_file_source_follows_the_protocol_and_is_not_live():
    source = MidiFileSource(DEMO)
    assert isinstance(source, Source)
    assert (source.name, source.realtime) == ("midi-file", False)
    with pytest.raises(VoicerError, match="played through events"):
        source.open(lambda message: None)
    source.close()
    source.close()


# --- live ports, through an in-memory mido port ---------------------------------------

class FeedInput(mido.ports.BaseInput):
    """A mido input port fed by the test; its callback runs on another thread.

    Like mido's rtmidi back end, it gets one complete message at a time as bytes (the
    driver has already expanded running status) and builds it with ``Message.from_bytes``.
    """

    def _open(self, callback=None, **kwargs):
        self.callback = callback

    def feed(self, *messages: str) -> None:
        def deliver():
            for hex_bytes in messages:
                self.callback(mido.Message.from_bytes(bytes.fromhex(hex_bytes)))

        worker = threading.Thread(target=deliver)
        worker.start()
        worker.join()


class MemoryPortSource(MidiPortSource):
    """MidiPortSource whose backend steps are in-memory."""

    def __init__(self, port=None, *, names, **kwargs):
        super().__init__(port, **kwargs)
        self.names = names
        self.opened: list[FeedInput] = []

    def _input_names(self):
        return list(self.names)

    def _open_port(self, name, callback):
        self.opened.append(FeedInput(name, callback=callback))
        return self.opened[-1]


NAMES = ["Alpha Keys 20:0", "Beta Pads 24:0", "Alpha Keys 20:1"]


def test_port_messages_arrive_normalised():
    received = []
    source = MemoryPortSource("Beta", names=NAMES)
    source.open(received.append)
    source.opened[0].feed(          # MIDI 1.0 status bytes:
        "92 3c 64",                     # note on (9nH), channel 3, C4, velocity 100
        "92 3c 00",                     # note on with velocity 0: note off
        "f8",                           # timing clock (system real-time: dropped)
        "b2 40 7f",                     # control change (BnH) 64, sustain pedal on
        "f0 7e 7f 09 01 f7",            # system exclusive (dropped)
        "e2 00 40",                     # pitch bend (EnH, dropped)
        "c2 05")                        # program change (CnH)
    assert received == [mido.Message("note_on", channel=2, note=60, velocity=100),
                        mido.Message("note_off", channel=2, note=60, velocity=64),
                        mido.Message("control_change", channel=2, control=64, value=127),
                        mido.Message("program_change", channel=2, program=5)]
    assert source.errors == 0


@pytest.mark.parametrize(("port", "chosen"), [
    ("Alpha Keys 20:1", "Alpha Keys 20:1"),   # exact name
    ("beta", "Beta Pads 24:0"),               # part of one name, any case
    (2, "Alpha Keys 20:1"),                   # index
    ("1", "Beta Pads 24:0"),                  # index as typed on a command line
    (None, "Alpha Keys 20:0"),                # the first input
])
def test_choose_port(port, chosen):
    source = MemoryPortSource(port, names=NAMES)
    source.open(lambda message: None)
    assert source.port_name == chosen == source.opened[0].name


def test_exact_name_wins_over_a_longer_match():
    source = MemoryPortSource("Keys", names=["Keys 2", "Keys"])
    source.open(lambda message: None)
    assert source.port_name == "Keys"


def test_unknown_port_lists_the_available_ones():
    with pytest.raises(VoicerError, match=re.escape("no MIDI input port matches 'Gamma' (available: "
                                                    "0: Alpha Keys 20:0; 1: Beta Pads 24:0; 2: Alpha Keys 20:1)")):
        MemoryPortSource("Gamma", names=NAMES).open(lambda message: None)
    with pytest.raises(VoicerError, match=re.escape("no MIDI input port number 3 (available: 0: Alpha Keys")):
        MemoryPortSource(3, names=NAMES).open(lambda message: None)


def test_ambiguous_part_of_a_name_lists_the_matches():
    with pytest.raises(VoicerError, match=re.escape("'alpha' matches several ports (Alpha Keys 20:0; Alpha Keys 20:1)")):
        MemoryPortSource("alpha", names=NAMES).open(lambda message: None)


def test_no_ports_says_what_to_use_instead():
    with pytest.raises(VoicerError, match=r"^no MIDI input ports found; .*computer keyboard.*`voicer render`"):
        MemoryPortSource(names=[]).open(lambda message: None)


def test_virtual_port_is_named_and_needs_no_listing():
    source = MemoryPortSource(names=[], virtual=True, client_name="bench")
    source.open(lambda message: None)
    assert source.port_name == "bench"
    named = MemoryPortSource("voicer in", names=[], virtual=True)
    named.open(lambda message: None)
    assert named.port_name == "voicer in"
    with pytest.raises(VoicerError, match="virtual MIDI port needs a name, not the index 1"):
        MidiPortSource(1, virtual=True)


def test_callback_errors_are_counted_not_raised():
    received = []

    def on_message(message):
        if message.type == "control_change":
            raise RuntimeError("engine queue full")
        received.append(message)

    source = MemoryPortSource(names=NAMES)
    source.open(on_message)
    source.opened[0].feed("90 3c 64", "b0 40 7f", "80 3c 20")
    assert [m.type for m in received] == ["note_on", "note_off"]
    assert source.errors == 1
    assert source.last_error == "RuntimeError: engine queue full"


def test_port_source_protocol_open_close():
    source = MemoryPortSource(names=NAMES)
    assert isinstance(source, Source)
    assert (source.name, source.realtime) == ("midi-port", True)
    with pytest.raises(VoicerError, match="has no events"):
        list(source.events())
    source.open(lambda message: None)
    with pytest.raises(VoicerError, match="'Alpha Keys 20:0' is already open"):
        source.open(lambda message: None)
    source.close()
    source.close()
    assert source.opened[0].closed


def test_format_ports():
    assert format_ports(lambda: ["Alpha Keys 20:0", "Beta Pads 24:0"]) == (
        "MIDI input ports:\n   0  Alpha Keys 20:0\n   1  Beta Pads 24:0")
    assert format_ports(lambda: []).startswith("no MIDI input ports (none connected; ")


# --- the real python-rtmidi path on a machine without the ALSA sequencer ----------------

UNAVAILABLE = (r"^MIDI ports are unavailable on this system: .*error creating ALSA sequencer client object; "
               r"play from the computer keyboard instead, or render a MIDI file with `voicer render`$")


@pytest.mark.skipif(not NO_SEQUENCER, reason="this machine has an ALSA sequencer (/dev/snd/seq)")
def test_real_ports_without_a_sequencer_give_the_clear_message():
    # The text after the colon is python-rtmidi's own (RtMidi's ALSA back end), so these
    # checks pass only if python-rtmidi really ran.
    with pytest.raises(VoicerError, match=UNAVAILABLE):
        MidiPortSource(virtual=True).open(lambda message: None)
    with pytest.raises(VoicerError, match=UNAVAILABLE):
        MidiPortSource("anything").open(lambda message: None)
    with pytest.raises(VoicerError, match=UNAVAILABLE):
        list_input_ports()
    assert re.match(r"^no MIDI input ports \(MIDI ports are unavailable on this system: .*\)$", format_ports())


# --- the demo passage -----------------------------------------------------------------

@pytest.fixture(scope="module")
def demo_events():
    return list(MidiFileSource(DEMO).events())


def test_demo_lasts_25_to_40_s_and_changes_tempo():
    assert 25.0 <= MidiFileSource(DEMO).duration_s <= 40.0
    tempos = [m.tempo for track in mido.MidiFile(DEMO).tracks for m in track if m.type == "set_tempo"]
    assert len(set(tempos)) >= 2


def test_demo_pedals_down_then_up(demo_events):
    # MIDI 1.0: controller 64 (damper pedal), 0..63 off, 64..127 on.
    pedal = [(t, m.value) for t, m in demo_events if m.type == "control_change" and m.control == 64]
    down = [t for t, v in pedal if v >= 64]
    assert down and any(t > down[0] and v < 64 for t, v in pedal)


def test_demo_strikes_one_key_8_times_at_rising_velocity(demo_events):
    strikes: dict[tuple[int, int], list[int]] = {}
    for _, m in demo_events:
        if m.type == "note_on":
            strikes.setdefault((m.channel, m.note), []).append(m.velocity)

    def longest_rising_run(velocities):
        best = run = 1
        for a, b in zip(velocities, velocities[1:]):
            run = run + 1 if b > a else 1
            best = max(best, run)
        return best

    assert max(longest_rising_run(v) for v in strikes.values()) >= 8


def test_demo_ends_with_all_notes_off(demo_events):
    # MIDI 1.0: controller 123 is All Notes Off (channel mode message).
    last_t, last = demo_events[-1]
    assert (last.type, last.control) == ("control_change", 123)
    assert all(t <= last_t for t, _ in demo_events)


def test_demo_piano_track_uses_running_status():
    # SMF spec: with running status a track is shorter than the same events each written
    # with its status byte. Chunk lengths are read from the file's own chunk headers.
    data = DEMO.read_bytes()
    lengths, pos = [], 14  # after MThd (8-byte header + 6 bytes)
    while pos < len(data):
        kind, size = struct.unpack(">4sL", data[pos:pos + 8])
        assert kind == b"MTrk"
        lengths.append(size)
        pos += 8 + size
    tracks = mido.MidiFile(DEMO).tracks
    full = [sum(len(vlq(m.time)) + len(m.bytes()) for m in t) for t in tracks]
    assert any(actual < without for actual, without in zip(lengths, full))
