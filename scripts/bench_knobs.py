"""Benchmark: live knobs, from a knob move to the sound (target: under 50 ms for one key).

A renderer plays a sustained chord (a realistic callback load) from an emulated audio
thread that calls ``Renderer.process`` once a block period, as PortAudio would; knob
moves go in through ``LiveInput`` to the real worker process. Prints, measured in this
run:

* per key across the compass: knob -> table swapped in (the callback that swaps it) and
  -> the first block rendered with it, the worker's job time, and a plain in-process
  ``build_tables`` of the same key with the full settings and with the live ones (ratios);
* a chord of three keys and a range of 16 keys;
* the audio thread's lateness while the rebuilds run in the worker process, against the
  same rebuilds run in a thread of the audio process (why the worker is a process);
* what the live settings cost in accuracy: partial levels of the live tables against the
  full ones, over every MIDI velocity, for partials within 40 dB of a key's strongest.

Usage: python scripts/bench_knobs.py [--block 256]
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one BLAS thread, as voicer play runs

import argparse  # noqa: E402
import tempfile  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402

import mido  # noqa: E402
import numpy as np  # noqa: E402

from voicer.engine.bank import DEFAULT_SPLIT  # noqa: E402
from voicer.engine.instrument import Instrument  # noqa: E402
from voicer.engine.knob_state import KnobState  # noqa: E402
from voicer.engine.knobs import load_knobs  # noqa: E402
from voicer.engine.live import LiveInput  # noqa: E402
from voicer.engine.live_knobs import LiveKnobs  # noqa: E402
from voicer.engine.rebuild import LIVE_STEP_SCALE, build_key_tables, live_settings  # noqa: E402
from voicer.engine.renderer import Renderer  # noqa: E402
from voicer.engine.session import table_settings  # noqa: E402
from voicer.resources import find_preset  # noqa: E402
from voicer.tone.preset import load_preset  # noqa: E402
from voicer.tone.tables import build_tables  # noqa: E402
from voicer.tone.velocity import hammer_speed  # noqa: E402

FS = 48_000
KEYS = (21, 33, 45, 46, 60, 72, 84, 96, 108)
TARGET_S = 0.050


class AudioThread:
    """Calls ``renderer.process`` once a block period and records each call."""

    def __init__(self, renderer: Renderer, live: LiveInput, block: int) -> None:
        self.renderer, self.live, self.block = renderer, live, block
        self.period = block / FS
        self.calls: list[tuple[float, float, float, int]] = []  # start, end, deadline, swaps after
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        out = np.zeros((2, self.block), dtype=np.float32)
        deadline = time.perf_counter()
        while not self._stop.is_set():
            deadline += self.period
            start = time.perf_counter()
            self.renderer.process(out, self.live.drain(self.block))
            end = time.perf_counter()
            self.calls.append((start, end, deadline, self.renderer.stats.swaps))
            wait = deadline - time.perf_counter()
            if wait > 0:
                time.sleep(wait)
            elif wait < -0.1:
                deadline = time.perf_counter()  # far behind: start again rather than race

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join()

    def mark(self) -> int:
        """Calls recorded so far (those after are scanned by :meth:`swap_after`)."""
        return len(self.calls)

    def swap_after(self, mark: int, t0: float, swaps: int, timeout: float = 10.0) -> tuple[float, float]:
        """From ``t0``, the start and end of the first call after ``mark`` whose swap count reached ``swaps``."""
        limit = time.perf_counter() + timeout
        while time.perf_counter() < limit:
            for start, end, _, count in self.calls[mark:]:
                if count >= swaps:
                    return start - t0, end - t0
            time.sleep(0.001)
        raise RuntimeError(f"no swap seen within {timeout} s")

    def lateness(self, t0: float, t1: float) -> tuple[float, float, int, int]:
        """Of the calls started between t0 and t1: the worst lateness (end - deadline), the
        longest call, the calls longer than a period, and the number of calls."""
        calls = [c for c in self.calls if t0 <= c[0] <= t1]
        late = max((end - deadline for _, end, deadline, _ in calls), default=0.0)
        longest = max((end - start for start, end, _, _ in calls), default=0.0)
        over = sum(1 for start, end, _, _ in calls if end - start > self.period)
        return late, longest, over, len(calls)


def best_of(fn, n: int = 3) -> float:
    best = float("inf")
    for _ in range(n):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def accuracy(preset, full_settings) -> tuple[float, float]:
    """Level differences (dB) live against full tables: rms and max over keys, felt amounts,
    velocities 1..127 and partials within 40 dB of the strongest at that velocity."""
    speeds = hammer_speed(np.arange(1, 128), preset.instrument)
    live = live_settings(full_settings)
    errors = []
    for factor in (0.5, 1.0, 2.0):
        values = {k: {"felt_force_1mm_n": factor * preset.scale.value("felt_force_1mm_n", k)} for k in KEYS}
        full = build_key_tables(preset, values, model="physical", settings=full_settings)
        fast = build_key_tables(preset, values, model="physical", settings=live)
        for k in KEYS:
            a, b = np.abs(fast[k].at_speeds(speeds)), np.abs(full[k].at_speeds(speeds))
            audible = b > b.max(axis=1, keepdims=True) * 10 ** (-40 / 20)
            errors.append(np.abs(20 * np.log10(a / b))[audible])
    e = np.concatenate(errors)
    return float(np.sqrt(np.mean(e ** 2))), float(e.max())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--block", type=int, default=256)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="voicer-bench-") as scratch:
        os.environ["VOICER_CACHE_DIR"] = scratch  # not the user's cache
        run(args.block, scratch)


def run(block: int, scratch: str) -> None:
    preset = load_preset(find_preset("demo"))
    settings = table_settings(FS)
    felt = load_knobs().knobs[0]

    print(f"plain build_tables of one key, in-process, nothing else running (full: step scale 1, live: "
          f"{LIVE_STEP_SCALE}):")
    plain: dict[int, tuple[float, float]] = {}
    for k in KEYS:
        values = {k: {"felt_force_1mm_n": felt.amount(100) * preset.scale.value("felt_force_1mm_n", k)}}
        full = best_of(lambda: build_key_tables(preset, values, model="physical", settings=settings))
        fast = best_of(lambda: build_key_tables(preset, values, model="physical", settings=live_settings(settings)))
        plain[k] = (full, fast)
        print(f"  key {k:3d}: full {full * 1e3:5.1f} ms, live {fast * 1e3:5.1f} ms, live / full {fast / full:.2f}")

    tables = build_tables(preset, settings=settings)
    # No culling: the texture below keeps the callback's load steady through the whole run.
    renderer = Renderer([Instrument(tables, sample_rate=FS, max_block=block, split=DEFAULT_SPLIT)],
                        cull_dbfs=-300.0)
    knobs = LiveKnobs(load_knobs(), renderer, root=preset, settings=settings,
                      save_path=os.path.join(scratch, "plan.toml"))  # the plan it saves on closing
    live = LiveInput(FS, tap=knobs.tap)
    audio = AudioThread(renderer, live, block)
    t0 = time.perf_counter()
    knobs.start()
    knobs.rebuilder.wait_idle(60.0)
    print(f"worker process started and warmed up in {time.perf_counter() - t0:.2f} s")
    live.push(mido.Message("control_change", control=64, value=127))
    for k in range(24, 100):  # a sustained full-pedal texture: the callback has work to do
        live.push(mido.Message("note_on", note=k, velocity=100))
    audio.start()
    time.sleep(0.5)
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores (a shared machine: timings vary between runs)")
    print(f"audio: block {block} ({audio.period * 1e3:.2f} ms), {renderer.banks[0].count} partials sounding")

    print("knob move -> table swapped in / -> first block rendered with it (worker job), "
          f"target {TARGET_S * 1e3:.0f} ms:")
    value = 100
    run_start = time.perf_counter()
    swaps = renderer.stats.swaps
    worst = 0.0
    for k in KEYS:
        live.push(mido.Message("note_on", note=k, velocity=70))
        time.sleep(0.4)  # > CHORD_S: the key alone is the target
        value = 30 if value == 100 else 100
        swaps += 1
        mark, t0 = audio.mark(), time.perf_counter()
        live.push(mido.Message("control_change", control=felt.cc, value=value))
        swapped, rendered = audio.swap_after(mark, t0, swaps)
        worst = max(worst, rendered)
        job = knobs.rebuilder.last_job_s
        print(f"  key {k:3d}: {swapped * 1e3:5.1f} / {rendered * 1e3:5.1f} ms (job {job * 1e3:5.1f} ms); "
              f"knob -> block / plain full build {rendered / plain[k][0]:.2f}")
        time.sleep(0.2)
    for label, keys in (("chord 60,64,67", (60, 64, 67)), ("range 52-67", tuple(range(52, 68)))):
        t_chord = time.perf_counter()
        for k in keys:
            live.push(mido.Message("note_on", note=k, velocity=70))
        time.sleep(max(0.0, 0.05 - (time.perf_counter() - t_chord)))
        value = 30 if value == 100 else 100
        swaps += len(keys)
        mark, t0 = audio.mark(), time.perf_counter()
        live.push(mido.Message("control_change", control=felt.cc, value=value))
        swapped, rendered = audio.swap_after(mark, t0, swaps)
        print(f"  {label}: {swapped * 1e3:5.1f} / {rendered * 1e3:5.1f} ms (job {knobs.rebuilder.last_job_s * 1e3:5.1f} ms)")
        time.sleep(0.4)
    late, longest, over, calls = audio.lateness(run_start, time.perf_counter())
    print(f"worst one-key knob -> block: {worst * 1e3:.1f} ms (target {TARGET_S * 1e3:.0f} ms)")
    print(f"audio thread during the process rebuilds: longest call {longest * 1e3:.2f} ms, worst lateness "
          f"{late * 1e3:+.2f} ms, {over} of {calls} calls longer than a period")
    knobs.close()

    # The same rebuilds in a thread of the audio process, for comparison.
    state = KnobState(preset)
    t0 = time.perf_counter()
    worker = threading.Thread(target=lambda: [
        build_key_tables(preset, {k: state.values(k, {"felt": factor})}, model="physical",
                         settings=live_settings(settings)) for factor in (1.5, 0.7) for k in KEYS])
    worker.start()
    worker.join()
    late_t, longest_t, over_t, calls_t = audio.lateness(t0, time.perf_counter())
    audio.stop()
    print(f"audio thread during the same rebuilds in a thread: longest call {longest_t * 1e3:.2f} ms, worst lateness "
          f"{late_t * 1e3:+.2f} ms, {over_t} of {calls_t} calls longer than a period (longest call thread / process "
          f"{longest_t / longest:.1f})")

    rms, worst_db = accuracy(preset, settings)
    print(f"accuracy of the live tables against the full ones (felt x0.5, x1, x2; keys {', '.join(map(str, KEYS))}; "
          f"velocities 1-127; partials within 40 dB of the strongest): rms {rms:.3f} dB, max {worst_db:.3f} dB")


if __name__ == "__main__":
    main()
