"""Voicing plans: parameter changes over key ranges, applied to a preset.

A plan is a TOML file (kept in ``presets/voicings/``)::

    format = 1
    name = "mellower middle"
    description = "..."

    [[change]]
    keys = "52-67"               # a range, one key (60) or a list ([60, 62, 64])
    field = "felt_force_1mm_n"   # any per-key preset field
    factor = 0.85                # exactly one of: factor, add, value

Each change acts on the values the preset resolves for those keys (after anchors and
overrides) and becomes per-key overrides, so the voiced preset is validated like any
preset: an out-of-range result is an error naming the plan file, the change and the
key, not a clamp. Changes apply in order, so plans compose.

A plan previews a voicing; it does not undo one. Needling a real hammer cannot be
undone, whatever a preview shows.
"""

from __future__ import annotations

__all__ = ["Change", "VoicingPlan", "load_voicing", "parse_voicing", "apply_voicing", "parse_keys"]

import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from ..errors import PresetError
from ..physics.tuning import HIGHEST_KEY, LOWEST_KEY
from .params import KEY_PARAM_BY_NAME
from .preset import Preset, parse_preset

_OPS = ("factor", "add", "value")
_TOP = ("format", "name", "description", "change")
_CHANGE_FIELDS = ("keys", "field", *_OPS)


@dataclass(frozen=True)
class Change:
    """One change: ``field`` on ``keys`` by ``op`` (factor, add or value) ``amount``."""

    keys: tuple[int, ...]
    field: str
    op: str
    amount: float


@dataclass(frozen=True)
class VoicingPlan:
    """A validated plan."""

    name: str
    description: str
    changes: tuple[Change, ...]
    source: str | None = None


def parse_keys(spec: Any, *, source: str | None = None, where: str = "keys") -> tuple[int, ...]:
    """Keys from ``60``, ``"52-67"`` or ``[60, 62]``; each within the compass 21..108."""
    def one(k: Any) -> int:
        if isinstance(k, bool) or not isinstance(k, int) or not LOWEST_KEY <= k <= HIGHEST_KEY:
            raise PresetError(f"{where}: {k!r} is not a MIDI key in {LOWEST_KEY}..{HIGHEST_KEY}", file=source)
        return k

    if isinstance(spec, str):
        lo_text, sep, hi_text = spec.partition("-")
        try:
            lo, hi = int(lo_text), int(hi_text) if sep else int(lo_text)
        except ValueError:
            raise PresetError(f"{where}: {spec!r} is not a key range like \"52-67\"", file=source) from None
        if lo > hi:
            raise PresetError(f"{where}: range {spec!r} runs backwards", file=source)
        return tuple(range(one(lo), one(hi) + 1))
    if isinstance(spec, list):
        if not spec:
            raise PresetError(f"{where}: the list of keys is empty", file=source)
        return tuple(sorted({one(k) for k in spec}))
    return (one(spec),)


def parse_voicing(data: Mapping[str, Any], *, source: str | None = None) -> VoicingPlan:
    """Validate TOML data as a voicing plan (one clear error for the first problem)."""
    for name in data:
        if name not in _TOP:
            raise PresetError(f"unknown table or value '{name}'; allowed: {', '.join(_TOP)}", file=source)
    fmt = data.get("format", 1)
    if fmt != 1 or isinstance(fmt, bool):
        raise PresetError(f"format = {data['format']!r} is not supported; this voicer reads format = 1", file=source)
    changes = []
    raw = data.get("change", [])
    if not isinstance(raw, list):
        raise PresetError("[[change]] must be an array of tables", file=source)
    for i, change in enumerate(raw, start=1):
        where = f"change {i}"
        if not isinstance(change, dict):
            raise PresetError(f"{where} must be a table", file=source)
        for name in change:
            if name not in _CHANGE_FIELDS:
                raise PresetError(f"{where}: unknown entry '{name}'; allowed: {', '.join(_CHANGE_FIELDS)}",
                                  file=source)
        field = change.get("field")
        if field not in KEY_PARAM_BY_NAME or KEY_PARAM_BY_NAME[field].kind != "float":
            raise PresetError(f"{where}: field {field!r} is not a per-key number; per-key fields: "
                              f"{', '.join(p for p, q in KEY_PARAM_BY_NAME.items() if q.kind == 'float')}",
                              file=source)
        ops = [op for op in _OPS if op in change]
        if len(ops) != 1:
            raise PresetError(f"{where}: give exactly one of {', '.join(_OPS)} (got {', '.join(ops) or 'none'})",
                              file=source, field=field)
        amount = change[ops[0]]
        if isinstance(amount, bool) or not isinstance(amount, (int, float)):
            raise PresetError(f"{where}: {ops[0]} = {amount!r} is not a number", file=source, field=field)
        if ops[0] == "factor" and not amount > 0:
            raise PresetError(f"{where}: factor = {amount!r} must be > 0", file=source, field=field)
        if "keys" not in change:
            raise PresetError(f"{where}: 'keys' is missing (e.g. keys = \"52-67\")", file=source, field=field)
        keys = parse_keys(change["keys"], source=source, where=f"{where} keys")
        changes.append(Change(keys=keys, field=field, op=ops[0], amount=float(amount)))
    name, description = data.get("name", ""), data.get("description", "")
    if not isinstance(name, str) or not isinstance(description, str):
        raise PresetError("name and description must be text", file=source)
    return VoicingPlan(name=name, description=description, changes=tuple(changes), source=source)


def load_voicing(path: str | Path) -> VoicingPlan:
    """Read and validate a voicing plan file."""
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except OSError as exc:
        raise PresetError(f"cannot read the voicing plan: {exc.strerror or exc}", file=str(p)) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise PresetError(f"not a valid TOML file: {exc}", file=str(p)) from None
    return parse_voicing(data, source=str(p))


def apply_voicing(preset: Preset, plan: VoicingPlan) -> Preset:
    """The preset with the plan's changes applied in order (validated).

    Raises
    ------
    PresetError
        Naming the plan file, the change, the key and the field when a result is out
        of the field's range.
    """
    current = preset
    for i, change in enumerate(plan.changes, start=1):
        resolved = current.resolved[change.field]
        data = current.to_dict()
        overrides = data.setdefault("override", {})
        for key in change.keys:
            old = float(resolved[key - LOWEST_KEY])
            new = {"factor": old * change.amount, "add": old + change.amount, "value": change.amount}[change.op]
            overrides.setdefault(str(key), {})[change.field] = new
        try:
            current = parse_preset(data, source=preset.source)
        except PresetError as exc:
            raise PresetError(f"change {i} ({change.op} {change.amount:g}) gives {exc.reason}",
                              file=plan.source, key=exc.key, field=exc.field) from None
    return current
