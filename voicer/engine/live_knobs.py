"""The live knobs of ``voicer play``: controllers in, rebuilt keys and saved plans out.

:class:`LiveKnobs` is the tap of the :class:`~voicer.engine.live.LiveInput`: on the MIDI
(or keyboard) thread it notes which keys are played, turns a knob's controller value
into an amount for the target keys (:mod:`voicer.engine.knob_state`), asks the
:class:`~voicer.engine.rebuild.KeyRebuilder` for their tables, and takes the knobs'
controllers and commands out of the stream, so the audio thread never sees them. A press
of the save button (or the ``save`` command, the computer keyboard's ``v``) writes the
amounts as a voicing plan on a thread of its own (:mod:`voicer.engine.knob_plan`); on
stopping, amounts not saved yet are written too, so that nothing is lost.

The knobs act on the last voicing state: B when playing with a plan (A stays the
preset, for comparison), else the one state there is.
"""

from __future__ import annotations

__all__ = ["STATUS_S", "LiveKnobs"]

import threading
import time
from pathlib import Path
from typing import Callable, Iterable

import mido

from ..errors import VoicerError
from ..tone.preset import Preset
from ..tone.tables import TableSettings
from ..tone.voicing import VoicingPlan
from .knob_plan import default_plan_path, save_plan
from .knob_state import KnobState
from .knobs import KnobMap
from .live import SAVE, TARGET
from .rebuild import KeyRebuilder, live_settings
from .renderer import Renderer

#: How long the status line shows the knobs after a move, a switch or a save.
STATUS_S = 4.0


class LiveKnobs:
    """Knobs, target and saving for one renderer.

    Parameters
    ----------
    mapping : KnobMap
        Controllers of the knobs and buttons.
    renderer : Renderer
        The knobs act on its last state.
    root : Preset
        The preset as loaded (a saved plan applies to it).
    base_plan : VoicingPlan, optional
        The plan of state B, if playing with one.
    key_range : iterable of int, optional
        Keys of the range target (``--knob-keys``); the knobs start on it.
    model : str
        The states' model plugin.
    settings : TableSettings
        Settings of the states' full tables (live rebuilds use :func:`live_settings`).
    save_path : path, optional
        Where plans are saved (replaced, with a ``.bak``); default a new time-stamped
        file in the current folder for each save.
    clock : callable
        Seconds, monotonic.
    """

    def __init__(self, mapping: KnobMap, renderer: Renderer, *, root: Preset, base_plan: VoicingPlan | None = None,
                 key_range: Iterable[int] | None = None, model: str = "physical", settings: TableSettings,
                 save_path: str | Path | None = None, clock: Callable[[], float] = time.perf_counter) -> None:
        self.mapping = mapping
        self.root, self.base_plan = root, base_plan
        index = len(renderer.states) - 1
        self.state_name = renderer.states[index].name
        self.knobs = KnobState(renderer.states[index].preset, key_range=key_range)
        self.rebuilder = KeyRebuilder(renderer, index, self.knobs, model=model, settings=live_settings(settings))
        self.save_path = Path(save_path) if save_path is not None else None
        self.saved: list[Path] = []
        self._clock = clock
        self._saved_version = 0
        self._pressed: dict[int, bool] = {}
        self._shown = -float("inf")  # when the knobs last did something worth showing
        self._note: str | None = None  # a message for the status line (saved, no range...)
        self._save_lock = threading.Lock()
        self._savers: list[threading.Thread] = []

    def start(self) -> None:
        """Start the rebuild worker (in the background)."""
        self.rebuilder.start()

    # --- the tap (MIDI or keyboard thread) -------------------------------------------

    def tap(self, message: mido.Message | str) -> bool:
        """Take the knobs' messages and commands out of the stream; note played keys."""
        if isinstance(message, str):
            if message == SAVE:
                self.save_soon()
            elif message == TARGET:
                self._toggle_target()
            else:
                return False
            return True
        if message.type == "note_on":
            self.knobs.played(message.note, self._clock())
            return False
        if message.type != "control_change":
            return False
        cc, value = message.control, message.value
        knob = self.mapping.knob_for(cc)
        if knob is not None:
            changed = self.knobs.set(knob, knob.amount(value), self.knobs.targets())
            self.rebuilder.request(changed)
            self._show()
            return True
        if cc in (self.mapping.save_cc, self.mapping.target_cc):
            pressed = value >= 64  # a button: act on the press, not the release
            if pressed and not self._pressed.get(cc, False):
                if cc == self.mapping.save_cc:
                    self.save_soon()
                else:
                    self._toggle_target()
            self._pressed[cc] = pressed
            return True
        return False

    def _toggle_target(self) -> None:
        if not self.knobs.toggle_target():
            self._show("no range to switch to: give one with --knob-keys")
        else:
            self._show()

    def _show(self, note: str | None = None) -> None:
        self._note = note
        self._shown = self._clock()

    # --- saving ----------------------------------------------------------------------

    def save_soon(self) -> None:
        """Save on a thread of its own (file I/O stays off the MIDI thread)."""
        thread = threading.Thread(target=self._save_reporting, name="voicer-save", daemon=True)
        self._savers.append(thread)
        thread.start()

    def _save_reporting(self) -> None:
        try:
            path = self.save()
            self._show(f"saved {path}")
        except VoicerError as exc:
            self._show(f"not saved: {exc}")

    def save(self) -> Path:
        """Write the amounts as a voicing plan now; returns the file."""
        with self._save_lock:
            version, amounts = self.knobs.snapshot()  # what is written is what counts as saved
            path = self.save_path or default_plan_path()
            written = save_plan(path, self.knobs, root=self.root, base_plan=self.base_plan, amounts=amounts)
            self._saved_version = version
            self.saved.append(written)
            return written

    @property
    def unsaved(self) -> bool:
        """Amounts changed since the last save."""
        return self.knobs.version != self._saved_version

    # --- display and end ------------------------------------------------------------------

    def status(self) -> str:
        """The knobs' part of the status line ('' when there is nothing to show)."""
        rebuilder = self.rebuilder
        if rebuilder.failure is not None:
            return f"  | {rebuilder.failure}"
        busy = rebuilder.busy and not rebuilder.warming
        recent = self._clock() - self._shown < STATUS_S
        if not (recent or busy):
            return ""
        text = self._note if (self._note and recent) else f"knobs ({self.state_name}) {self.knobs.describe()}"
        errors = dict(rebuilder.errors)
        if errors:
            key = max(errors)
            text += f"; {errors[key]}"
        return f"  | {text}" + ("  (rebuilding)" if busy else "  (starting)" if rebuilder.warming else "")

    def close(self) -> list[str]:
        """Stop the worker, finish saves, save amounts not yet saved; returns lines to print."""
        self.rebuilder.close()
        for thread in self._savers:
            thread.join(timeout=30.0)
        lines = [f"knobs: saved {p}" for p in self.saved]
        if self.unsaved and (self.saved or self.knobs.snapshot()[1]):  # a plan of no changes is no news
            try:
                path = self.save()
                lines.append(f"knobs: amounts not saved yet, written to {path}")
            except VoicerError as exc:
                lines.append(f"knobs: the amounts could not be saved: {exc}")
        return lines
