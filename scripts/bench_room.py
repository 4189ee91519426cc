"""Benchmark: the room effect's cost (one core, 48 kHz).

Prints, measured in this one run, for IR lengths of 1, 2 and 3 s and blocks of 64, 128
and 256 samples:
* the room's cost as a fraction of one core (seconds of processing per second of audio),
  timed as ``RoomEffect.process`` on the renderer's mono blocks;
* the renderer's own cost for a full-pedal chord (Renderer.process, as the audio
  callback runs it, default culling) and the ratio room / renderer, all timed block by
  block in turn so that the shared machine's noise hits them alike.

The room runs with its default pre-delay (10 ms: longer than these blocks, so the wet
block is computed once per block and a call only copies it out) and, in the last
column, with none (the first partition is then transformed at every call: one more
FFT pair per block). Its cost grows with the IR length over the block (the partitions'
sum) and does not depend on the audio.

Usage: python scripts/bench_room.py
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core, as in the audio process (threadpoolctl there)

import time  # noqa: E402

import mido  # noqa: E402
import numpy as np  # noqa: E402

from voicer.engine.bank import DEFAULT_SPLIT  # noqa: E402
from voicer.engine.instrument import Instrument  # noqa: E402
from voicer.engine.renderer import Renderer  # noqa: E402
from voicer.engine.room import RoomEffect  # noqa: E402
from voicer.resources import find_preset  # noqa: E402
from voicer.tone.preset import load_preset  # noqa: E402
from voicer.tone.tables import build_tables  # noqa: E402

FS = 48_000
SECONDS = 2.0
REPEATS = 3
CHORD = (36, 48, 55, 60, 64, 67, 72, 76, 79, 84)  # a wide C major chord, pedal down


def chord_renderer(tables, block: int) -> Renderer:
    """A renderer sounding a full-pedal chord (sustain down, the keys struck and released)."""
    inst = Instrument(tables, sample_rate=FS, max_block=block, split=DEFAULT_SPLIT)
    renderer = Renderer([inst])
    out = np.zeros((2, block), dtype=np.float32)
    renderer.process(out, [(0, mido.Message("control_change", control=64, value=127))]
                     + [(0, mido.Message("note_on", note=k, velocity=90)) for k in CHORD])
    renderer.process(out, [(0, mido.Message("note_off", note=k)) for k in CHORD])
    return renderer


def time_pair(renderer: Renderer, room: RoomEffect, bare: RoomEffect,
              block: int) -> tuple[float, float, float, float]:
    """Seconds per block of the renderer, of the room and of the room without pre-delay
    (timed in turn on the renderer's own mono output), and the mean partial count."""
    out = np.zeros((2, block), dtype=np.float32)
    mono = np.zeros((1, block), dtype=np.float32)
    blocks = int(SECONDS * FS / block)
    t_render = t_room = t_bare = 0.0
    partials = 0
    for _ in range(blocks):
        t0 = time.perf_counter()
        renderer.process(out)
        t1 = time.perf_counter()
        mono[0] = out[0]
        t2 = time.perf_counter()
        room.process(mono)
        t3 = time.perf_counter()
        mono[0] = out[0]
        t4 = time.perf_counter()
        bare.process(mono)
        t5 = time.perf_counter()
        t_render += t1 - t0
        t_room += t3 - t2
        t_bare += t5 - t4
        partials += renderer.banks[renderer.audible].count
    return t_render / blocks, t_room / blocks, t_bare / blocks, partials / blocks


def main() -> None:
    tables = build_tables(load_preset(find_preset("demo")), keys=list(CHORD))
    print("room effect (defaults: pre-delay 10 ms, damping 4 kHz) against the renderer playing a full-pedal chord;")
    print("core = seconds of processing per second of audio on one core")
    print(f"{'IR s':>4} {'block':>5} {'partitions':>10} {'room core':>9} {'renderer core':>13} {'partials':>8} "
          f"{'room/renderer':>13} {'room core, no pre-delay':>23}")
    for length_s in (1.0, 2.0, 3.0):
        for block in (64, 128, 256):
            runs = []
            for _ in range(REPEATS):  # best of a few: the shared machine is noisy
                room = RoomEffect(rt60_s=length_s, length_s=length_s)
                bare = RoomEffect(rt60_s=length_s, length_s=length_s, predelay_ms=0.0)
                for effect in (room, bare):
                    effect.prepare(FS, block, 1)
                runs.append(time_pair(chord_renderer(tables, block), room, bare, block))
            t_render = min(r[0] for r in runs)
            t_room = min(r[1] for r in runs)
            t_bare = min(r[2] for r in runs)
            partials = np.mean([r[3] for r in runs])
            per_s = FS / block  # blocks per second of audio
            print(f"{length_s:4.0f} {block:5d} {room.partitions:10d} {t_room * per_s:9.3f} {t_render * per_s:13.3f} "
                  f"{partials:8.0f} {t_room / t_render:13.2f} {t_bare * per_s:23.3f}")


if __name__ == "__main__":
    main()
