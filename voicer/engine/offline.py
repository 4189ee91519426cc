"""Rendering MIDI events offline, block by block, into a sink."""

from __future__ import annotations

__all__ = ["RenderResult", "schedule", "render_events", "STOP_FADE_S"]

import time
from dataclasses import dataclass
from typing import Iterable

import mido
import numpy as np
from tqdm import tqdm

from .host import Sink
from .renderer import Renderer, RenderStats

#: After the last event and the tail, everything is faded out over this long.
STOP_FADE_S = 0.05


@dataclass(frozen=True)
class RenderResult:
    """Figures of one offline render."""

    stats: RenderStats
    render_s: float
    frames: int


def schedule(events: Iterable[tuple[float, mido.Message]], sample_rate: float) -> list[tuple[int, mido.Message]]:
    """``(time_s, message)`` to ``(sample, message)``, rounded to the nearest sample."""
    return [(int(round(t * sample_rate)), m) for t, m in events]


def render_events(renderer: Renderer, events: Iterable[tuple[float, mido.Message]], sink: Sink, *,
                  tail_s: float = 3.0, channels: int = 2, progress: bool = False) -> RenderResult:
    """Render every event, then ``tail_s`` of ringing, then a short fade, into ``sink``.

    The sink must be open for writing (a non-real-time sink). ``render_s`` is the wall
    time of rendering alone: the renderer's calls, not the sink's writes (a slow disk) nor
    the progress bar.
    """
    sr = renderer.sample_rate
    timed = schedule(events, sr)
    last = timed[-1][0] if timed else 0
    total = last + int(round(tail_s * sr)) + 1
    fade = int(round(STOP_FADE_S * sr))
    block = renderer.block
    buf = np.zeros((channels, block), dtype=np.float32)
    i = 0
    pos = 0
    render_s = 0.0
    with tqdm(total=total + fade, unit="frame", unit_scale=True, desc="render", disable=not progress,
              leave=False) as bar:
        stopped = False
        while pos < total + fade:
            t0 = time.perf_counter()
            if pos >= total and not stopped:
                renderer.stop()
                stopped = True
            n = min(block, (total if not stopped else total + fade) - pos)
            block_events = []
            while i < len(timed) and timed[i][0] < pos + n:
                block_events.append((timed[i][0] - pos, timed[i][1]))
                i += 1
            out = buf[:, :n]
            renderer.process(out, block_events)
            render_s += time.perf_counter() - t0
            sink.write(out)
            pos += n
            bar.update(n)
    return RenderResult(stats=renderer.stats, render_s=render_s, frames=pos)
