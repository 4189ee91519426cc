"""Rebuilding keys' tables while playing, off the audio thread (the live knobs' worker).

Keys whose knob amounts changed are marked *dirty*; one coordinating thread takes every
dirty key at once, has their tables simulated in a worker process, turns them into
:class:`~voicer.engine.instrument.KeyData` and appends them to the renderer's
:attr:`~voicer.engine.renderer.Renderer.swaps`, which the audio callback swaps in at its
next block. A stream of knob moves is coalesced: while a rebuild runs, further moves only
mark their keys dirty again, and the next rebuild reads the amounts as they are then, so
the latest amount wins and a key is never rebuilt for a value already passed. A key whose
amounts are all neutral again gets its original data back, exactly.

Why a process. The contact simulation is a Python loop over time steps on small arrays,
so it holds the GIL nearly all the time: run in a thread beside a playing renderer
(4,000 partials, blocks of 256 samples), it stretched single callbacks to 12-24 ms and
made them late by 9-30 ms (`scripts/bench_knobs.py`, several runs), more than a 5.3 ms
block; with the same rebuilds in a worker process no callback was late. The worker is
spawned (not forked: the parent has PortAudio and MIDI threads) when playing starts and
warmed up with one build, so the first knob move costs no more than the others.

Live tables are simulated with time steps 1.5 times those of the full tables
(:data:`LIVE_STEP_SCALE`): one key then takes 25-50 ms from knob to block on this
project's shared 2-core machine (up to 60 ms for the slowest keys when it is busy; a plain
build of a key with the full steps takes 20-60 ms), for partial levels within
0.4 dB of the full tables (rms 0.01 dB; 2.0 times the steps would err by 2 dB in the top
treble and fewer modes above the band by 5 dB; fewer velocity layers save no time, as the
layers are simulated side by side).
"""

from __future__ import annotations

__all__ = ["LIVE_STEP_SCALE", "LIVE_MODELS", "live_settings", "build_key_tables", "KeyRebuilder"]

import multiprocessing
import signal
import threading
import time
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import replace
from typing import Any, Callable, Mapping

from numpy.typing import NDArray

from ..errors import VoicerError
from ..tone.preset import Preset, parse_preset
from ..tone.tables import KeyTable, TableSettings, build_tables
from ..tone.unison import heard
from .instrument import Instrument, KeyData
from .knob_state import KnobState, with_values
from .renderer import Renderer

#: Time steps of live rebuilds, as a multiple of the full tables' (StepSettings.scale).
LIVE_STEP_SCALE = 1.5
#: Models whose tables a knob can rebuild key by key.
LIVE_MODELS = ("physical", "additive")


def live_settings(settings: TableSettings) -> TableSettings:
    """The settings of live rebuilds: those of the full tables with coarser time steps."""
    return replace(settings, steps=replace(settings.steps, scale=settings.steps.scale * LIVE_STEP_SCALE))


def build_key_tables(base: Preset, values: Mapping[int, Mapping[str, float]], *, model: str,
                     settings: TableSettings, references: dict[int, KeyTable] | None = None) -> dict[int, KeyTable]:
    """Tables of the keys of ``values`` for ``base`` with those per-key values (no cache).

    With the additive model a key with measured partials is replayed from them, shaped by
    the physical model's change against the fitted reference (as
    :class:`~voicer.engine.additive.AdditiveModel` does); ``references`` keeps the
    reference tables from one call to the next (they do not change with the knobs).
    """
    from .additive import additive_table

    preset = with_values(base, values)
    keys = sorted(values)
    raw = build_tables(preset, settings=settings, keys=keys, use_cache=False).keys
    tables = {k: heard(t, preset) for k, t in raw.items()}
    if model == "additive":
        measured = [k for k in keys if k in preset.measured]
        refs = references if references is not None else {}
        missing = [k for k in measured if k not in refs]
        if missing:
            refs.update(build_tables(preset.fit_reference, settings=settings, keys=missing, use_cache=False).keys)
        for k in measured:
            tables[k] = additive_table(preset.measured[k], raw[k], refs[k], sample_rate_hz=settings.sample_rate_hz)
    return tables


# --- the worker process ------------------------------------------------------------------

_worker: dict[str, Any] = {}


def _init(data: dict[str, Any], source: str | None, model: str, settings: TableSettings) -> None:
    """In the worker: keep the base preset; Ctrl-C is the parent's to handle."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    from threadpoolctl import threadpool_limits

    _worker.update(base=parse_preset(data, source=source), model=model, settings=settings, refs={},
                   limits=threadpool_limits(limits=1))  # the parent's audio thread has the other core


def _build(values: dict[int, dict[str, float]]) -> dict[int, dict[str, NDArray[Any]] | str]:
    """In the worker: the keys' tables as arrays, or per key the reason it failed."""
    def run(part: dict[int, dict[str, float]]) -> dict[int, dict[str, NDArray[Any]]]:
        tables = build_key_tables(_worker["base"], part, model=_worker["model"], settings=_worker["settings"],
                                  references=_worker["refs"])
        return {k: t.to_arrays() for k, t in tables.items()}

    try:
        return dict(run(values))
    except VoicerError as exc:
        if len(values) == 1:
            return {k: str(exc) for k in values}
    out: dict[int, dict[str, NDArray[Any]] | str] = {}
    for key, fields in values.items():  # one bad key must not hold back the others
        out.update(_build({key: fields}))
    return out


# --- the coordinating thread ---------------------------------------------------------------

class KeyRebuilder:
    """Rebuilds the keys of one voicing state as their knob amounts change.

    Parameters
    ----------
    renderer : Renderer
        Where the rebuilt keys go (:attr:`Renderer.swaps`).
    state : int
        Index of the voicing state in ``renderer.states``.
    knobs : KnobState
        The amounts; its ``base`` must be that state's preset.
    model : str
        The state's model plugin, one of :data:`LIVE_MODELS`.
    settings : TableSettings
        Settings of the live tables (:func:`live_settings`).
    on_change : callable, optional
        Called (on the coordinating thread) after each rebuild, e.g. to refresh a display.
    """

    def __init__(self, renderer: Renderer, state: int, knobs: KnobState, *, model: str, settings: TableSettings,
                 on_change: Callable[[], None] | None = None) -> None:
        if model not in LIVE_MODELS:
            raise VoicerError(f"live knobs rebuild tables with the {' or '.join(LIVE_MODELS)} model, not "
                              f"'{model}'; play without them (--no-knobs)")
        self.renderer, self.state, self.knobs = renderer, state, knobs
        self.instrument: Instrument = renderer.states[state]
        self.original: dict[int, KeyData] = dict(self.instrument.keys)
        self.model, self.settings = model, settings
        self.on_change = on_change
        self.builds = 0  # worker jobs done
        self.last_job_s = 0.0  # wall time of the last job, submit to result
        self.errors: dict[int, str] = {}  # the last failure of each key still failing
        self.failure: str | None = None  # the worker itself stopped
        self._dirty: set[int] = set()
        self._busy = False
        self.warming = True  # until the worker's first build is done
        self._closing = False
        self._cond = threading.Condition()
        self._pool: ProcessPoolExecutor | None = None
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        """Spawn the worker process and the coordinating thread (returns at once; the
        worker warms up in the background)."""
        base = self.knobs.base
        self._pool = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn"),
                                         initializer=_init, initargs=(base.to_dict(), base.source, self.model,
                                                                      self.settings))
        self._thread = threading.Thread(target=self._run, name="voicer-knobs", daemon=True)
        with self._cond:
            self._busy = True  # until warmed up
        self._thread.start()

    def request(self, keys: tuple[int, ...] | list[int]) -> None:
        """From any thread: the amounts of ``keys`` changed."""
        if not keys:
            return
        with self._cond:
            self._dirty.update(keys)
            self._cond.notify_all()

    @property
    def busy(self) -> bool:
        """A rebuild is running or waiting."""
        with self._cond:
            return self._busy or bool(self._dirty)

    def wait_idle(self, timeout: float | None = None) -> bool:
        """Wait until every requested key is built and queued; False on timeout."""
        with self._cond:
            return self._cond.wait_for(lambda: not (self._busy or self._dirty) or self._closing
                                       or self.failure is not None, timeout)

    def close(self) -> None:
        """Stop the thread and the worker process (a rebuild in flight is dropped)."""
        with self._cond:
            self._closing = True
            self._cond.notify_all()
        if self._thread is not None:
            self._thread.join(timeout=10.0)
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)

    # --- internals ---------------------------------------------------------------

    def _run(self) -> None:
        assert self._pool is not None
        try:
            key = min(self.original)
            self._pool.submit(_build, {key: {}}).result()  # imports and first-call costs, off the clock
            self.warming = False
            while True:
                with self._cond:
                    self._busy = False
                    self._cond.notify_all()
                    self._cond.wait_for(lambda: self._dirty or self._closing)
                    if self._closing:
                        return
                    keys = sorted(self._dirty)
                    self._dirty.clear()
                    self._busy = True
                self._drop_retired()
                self._rebuild(keys)
                if self.on_change is not None:
                    self.on_change()
        except BrokenProcessPool as exc:
            self._fail(f"the table worker process stopped ({exc}); knob moves are no longer heard")
        except Exception as exc:  # noqa: BLE001 - a bug here must not end the performance silently
            self._fail(f"table rebuild failed: {type(exc).__name__}: {exc}; knob moves are no longer heard")

    def _fail(self, reason: str) -> None:
        with self._cond:
            self.failure = reason
            self._busy = False
            self._cond.notify_all()

    def _drop_retired(self) -> None:
        retired = self.renderer.retired
        while retired:
            retired.popleft()

    def _rebuild(self, keys: list[int]) -> None:
        _, amounts = self.knobs.snapshot()
        values: dict[int, dict[str, float]] = {}
        for key in keys:
            if not amounts.get(key):
                self.errors.pop(key, None)
                self.renderer.swaps.append((self.state, self.original[key]))
                continue
            try:
                values[key] = self.knobs.values(key, amounts[key])
            except VoicerError as exc:
                self.errors[key] = str(exc)
        if not values:
            return
        started = time.perf_counter()
        future: Future = self._pool.submit(_build, values)  # type: ignore[union-attr]
        results = future.result()
        self.last_job_s = time.perf_counter() - started
        self.builds += 1
        for key, result in sorted(results.items()):
            if isinstance(result, str):
                self.errors[key] = result
                continue
            table = KeyTable.from_arrays(result)
            like = self.original[key]
            if len(table.freq_hz) != len(like.freq_hz):
                self.errors[key] = (f"key {key}: the rebuilt table has {len(table.freq_hz)} partials, the playing "
                                    f"one {len(like.freq_hz)}; kept the playing one")
                continue
            self.errors.pop(key, None)
            self.renderer.swaps.append((self.state, self.instrument.key_data(table, like=like)))
