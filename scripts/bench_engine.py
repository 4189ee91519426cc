"""Benchmark: the live engine against its kernel (one core, 48 kHz).

Prints, measured in this one run, for blocks of 64, 128 and 256 samples:
* partial-samples per second of the full renderer (voices, pedal changes, note-ons,
  the safety stage: Renderer.process as the audio callback runs it) with a full-pedal
  texture of many voices;
* the same for the bare kernel (OscillatorBank.render on the same partials) and for a
  plain numpy float32 matrix product of the kernel's shape, and the ratios;
* how many partials fit in half of one core at 48 kHz (from the renderer's figure);
and the note-on latency inside the renderer and through the live input.

Targets: renderer >= 70 % of the bare kernel; >= 40,000 partials in half a core at
128-sample blocks; >= 5 G partial-samples/s at 256; note-on to first sound within a block.

Usage: python scripts/bench_engine.py
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core, as in the audio process (threadpoolctl there)

import time  # noqa: E402

import mido  # noqa: E402
import numpy as np  # noqa: E402

from voicer.engine.bank import DEFAULT_SPLIT, OscillatorBank  # noqa: E402
from voicer.engine.instrument import Instrument  # noqa: E402
from voicer.engine.live import LiveInput  # noqa: E402
from voicer.engine.renderer import Renderer  # noqa: E402
from voicer.resources import find_preset  # noqa: E402
from voicer.tone.preset import load_preset  # noqa: E402
from voicer.tone.tables import build_tables  # noqa: E402

FS = 48_000
SECONDS = 2.0
# Dense enough for the target's scale (40,000 partials): every partial kept, the compass
# struck 7 times under the pedal (7 x 6263 partials of the demo instrument).
STRIKES, VOICES, CAPACITY = 7, 7 * 88 + 8, 46_000
REPEATS = 3


def texture(renderer: Renderer, block: int, strikes: int) -> None:
    """A full-pedal passage: sustain down, every key struck ``strikes`` times at rising
    velocity (re-strikes add to the vibrating strings), each released again while the
    pedal holds the strings."""
    out = np.zeros((2, block), dtype=np.float32)
    renderer.process(out, [(0, mido.Message("control_change", control=64, value=127))])
    keys = [k for _ in range(strikes) for k in range(21, 109)]
    for key in keys:
        renderer.process(out, [(0, mido.Message("note_on", note=key, velocity=100)),
                               (block // 2, mido.Message("note_off", note=key))])


def time_renderer(renderer: Renderer, block: int) -> tuple[float, float]:
    """Seconds per block and mean partials, with a pedal change and a note (struck and
    released under the pedal) every 8 blocks."""
    out = np.zeros((2, block), dtype=np.float32)
    blocks = int(SECONDS * FS / block)
    partials = 0
    t0 = time.perf_counter()
    for i in range(blocks):
        events = []
        if i % 8 == 0:
            events = [(block // 3, mido.Message("control_change", control=64, value=100 + i % 27)),
                      (block // 2, mido.Message("note_on", note=60 + i % 12, velocity=70)),
                      (block - 1, mido.Message("note_off", note=60 + i % 12))]
        renderer.process(out, events)
        partials += renderer.banks[renderer.audible].count
    return (time.perf_counter() - t0) / blocks, partials / blocks


def time_kernel(count: int, block: int) -> float:
    rng = np.random.default_rng(1)
    lam = (-rng.uniform(0.1, 5, count) + 2j * np.pi * rng.uniform(30, 15000, count)) / FS
    bank = OscillatorBank(count, max_block=block)
    bank.add(lam, rng.normal(size=count) + 0j, owner=0)
    out = np.zeros(block)
    blocks = int(SECONDS * FS / block)
    t0 = time.perf_counter()
    for _ in range(blocks):
        bank.render(out, block)
    return (time.perf_counter() - t0) / blocks


def time_matmul(count: int, block: int) -> float:
    rows = block // DEFAULT_SPLIT
    a = np.ones((rows, 2 * count), dtype=np.float32)
    b = np.ones((2 * count, DEFAULT_SPLIT), dtype=np.float32)
    c = np.zeros((rows, DEFAULT_SPLIT), dtype=np.float32)
    n = int(SECONDS * FS / block)
    t0 = time.perf_counter()
    for _ in range(n):
        np.matmul(a, b, out=c)
    return (time.perf_counter() - t0) / n


def main() -> None:
    preset = load_preset(find_preset("demo"))
    tables = build_tables(preset)
    print(f"{'block':>5} {'partials':>8} {'renderer G/s':>12} {'kernel G/s':>10} {'matmul G/s':>10} "
          f"{'rend/kern':>9} {'kern/matmul':>11} {'partials in half a core':>24}")
    for block in (64, 128, 256):
        inst = Instrument(tables, sample_rate=FS, max_block=block, split=DEFAULT_SPLIT)
        runs = []
        for _ in range(REPEATS):  # best of a few: the shared machine is noisy
            # Keep every partial (no culling) so that the texture is dense, as with
            # coupled unisons and sympathetic strings to come.
            renderer = Renderer([inst], cull_dbfs=-400.0, max_voices=VOICES, capacity=CAPACITY)
            texture(renderer, block, STRIKES)
            runs.append(time_renderer(renderer, block))
        per_block, partials = min(runs)
        k = int(partials)
        kern = min(time_kernel(k, block) for _ in range(REPEATS))
        mm = min(time_matmul(k, block) for _ in range(REPEATS))
        rate = partials * block / per_block
        half_core = 0.5 * rate / FS
        print(f"{block:5d} {k:8d} {rate / 1e9:12.2f} {k * block / kern / 1e9:10.2f} {k * block / mm / 1e9:10.2f} "
              f"{kern / per_block:9.2f} {mm / kern:11.2f} {half_core:24.0f}")

    inst = Instrument(tables, sample_rate=FS, max_block=256, split=DEFAULT_SPLIT)
    renderer = Renderer([inst])
    out = np.zeros((2, 256), dtype=np.float32)
    renderer.process(out, [(100, mido.Message("note_on", note=60, velocity=80))])
    first = int(np.flatnonzero(out[0])[0])
    live = LiveInput(FS)
    live.drain(256)
    live.push(mido.Message("note_on", note=64, velocity=80))
    offset = live.drain(256)[0][0]
    print(f"note-on to first sound: inside the renderer {first - 100} samples (event at sample 100 sounds at "
          f"sample {first}); live input: the next block, at offset {offset} (one block of latency)")


if __name__ == "__main__":
    main()
