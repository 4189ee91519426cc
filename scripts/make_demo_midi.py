"""Compose the demo passage, presets/midi/demo-passage.mid: about half a minute that puts a
piano through its paces (an original piece written for voicer).

Usage: python scripts/make_demo_midi.py

Sections, in D major:
  1. a two-octave scale, D3 to D5 and back, swelling and fading     (100 bpm)
  2. a six-chord progression with a moving top voice                (100 bpm)
  3. a rolled chord over five octaves held by the sustain pedal     (66 bpm)
  4. A4 struck 8 times, velocity rising from 20 to 120              (120 bpm)
  5. a soft chord, then a loud one, then all notes off (CC 123)     (120 bpm)

Track 0 holds the tempo map; track 1 the piano on channel 1. Releases are note-ons with
velocity 0, so the piano track is one long run of 0x90 events: mido writes them with
running status (one status byte for the run), as players of MIDI files must read.
"""

from __future__ import annotations

import io
from pathlib import Path

import mido

from voicer.io.atomic import atomic_write_bytes

OUT = Path(__file__).resolve().parent.parent / "presets" / "midi" / "demo-passage.mid"
TPB = 480  # ticks per quarter note
CHANNEL = 0
SUSTAIN, ALL_NOTES_OFF = 64, 123  # controller numbers, MIDI 1.0

SCALE_STEPS = [2, 2, 1, 2, 2, 2, 1]  # major scale, semitones
D3 = 50
PROGRESSION = [  # (bass, upper voices), two beats each; the last splits A7sus4 -> A7
    (38, [57, 62, 66]),      # D
    (37, [57, 61, 69]),      # F#m / C#
    (35, [54, 62, 71]),      # Bm
    (31, [55, 57, 62, 67]),  # G add 9
    (40, [55, 59, 62, 67]),  # Em7
]
A7SUS4, A7 = (33, [55, 62, 64, 69]), (33, [55, 61, 64, 69])
ROLLED = [26, 38, 45, 54, 57, 62, 66, 69, 74, 78]   # D major, D1 to F#5
REPEATED_KEY = 69                                    # A4
SOFT = [43, 59, 62, 67, 71]                          # G major, low and close
LOUD = [26, 38, 57, 62, 66, 69, 74, 78, 86]          # D major, D1 to D6


class Piece:
    """Events at absolute ticks, written out as delta-timed tracks."""

    def __init__(self) -> None:
        self.piano: list[tuple[int, int, mido.Message]] = []
        self.tempo: list[tuple[int, int, mido.MetaMessage]] = []

    def note(self, tick: int, key: int, velocity: int, length: int) -> None:
        self.piano.append((tick, 1, mido.Message("note_on", channel=CHANNEL, note=key, velocity=velocity)))
        # Release as note-on velocity 0; sorted before a new strike at the same tick.
        self.piano.append((tick + length, 0, mido.Message("note_on", channel=CHANNEL, note=key, velocity=0)))

    def chord(self, tick: int, keys: list[int], velocity: int, length: int) -> None:
        for key in keys:
            self.note(tick, key, velocity, length)

    def control(self, tick: int, control: int, value: int) -> None:
        self.piano.append((tick, 1, mido.Message("control_change", channel=CHANNEL, control=control, value=value)))

    def set_bpm(self, tick: int, bpm: float) -> None:
        self.tempo.append((tick, 0, mido.MetaMessage("set_tempo", tempo=mido.bpm2tempo(bpm))))

    def midi_file(self) -> mido.MidiFile:
        conductor = mido.MidiTrack([mido.MetaMessage("track_name", name="tempo"),
                                    mido.MetaMessage("time_signature", numerator=4, denominator=4)])
        piano = mido.MidiTrack([mido.MetaMessage("track_name", name="piano")])
        for track, events in ((conductor, self.tempo), (piano, self.piano)):
            now = 0
            for tick, _, message in sorted(events, key=lambda e: (e[0], e[1])):  # stable: insertion order on ties
                track.append(message.copy(time=tick - now))
                now = tick
        return mido.MidiFile(type=1, ticks_per_beat=TPB, tracks=[conductor, piano])


def compose() -> mido.MidiFile:
    """The demo passage."""
    p = Piece()
    beat, eighth = TPB, TPB // 2
    t = 0

    # 1. Scale: 15 notes up, 14 down, in eighths, slightly detached.
    p.set_bpm(t, 100)
    up = [D3]
    for step in SCALE_STEPS * 2:
        up.append(up[-1] + step)
    for i, key in enumerate(up):
        p.note(t, key, round(50 + 35 * i / 14), eighth - 20)
        t += eighth
    for i, key in enumerate(reversed(up[:-1])):
        p.note(t, key, round(85 - 40 * (i + 1) / 14), eighth - 20)
        t += eighth
    t += 3 * eighth  # to the bar line

    # 2. Progression: top voice a little louder than the inner ones.
    for bass, upper in PROGRESSION:
        p.note(t, bass, 70, 2 * beat - 30)
        p.chord(t, upper[:-1], 58, 2 * beat - 30)
        p.note(t, upper[-1], 76, 2 * beat - 30)
        t += 2 * beat
    for bass, upper in (A7SUS4, A7):
        p.chord(t, [bass, *upper], 66, beat - 30)
        t += beat

    # 3. Pedal down, roll the chord upward, let go of the keys; the pedal holds it.
    p.set_bpm(t, 66)
    p.control(t, SUSTAIN, 127)
    for i, key in enumerate(ROLLED):
        p.note(t + 10 + 40 * i, key, 72 + 2 * i, 3 * beat // 2)
    p.control(t + 11 * beat // 2, SUSTAIN, 0)
    t += 6 * beat

    # 4. One key, eight strikes, velocity 20 -> 120 in equal steps.
    p.set_bpm(t, 120)
    for i in range(8):
        p.note(t, REPEATED_KEY, round(20 + 100 * i / 7), 3 * beat // 4)
        t += beat
    t += beat

    # 5. Soft, then loud; then all notes off on the piano's channel.
    p.chord(t, SOFT, 28, 4 * beat - 40)
    t += 5 * beat
    p.chord(t, LOUD, 118, 5 * beat)
    t += 6 * beat
    p.control(t, ALL_NOTES_OFF, 0)
    return p.midi_file()


def main() -> None:
    midi_file = compose()
    buffer = io.BytesIO()
    midi_file.save(file=buffer)
    atomic_write_bytes(OUT, buffer.getvalue(), backup=False)
    print(f"{OUT}: {midi_file.length:.2f} s, {sum(len(t) for t in midi_file.tracks)} events, {len(buffer.getvalue())} bytes")


if __name__ == "__main__":
    main()
