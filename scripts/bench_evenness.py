"""Benchmark: evenness of the whole compass and a suggested plan, on one core.

Prints, measured in this run:
* ``measure`` of the demo (88 keys x pp/mf/ff) against the bare contact simulation of the
  same blows (``simulate_blows``): the share that is metrics, trends and flags (ratio);
* ``suggest`` on the demo scenario (the worn KH-190) against one ``measure`` (ratio):
  the candidates of each outlier key are simulated in one batch.

Usage: python scripts/bench_evenness.py
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core

import time  # noqa: E402

from voicer.report.evenness import DYNAMICS, measure  # noqa: E402
from voicer.report.suggest import suggest  # noqa: E402
from voicer.resources import find_preset, presets_dir  # noqa: E402
from voicer.tone.preset import load_preset  # noqa: E402
from voicer.tone.tables import simulate_blows  # noqa: E402
from voicer.tone.velocity import hammer_speed  # noqa: E402
from voicer.tone.voicing import apply_voicing, load_voicing  # noqa: E402


def best(fn, runs: int = 3) -> float:
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    demo = load_preset(find_preset("demo"))
    worn = apply_voicing(demo, load_voicing(presets_dir() / "voicings" / "kestrel-190-wear.toml"))
    speeds = hammer_speed(list(DYNAMICS.values()), demo.instrument)
    bare = best(lambda: simulate_blows(demo, range(21, 109), speeds, record=True))
    full = best(lambda: measure(demo))
    print(f"measure, 88 keys x 3 dynamics: {full:.3f} s; bare simulation {bare:.3f} s "
          f"(ratio {full / bare:.2f}: the rest is metrics, trends and flags)")
    ev = measure(worn)
    t = best(lambda: suggest(worn, evenness=ev), runs=2)
    keys = [k.key for k in suggest(worn, evenness=ev).keys]
    print(f"suggest on the worn demo ({len(keys)} outlier keys {keys}): {t:.3f} s "
          f"(ratio {t / full:.2f} of one measure)")


if __name__ == "__main__":
    main()
