"""Benchmark: `voicer scale` for the whole compass (target: under 1 s).

Prints, measured in this one run:
* the command's wall time (`python -m voicer scale demo`) against bare interpreter start-up
  with voicer imported (the floor any command pays), and their ratio;
* in process: load + validate + derive + format the demo's table, against the bare partial
  kernel (88 keys x 16 partials), and the clamped-end variant (exact roots for every
  partial) against the pinned one.

Usage: python scripts/bench_scale.py
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time

import numpy as np

from voicer.physics.strings import partial_ratios
from voicer.report.scale_table import format_scale_table, scale_report
from voicer.resources import find_preset
from voicer.tone.preset import load_preset, parse_preset


def best_of(fn, repeats: int = 7) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def wall(argv: list[str], repeats: int = 5) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        subprocess.run(argv, check=True, stdout=subprocess.DEVNULL)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    path = find_preset("demo")
    cli = wall([sys.executable, "-m", "voicer", "scale", "demo"])
    floor = wall([sys.executable, "-c", "import voicer.cli"])
    print(f"voicer scale demo (wall, median of 5): {cli * 1e3:7.1f} ms   target < 1000 ms")
    print(f"  interpreter + import voicer.cli:      {floor * 1e3:7.1f} ms   ratio {cli / floor:.2f}")

    table = best_of(lambda: format_scale_table(scale_report(load_preset(path))))
    b = load_preset(path).scale.b
    n = np.arange(1, 17)
    kernel = best_of(lambda: partial_ratios(b[:, None], n[None, :]), repeats=50)
    print(f"in process: load + derive + table:     {table * 1e3:7.2f} ms")
    print(f"  bare partial kernel (88 x 16):       {kernel * 1e3:7.3f} ms   ratio {table / kernel:.0f}")

    data = load_preset(path).to_dict()
    data["instrument"]["end_condition"] = "clamped"
    pinned = best_of(lambda: scale_report(parse_preset(data | {"instrument": data["instrument"] | {"end_condition": "pinned"}})))
    clamped = best_of(lambda: scale_report(parse_preset(data)))
    print(f"clamped ends (exact roots) vs pinned:  {clamped * 1e3:7.2f} ms vs {pinned * 1e3:.2f} ms   ratio {clamped / pinned:.2f}")


if __name__ == "__main__":
    main()
