"""The live knobs' state: which keys a knob acts on, and every key's amounts.

A knob move sets its amount on the *target* keys: the keys last played (the last key
struck and every key struck less than :data:`CHORD_S` before it, so a chord counts as
one gesture), or a fixed range (``voicer play --knob-keys 52-67``); the target button
switches between the two. Knob values are absolute, so a knob's position is the amount
the target keys get, whatever they had (the status line shows it).

The amounts become per-key values of the preset the knobs act on, exactly as a voicing
plan's ``[[change]]`` would compute them (``value * factor`` or ``value + add`` on the
value the preset resolves for the key), so a saved plan reproduces them bit for bit.
All methods are cheap and called from the MIDI thread; a lock guards the amounts
against the rebuild thread reading them.
"""

from __future__ import annotations

__all__ = ["CHORD_S", "KnobState", "keys_text", "parse_key_spec", "with_values"]

import threading
from typing import Iterable, Mapping

from ..errors import ParameterError, PresetError
from ..physics.tuning import HIGHEST_KEY, LOWEST_KEY
from ..tone.params import KEY_PARAM_BY_NAME
from ..tone.preset import Preset, parse_preset
from .knobs import KNOB_SPEC_BY_NAME, KNOB_SPECS, Knob

#: Keys struck within this time of the last one are one chord (common practice for a
#: played chord: its notes land within a few tens of milliseconds; 0.3 s allows a roll).
CHORD_S = 0.3
_RECENT = 32  # note-ons remembered for the last chord


def parse_key_spec(text: str, option: str = "--knob-keys") -> tuple[int, ...]:
    """Keys from a command-line list of ranges and keys, e.g. ``52-67`` or ``60,64,67``;
    ``option`` names the option in error messages."""
    keys: set[int] = set()
    for part in text.split(","):
        lo_text, sep, hi_text = part.strip().partition("-")
        try:
            lo = int(lo_text)
            hi = int(hi_text) if sep else lo
        except ValueError:
            raise ParameterError(f"{option} {text!r}: {part.strip()!r} is not a key or a range like 52-67") from None
        if not LOWEST_KEY <= lo <= hi <= HIGHEST_KEY:
            raise ParameterError(f"{option} {text!r}: {part.strip()!r} must be keys within "
                                 f"{LOWEST_KEY}..{HIGHEST_KEY}, low to high")
        keys.update(range(lo, hi + 1))
    return tuple(sorted(keys))


class KnobState:
    """Amounts per key and the target of the knobs.

    Parameters
    ----------
    base : Preset
        The preset the amounts act on (the state the knobs voice).
    key_range : sequence of int, optional
        The keys of the range target; with it the knobs start on the range.
    """

    def __init__(self, base: Preset, *, key_range: Iterable[int] | None = None) -> None:
        self.base = base
        self.key_range = tuple(sorted(set(key_range))) if key_range is not None else ()
        self.on_range = bool(self.key_range)
        self._amounts: dict[int, dict[str, float]] = {}  # only keys with a non-neutral amount
        self._recent: list[tuple[float, int]] = []
        self._lock = threading.Lock()
        self.version = 0  # bumped by every change of an amount

    # --- target --------------------------------------------------------------------

    def played(self, key: int, now: float) -> None:
        """A note-on of ``key`` at time ``now`` (seconds, any clock)."""
        self._recent.append((now, key))
        del self._recent[:-_RECENT]

    def toggle_target(self) -> bool:
        """Switch between the keys last played and the range; False if there is no range."""
        if not self.key_range:
            return False
        self.on_range = not self.on_range
        return True

    def targets(self) -> tuple[int, ...]:
        """The keys a knob move acts on now (empty before any key was played)."""
        if self.on_range:
            return self.key_range
        recent = list(self._recent)  # a copy: the MIDI thread may add to it meanwhile
        if not recent:
            return ()
        last = recent[-1][0]
        return tuple(sorted({k for t, k in recent if t >= last - CHORD_S}))

    # --- amounts -------------------------------------------------------------------

    def set(self, knob: Knob, amount: float, keys: Iterable[int]) -> tuple[int, ...]:
        """Give ``keys`` the knob's amount; returns the keys whose amount changed."""
        changed = []
        with self._lock:
            for key in keys:
                amounts = self._amounts.get(key, {})
                if amounts.get(knob.name, knob.spec.neutral) == amount:
                    continue
                if amount == knob.spec.neutral:
                    amounts.pop(knob.name, None)
                else:
                    amounts[knob.name] = amount
                if amounts:
                    self._amounts[key] = amounts
                else:
                    self._amounts.pop(key, None)
                changed.append(key)
            if changed:
                self.version += 1
        return tuple(changed)

    def amounts(self, key: int) -> dict[str, float]:
        """The key's non-neutral amounts by knob name (a copy)."""
        with self._lock:
            return dict(self._amounts.get(key, {}))

    def snapshot(self) -> tuple[int, dict[int, dict[str, float]]]:
        """The version and every key's non-neutral amounts, taken together."""
        with self._lock:
            return self.version, {k: dict(v) for k, v in self._amounts.items()}

    def values(self, key: int, amounts: Mapping[str, float] | None = None) -> dict[str, float]:
        """Per-key preset values for the key's amounts (or the ones given), as a plan's
        change computes them from the base preset's resolved value.

        Raises
        ------
        PresetError
            If a value leaves its field's range (naming the base preset, the key and the field).
        """
        amounts = self.amounts(key) if amounts is None else amounts
        i = self.base.scale.index(key)
        out = {}
        for name, amount in amounts.items():
            spec = KNOB_SPEC_BY_NAME[name]
            old = float(self.base.resolved[spec.field][i])
            new = old * amount if spec.op == "factor" else old + amount
            try:
                out[spec.field] = KEY_PARAM_BY_NAME[spec.field].check(new)
            except ParameterError as exc:
                raise PresetError(f"{name} {spec.format(amount)} gives {exc}", file=self.base.source, key=key,
                                  field=spec.field) from None
        return out

    def preset(self, amounts: Mapping[int, Mapping[str, float]] | None = None) -> Preset:
        """The base preset with every key's amounts (or those of a snapshot) applied (validated)."""
        amounts = self.snapshot()[1] if amounts is None else amounts
        return with_values(self.base, {k: self.values(k, a) for k, a in amounts.items()})

    def describe(self) -> str:
        """The target and its amounts in a few words, for the status line."""
        keys = self.targets()
        if not keys:
            return "play a key" + (" (or switch to the range)" if self.key_range else "")
        where = ("range " if self.on_range else "keys ") + keys_text(keys)
        parts = []
        for spec in KNOB_SPECS:
            got = sorted({self.amounts(k).get(spec.name, spec.neutral) for k in keys})
            if got != [spec.neutral]:
                text = spec.format(got[0]) if len(got) == 1 else f"{spec.format(got[0])}..{spec.format(got[-1])}"
                parts.append(f"{spec.name} {text}")
        return f"{where}: " + (", ".join(parts) if parts else "as the preset")


def with_values(base: Preset, values: Mapping[int, Mapping[str, float]]) -> Preset:
    """``base`` with per-key overrides for several keys at once (one validation)."""
    data = base.to_dict()
    overrides = data.setdefault("override", {})
    for key, fields in values.items():
        if fields:
            overrides[str(key)] = {**overrides.get(str(key), {}), **fields}
    return parse_preset(data, source=base.source)


def keys_text(keys: Iterable[int]) -> str:
    """Keys in a few characters: ``52-67``, ``60,64,67``, ``52-55,60``."""
    runs: list[list[int]] = []
    for k in sorted(keys):
        if runs and k == runs[-1][-1] + 1:
            runs[-1].append(k)
        else:
            runs.append([k])
    return ",".join(f"{r[0]}-{r[-1]}" if len(r) > 2 else ",".join(map(str, r)) for r in runs)
