"""Benchmark: modal tables of the demo instrument (targets: full table < 3 s on one core,
one key's 16 layers < 50 ms).

Prints, measured in this run:
* the full table (88 keys x 16 layers x every unison string), its cost per blow and per
  string row, and the share spent in the bare contact kernel against setting up the
  problems and reading out the tables (ratio);
* one key's 16 layers for keys across the compass (the cost of turning a voicing knob);
* a cache hit for the whole compass against recomputing it (ratio).

Usage: python scripts/bench_tables.py
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core, as the target says

import tempfile  # noqa: E402
import time  # noqa: E402

import voicer.physics.contact as contact  # noqa: E402
from voicer.resources import find_preset  # noqa: E402
from voicer.tone.preset import load_preset  # noqa: E402
from voicer.tone.tables import TableSettings, build_tables  # noqa: E402


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def main() -> None:
    preset = load_preset(find_preset("demo"))
    settings = TableSettings()
    strings = int(sum(preset.scale.values["strings"]))
    blows, rows = 88 * settings.layers, strings * settings.layers

    kernel_time = 0.0
    original = contact.simulate_contacts

    def counting(*args, **kwargs):
        nonlocal kernel_time
        result, dt = timed(lambda: original(*args, **kwargs))
        kernel_time += dt
        return result

    import voicer.tone.tables as tables_module

    tables_module.simulate_contacts = counting
    build_tables(preset, keys=[60], use_cache=False)  # warm-up (imports, caches)
    kernel_time = 0.0
    best, best_kernel = float("inf"), 0.0
    for _ in range(3):
        kernel_time = 0.0
        _, full = timed(lambda: build_tables(preset, use_cache=False))
        if full < best:
            best, best_kernel = full, kernel_time
    tables_module.simulate_contacts = original
    print(f"full table: 88 keys x {settings.layers} layers = {blows} blows, {rows} string rows")
    print(f"  {best:.3f} s   target < 3 s   ({best / blows * 1e3:.3f} ms per blow, {best / rows * 1e3:.3f} ms per row)")
    print(f"  bare contact kernel {best_kernel:.3f} s; setup and readout {best - best_kernel:.3f} s; "
          f"whole / kernel = {best / best_kernel:.2f}")

    print(f"one key, {settings.layers} layers (target < 50 ms):")
    for key in (21, 33, 45, 46, 60, 72, 84, 96, 108):
        t = min(timed(lambda k=key: build_tables(preset, keys=[k], use_cache=False))[1] for _ in range(3))
        print(f"  key {key:3d}: {t * 1e3:6.1f} ms")

    with tempfile.TemporaryDirectory() as folder:
        os.environ["VOICER_CACHE_DIR"] = folder
        _, cold = timed(lambda: build_tables(preset))
        _, warm = timed(lambda: build_tables(preset))
    print(f"cache: compute and store {cold:.3f} s, read back {warm:.3f} s, ratio {cold / warm:.1f}")


if __name__ == "__main__":
    main()
