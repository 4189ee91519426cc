"""Voicing plans: trade operations and parameter changes over keys, applied to a preset.

A plan is a TOML file (kept in ``presets/voicings/``). Format 1 holds ``[[change]]``
tables, parameter changes on any per-key field; format 2 adds ``[[operation]]`` tables,
the voicing job in trade terms. A format-2 plan may hold both, applied in file order::

    format = 2
    name = "recital room, spring service"
    description = "..."

    [[operation]]
    op = "needle"                # needle, harden, file, strike_point, mating, tune_unison
    keys = "53-61"               # a range, one key (60) or a list ([60, 62, 64])
    amount_percent = 15
    where = "shoulders"          # crown, shoulders or throughout

    [[change]]
    keys = "52-67"
    field = "felt_force_1mm_n"   # any per-key preset field
    factor = 0.85                # exactly one of: factor, add, value

Operations (the table is :data:`OPERATIONS`; the README's copy is
:func:`operations_markdown`). Every amount has a unit and a safe range per operation
(common practice, from memory: a job is done in small steps and re-tested); an amount
outside it is an error, not a clamp:

- ``needle`` / ``harden``: ``amount_percent`` 0 < x <= 30 % (how much less / more the
  felt pushes at the compression ``where`` names), ``where`` crown, shoulders or
  throughout. Needling more than about a third in one go cannot be taken back, and
  hardener goes on in dilute doses, left to dry between them.
- ``file``: ``mass_g`` 0 <= x <= 1 g of felt removed (filing takes off a few tenths of a
  gram at a time; a hammer has only a gram or two to give over its life) and ``width_mm``
  -3 <= x <= 0 mm change of the contact width (filing reshapes a flattened, grooved
  crown, narrowing the contact); at least one of them.
- ``strike_point``: ``move_mm`` 0 < x <= 5 mm, ``toward`` near_end (the front
  termination: the capo or agraffe) or bridge. A strike line is regulated by millimetres.
- ``mating``: ``string`` 1..3 (1 on the bass side), ``move_mm`` -1 <= x <= 1 mm: how much
  nearer the hammer that string then sits. Mating errors are fractions of a millimetre.
- ``tune_unison``: ``string`` 1..3, ``move_cents`` -5 <= x <= 5 cents: how much sharper
  that string then sounds against the key's pitch. A unison is cleaned up by a cent or
  two, where its strings drift apart between tunings (and where a slight mistuning is
  left on purpose for a longer aftersound, common practice).

What each maps to, on each listed key (values as the preset resolves them):

- ``needle`` / ``harden`` change the felt law F = F1 (c / 1 mm)^p
  (``felt_force_1mm_n``, ``felt_exponent``) at two compressions: c_s, the peak felt
  compression of a pp blow (the crown's part of the felt), and c_l, that of an ff blow
  (the shoulders'). The forces there are scaled by (g_s, g_l) and the law is the straight
  line through the two new points in log F against log c:
  ``p' = p + ln(g_l / g_s) / ln(c_l / c_s)`` and ``F1' = g_s F1 (c_s / 1 mm)^(p - p')``.
  With ``g = 1 - amount`` for needling and ``1 + amount`` for hardening, (g_s, g_l) is
  (g, g^s_c) at the crown, (g^s_s, g) at the shoulders and (g, g) throughout (F1 times g,
  p unchanged), with the spills of :data:`SPILL`, s_c = 1/2 and s_s = 1/5: the crown's
  felt takes the start of every loud blow, while a soft blow never reaches the
  shoulders' compression and only rests on them, so less of a shoulder change reaches
  pp. Both were set on the demo against the trade's rule (common practice) that needling
  darkens and quietens every dynamic, the one it aims at most: with s_c = 1/4 needling at
  the crown raised the ff brightness by 1-2 % in the bass and middle (the steeper law
  sharpens the ff pulse); with 1/2 every dynamic darkens, pp most. With s_s = 1/2,
  needling 20 % at the shoulders made E5 as much quieter at pp as at ff (-0.68 phon at
  both: the line through the two points turns at c_s too); with 1/4, hardening there
  made it louder by +0.51 phon at pp, +0.50 at ff; with 1/5, +0.49 and +0.51 (C4: +0.29
  and +0.42); with 1/8 needling at the shoulders no longer darkened E5 at pp. A
  power law has two parameters and cannot change the felt at one depth alone: around
  D5-E5, where a pp blow gives nearly one partial, the shoulder operations move pp and
  ff loudness within 0.02 phon of each other (their brightness still mostly at ff).
  c_s and c_l (:data:`COMPRESSION_ANCHORS_MM`, log-linear in the key between the
  anchors) were measured on the demo instrument: the largest
  total felt force of blows at 1 and 5 m/s (``simulate_blows``), as compression
  ``(F / F1)^(1/p)``: 0.78 and 1.98 mm at A0, 0.64 / 1.55 mm at E1 and 0.70 / 1.73 mm at
  F1 (where pairs of strings begin: a pair yields less to the hammer than one string),
  0.62 / 1.5 mm at A1, 0.40 / 0.87 mm at A2, 0.39 / 0.84 mm at A#2 and 0.36 / 0.79 mm at
  D#3 (the long first plain strings), 0.36 / 0.76 mm at C4, 0.38 / 0.73 mm at C6,
  0.40 / 0.84 mm at C8 (within 2.5 % of the simulation at every key). They are fixed, so
  that an operation does not depend on the felt it changes (and its inverse is exact in
  arithmetic); on another piano they stand for where its pp and ff blows load the felt.
  For ``felt_law = "stulov"`` the same two fields are the elastic part of Stulov's law
  (its hereditary part scales with it).
- ``file``: ``hammer_mass_g`` minus ``mass_g``, ``hammer_width_mm`` plus ``width_mm``.
- ``strike_point``: ``strike_ratio`` minus (toward the near end) or plus (toward the
  bridge) ``move_mm / speaking_length_m`` (in metres over metres).
- ``tune_unison``: ``mistune_<string>_cents`` plus ``move_cents`` (the same rule for a
  string the key does not have).
- ``mating``: ``mating_<string>_mm`` plus ``move_mm``. A string the key does not have
  (string 3 of a bichord, the key's resolved ``strings`` below ``string``) is an error
  naming the key.

Each change or operation becomes per-key overrides of the values the preset resolves, so
the voiced preset is validated like any preset: a result outside a field's range (a
felt exponent above 6, a strike ratio at or below 0) is an error naming the plan file,
the step and the key, not a clamp. Errors name a ``[[change]]`` by its number and an
``[[operation]]`` by its number and line (TOML readers give no line numbers: the line is
that of the n-th ``[[operation]]`` header; tables written as an inline array are named by
their index and the array's line).

Composing and reversing. Plans compose: applying A then B is applying
:func:`compose` (A, B), the steps of both in order. :func:`reverse_plan` gives the
inverse steps in reverse order: needling a % is undone by hardening at the same place
by 100 (1 / (1 - a/100) - 1) % (20 % by 25 %), hardening a % by needling
100 (1 - 1 / (1 + a/100)) %, filing by adding the felt back, a strike point move by the
same move the other way, a mating move by its negative, a factor by its reciprocal and an
addition by its negative; a ``value`` change has no inverse (the old values belong to the
preset), so a plan with one cannot be reversed. The inverse amounts are not held to the
safe ranges (undoing 30 % of needling takes 42.9 % of hardening): a reversed plan is a
preview of the piano as it was, not a job, and only the preset's field ranges bind it.
Exactness: :func:`apply_voicing` returns a :class:`VoicedPreset`, which remembers the
preset each step was applied to. An inverse step applied to the preset its forward step
made returns that remembered preset itself, so a plan applied and then reversed gives
back the original preset exactly (``to_dict()`` and every resolved value equal). On any
other preset (one read back from a saved file, or changed in between) the inverse steps
are applied in arithmetic: the resolved values then agree with the original to float
rounding (an ulp or two), as overrides that the original may not have had.

A plan previews a voicing; it does not undo one. Needling a real hammer cannot be
undone, whatever a preview shows.
"""

from __future__ import annotations

__all__ = [
    "keys_value",
    "FORMATS",
    "SPILL",
    "COMPRESSION_ANCHORS_MM",
    "OperationSpec",
    "OPERATIONS",
    "Change",
    "Operation",
    "VoicingPlan",
    "VoicedPreset",
    "compression_points_mm",
    "felt_law_change",
    "load_voicing",
    "parse_voicing",
    "parse_keys",
    "apply_voicing",
    "compose",
    "reverse_plan",
    "plan_to_toml",
    "operations_markdown",
    "WHERES",
    "TOWARD",
]

import math
import re
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, Mapping, Union

import numpy as np
import tomli_w

from ..errors import ParameterError, PresetError
from ..physics.tuning import HIGHEST_KEY, LOWEST_KEY
from .params import KEY_PARAM_BY_NAME, Param
from .preset import Preset, parse_preset

#: Plan formats this voicer reads: 1 (``[[change]]``), 2 (also ``[[operation]]``).
FORMATS = (1, 2)
#: How much of a crown or shoulder change reaches the other compression, as a power of
#: the factor (see the module notes).
SPILL: dict[str, float] = {"crown": 0.5, "shoulders": 0.2}
#: (key, c_s, c_l): peak felt compression in mm of blows at 1 and 5 m/s on the demo
#: instrument (simulated, see the module notes); log-linear in the key between them.
COMPRESSION_ANCHORS_MM: tuple[tuple[int, float, float], ...] = (
    (21, 0.78, 1.98), (28, 0.64, 1.55), (29, 0.70, 1.73), (33, 0.62, 1.50), (39, 0.51, 1.18),
    (45, 0.40, 0.87), (46, 0.39, 0.84), (51, 0.36, 0.787), (56, 0.36, 0.77), (60, 0.36, 0.76),
    (72, 0.37, 0.72), (84, 0.38, 0.73), (96, 0.39, 0.77), (108, 0.40, 0.84),
)

_OPS = ("factor", "add", "value")
_TOP = {1: ("format", "name", "description", "change"), 2: ("format", "name", "description", "change", "operation")}
_CHANGE_FIELDS = ("keys", "field", *_OPS)
WHERES = ("crown", "shoulders", "throughout")
TOWARD = ("near_end", "bridge")


@dataclass(frozen=True)
class OperationSpec:
    """One operation of the table: its amounts (checked like preset fields) and what it changes."""

    name: str
    help: str
    amounts: tuple[Param, ...]
    maps_to: str


def _amount_percent(verb: str) -> Param:
    return Param("amount_percent", "float", "%", f"how much {verb} the felt pushes at the compression `where` names",
                 lo=0.0, hi=30.0, lo_open=True)


_WHERE = Param("where", "str", "", "crown (mostly soft playing), shoulders (mostly loud playing) or throughout",
               choices=WHERES)

#: The operations of a format-2 plan: amounts with units and safe ranges, and the preset
#: fields each changes (see the module notes for the reasons of the ranges).
OPERATIONS: tuple[OperationSpec, ...] = (
    OperationSpec("needle", "soften the felt by needling", (_amount_percent("less"), _WHERE),
                  "`felt_force_1mm_n`, `felt_exponent`: the felt's forces at the compressions of a pp and an ff "
                  f"blow (c_s, c_l) times (g_s, g_l) = (g, g^{SPILL['crown']:g}) at the crown, "
                  f"(g^{SPILL['shoulders']:g}, g) at the "
                  "shoulders, (g, g) throughout, with g = 1 - amount_percent/100; then "
                  "p' = p + ln(g_l/g_s) / ln(c_l/c_s), F1' = g_s F1 (c_s / 1 mm)^(p - p')"),
    OperationSpec("harden", "stiffen the felt with hardener", (_amount_percent("more"), _WHERE),
                  "as for `needle`, with g = 1 + amount_percent/100"),
    OperationSpec("file", "reshape the hammer by filing", (
        Param("mass_g", "float", "g", "felt removed", lo=0.0, hi=1.0, default=0.0),
        Param("width_mm", "float", "mm", "change of the contact width (negative: narrower)", lo=-3.0, hi=0.0,
              default=0.0)),
        "`hammer_mass_g` minus `mass_g`, `hammer_width_mm` plus `width_mm`"),
    OperationSpec("strike_point", "move the strike point", (
        Param("move_mm", "float", "mm", "how far", lo=0.0, hi=5.0, lo_open=True),
        Param("toward", "str", "", "near_end (the front termination) or bridge", choices=TOWARD)),
        "`strike_ratio` minus (near_end) or plus (bridge) `move_mm` / (1000 `speaking_length_m`)"),
    OperationSpec("mating", "correct the mating of one string of the unison", (
        Param("string", "int", "", "string of the unison, 1 on the bass side", lo=1, hi=3),
        Param("move_mm", "float", "mm", "how much nearer the hammer the string then sits", lo=-1.0, hi=1.0)),
        "`mating_<string>_mm` plus `move_mm`; an error if the key has fewer strings"),
    OperationSpec("tune_unison", "retune one string of the unison against the others", (
        Param("string", "int", "", "string of the unison, 1 on the bass side", lo=1, hi=3),
        Param("move_cents", "float", "cents", "how much sharper it then sounds (negative: flatter)",
              lo=-5.0, hi=5.0)),
        "`mistune_<string>_cents` plus `move_cents`; an error if the key has fewer strings"),
)
_SPEC = {s.name: s for s in OPERATIONS}


@dataclass(frozen=True)
class Change:
    """One change: ``field`` on ``keys`` by ``op`` (factor, add or value) ``amount``.

    ``label`` and ``source`` say where it was read (for messages); ``undoes`` is the step
    an inverse step reverses (:func:`reverse_plan`). None of the three takes part in
    comparisons.
    """

    keys: tuple[int, ...]
    field: str
    op: str
    amount: float
    label: str = field(default="", compare=False)
    source: str | None = field(default=None, compare=False)
    undoes: "Step | None" = field(default=None, compare=False, repr=False)

    def describe(self) -> str:
        return f"{self.op} {self.amount:g}"

    def to_table(self) -> dict[str, Any]:
        """The ``[[change]]`` table that reads back as this change."""
        return {"keys": keys_value(self.keys), "field": self.field, self.op: self.amount}


@dataclass(frozen=True)
class Operation:
    """One trade operation ``op`` on ``keys``; ``amounts`` has every amount of the op's
    :class:`OperationSpec` (defaults filled in). ``label``, ``source`` and ``undoes`` as
    for :class:`Change`."""

    op: str
    keys: tuple[int, ...]
    amounts: Mapping[str, Any]
    label: str = field(default="", compare=False)
    source: str | None = field(default=None, compare=False)
    undoes: "Step | None" = field(default=None, compare=False, repr=False)

    def describe(self) -> str:
        a = self.amounts
        if self.op in ("needle", "harden"):
            place = "throughout" if a["where"] == "throughout" else f"at the {a['where']}"
            return f"{self.op} {a['amount_percent']:g} % {place}"
        if self.op == "file":
            return f"file {a['mass_g']:g} g off, width {a['width_mm']:+g} mm"
        if self.op == "strike_point":
            return f"strike point {a['move_mm']:g} mm toward the {a['toward'].replace('_', ' ')}"
        if self.op == "tune_unison":
            return f"string {a['string']} tuned {a['move_cents']:+g} cents"
        return f"mating string {a['string']} {a['move_mm']:+g} mm nearer"

    def to_table(self) -> dict[str, Any]:
        """The ``[[operation]]`` table that reads back as this operation (a reversed
        operation's amounts may lie outside the ranges a plan file is held to)."""
        return {"op": self.op, "keys": keys_value(self.keys), **self.amounts}


Step = Union[Change, Operation]


@dataclass(frozen=True)
class VoicingPlan:
    """A validated plan; ``changes`` holds its steps (:class:`Change` and
    :class:`Operation`) in the order they apply."""

    name: str
    description: str
    changes: tuple[Step, ...]
    source: str | None = None


@dataclass(frozen=True, eq=False)
class VoicedPreset(Preset):
    """A preset made by one step of a plan, remembering the preset it was made from.

    It equals any :class:`~voicer.tone.preset.Preset` with the same contents. The memory
    lets an inverse step return the earlier preset exactly (see the module notes).
    """

    voiced_from: Preset | None = field(default=None, repr=False)
    step: Step | None = field(default=None, repr=False)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Preset):
            return NotImplemented
        return all(getattr(self, f.name) == getattr(other, f.name) for f in fields(Preset) if f.compare)


def keys_value(keys: tuple[int, ...]) -> int | str | list[int]:
    """Keys (ascending) as a plan writes them: one key, a range ``"52-67"`` or a list."""
    if len(keys) == 1:
        return keys[0]
    if keys[-1] - keys[0] == len(keys) - 1:
        return f"{keys[0]}-{keys[-1]}"
    return list(keys)


# --- the felt at two compressions -----------------------------------------------------

def compression_points_mm(key: int) -> tuple[float, float]:
    """(c_s, c_l) of a key in mm: where pp and ff blows load the felt (module notes)."""
    k, cs, cl = (np.array(col, dtype=float) for col in zip(*COMPRESSION_ANCHORS_MM))
    return float(np.exp(np.interp(key, k, np.log(cs)))), float(np.exp(np.interp(key, k, np.log(cl))))


def felt_law_change(force_1mm_n: float, exponent: float, g_small: float, g_large: float,
                    c_small_mm: float, c_large_mm: float) -> tuple[float, float]:
    """F1 and p of the power law whose forces at ``c_small_mm`` and ``c_large_mm`` are
    ``g_small`` and ``g_large`` times those of ``F1 (c / 1 mm)^p``: the straight line
    through the two new points in log F against log c."""
    dp = math.log(g_large / g_small) / math.log(c_large_mm / c_small_mm)
    return g_small * force_1mm_n * c_small_mm ** (-dp), exponent + dp


def _felt_factors(op: str, amount_percent: float, where: str) -> tuple[float, float]:
    g = 1.0 - amount_percent / 100.0 if op == "needle" else 1.0 + amount_percent / 100.0
    return {"crown": (g, g ** SPILL["crown"]), "shoulders": (g ** SPILL["shoulders"], g), "throughout": (g, g)}[where]


# --- reading ----------------------------------------------------------------------------

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


def _positions(text: str | None, name: str, count: int) -> tuple[list[int], bool] | None:
    """Line numbers of the tables of array ``name`` (headers: one per table; an inline
    array: its line for every table, flagged False), or None when the text does not tell."""
    if text is None or not count:
        return None
    quoted = rf'(?:{name}|"{name}"|\'{name}\')'
    lines = text.splitlines()
    headers = [i for i, line in enumerate(lines, 1) if re.match(rf"\s*\[\[\s*{quoted}\s*\]\]", line)]
    if len(headers) == count:
        return headers, True
    inline = [i for i, line in enumerate(lines, 1) if re.match(rf"\s*{quoted}\s*=", line)]
    if not headers and len(inline) == 1:
        return [inline[0]] * count, False
    return None


def _check_change(change: Any, where: str, source: str | None) -> Change:
    if not isinstance(change, dict):
        raise PresetError(f"{where} must be a table", file=source)
    for name in change:
        if name not in _CHANGE_FIELDS:
            raise PresetError(f"{where}: unknown entry '{name}'; allowed: {', '.join(_CHANGE_FIELDS)}", file=source)
    field_name = change.get("field")
    if field_name not in KEY_PARAM_BY_NAME or KEY_PARAM_BY_NAME[field_name].kind != "float":
        raise PresetError(f"{where}: field {field_name!r} is not a per-key number; per-key fields: "
                          f"{', '.join(p for p, q in KEY_PARAM_BY_NAME.items() if q.kind == 'float')}", file=source)
    ops = [op for op in _OPS if op in change]
    if len(ops) != 1:
        raise PresetError(f"{where}: give exactly one of {', '.join(_OPS)} (got {', '.join(ops) or 'none'})",
                          file=source, field=field_name)
    amount = change[ops[0]]
    if isinstance(amount, bool) or not isinstance(amount, (int, float)):
        raise PresetError(f"{where}: {ops[0]} = {amount!r} is not a number", file=source, field=field_name)
    if ops[0] == "factor" and not amount > 0:
        raise PresetError(f"{where}: factor = {amount!r} must be > 0", file=source, field=field_name)
    if "keys" not in change:
        raise PresetError(f"{where}: 'keys' is missing (e.g. keys = \"52-67\")", file=source, field=field_name)
    keys = parse_keys(change["keys"], source=source, where=f"{where} keys")
    return Change(keys=keys, field=field_name, op=ops[0], amount=float(amount), label=where, source=source)


def _check_operation(table: Any, where: str, source: str | None) -> Operation:
    if not isinstance(table, dict):
        raise PresetError(f"{where} must be a table", file=source)
    op = table.get("op")
    if op is None or not isinstance(op, str) or op not in _SPEC:
        got = "'op' is missing" if op is None else f"op = {op!r} is not an operation"
        raise PresetError(f"{where}: {got}; allowed: {', '.join(_SPEC)}", file=source)
    spec = _SPEC[op]
    allowed = ("op", "keys", *(p.name for p in spec.amounts))
    for name in table:
        if name not in allowed:
            raise PresetError(f"{where} {op}: unknown entry '{name}'; allowed: {', '.join(allowed)}", file=source)
    if "keys" not in table:
        raise PresetError(f"{where} {op}: 'keys' is missing (e.g. keys = \"52-67\")", file=source)
    keys = parse_keys(table["keys"], source=source, where=f"{where} keys")
    amounts: dict[str, Any] = {}
    for param in spec.amounts:
        if param.name not in table and param.default is None:
            raise PresetError(f"{where} {op}: '{param.name}' is missing ({param.help}; allowed: "
                              f"{param.range_text()})", file=source, field=param.name)
        try:
            amounts[param.name] = param.check(table.get(param.name, param.default))
        except ParameterError as exc:
            raise PresetError(f"{where} {op}: {exc} ({param.help})", file=source, field=param.name) from None
    if op == "file" and amounts["mass_g"] == 0 and amounts["width_mm"] == 0:
        raise PresetError(f"{where} file: removes nothing; give mass_g > 0 (felt removed, g) or width_mm < 0 "
                          "(narrower contact, mm)", file=source)
    return Operation(op=op, keys=keys, amounts=amounts, label=where, source=source)


def parse_voicing(data: Mapping[str, Any], *, source: str | None = None, text: str | None = None) -> VoicingPlan:
    """Validate TOML data as a voicing plan (one clear error for the first problem).

    Parameters
    ----------
    data : mapping
        Parsed TOML.
    source : str, optional
        File name for messages.
    text : str, optional
        The file's text: gives the line of each ``[[operation]]`` for messages and the
        order of ``[[change]]`` and ``[[operation]]`` tables among each other. Without
        it, all tables of the kind that comes first in ``data`` apply first.
    """
    fmt = data.get("format", 1)
    if isinstance(fmt, bool) or fmt not in FORMATS:
        raise PresetError(f"format = {fmt!r} is not supported; this voicer reads format = 1 or 2", file=source)
    for name in data:
        if name == "operation" and fmt == 1:
            raise PresetError("[[operation]] tables need format = 2 (this plan says format = 1)", file=source)
        if name not in _TOP[fmt]:
            raise PresetError(f"unknown table or value '{name}'; allowed: {', '.join(_TOP[fmt])}", file=source)
    ordered: list[tuple[float, int, Step]] = []
    for rank, kind in enumerate(k for k in data if k in ("change", "operation")):
        raw = data[kind]
        if not isinstance(raw, list):
            raise PresetError(f"[[{kind}]] must be an array of tables", file=source)
        found = _positions(text, kind, len(raw))
        lines, headers = found if found else ([math.inf] * len(raw), False)
        for i, (table, line) in enumerate(zip(raw, lines), start=1):
            if kind == "change":  # numbered as they always were
                step: Step = _check_change(table, f"change {i}", source)
            else:
                at = "" if found is None else f" (line {line})" if headers else f" (in the array at line {line})"
                step = _check_operation(table, f"operation {i}{at}", source)
            ordered.append((line, rank, step))
    # File order where the text tells it (stable: an inline array keeps its order), else
    # all tables of the kind that comes first before the other's.
    if all(line != math.inf for line, _, _ in ordered):
        ordered.sort(key=lambda item: item[0])
    name, description = data.get("name", ""), data.get("description", "")
    if not isinstance(name, str) or not isinstance(description, str):
        raise PresetError("name and description must be text", file=source)
    return VoicingPlan(name=name, description=description, changes=tuple(s for _, _, s in ordered), source=source)


def load_voicing(path: str | Path) -> VoicingPlan:
    """Read and validate a voicing plan file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
        data = tomllib.loads(text)
    except OSError as exc:
        raise PresetError(f"cannot read the voicing plan: {exc.strerror or exc}", file=str(p)) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise PresetError(f"not a valid TOML file: {exc}", file=str(p)) from None
    return parse_voicing(data, source=str(p), text=text)


# --- applying ---------------------------------------------------------------------------

def _new_values(preset: Preset, step: Step, where: str, source: str | None) -> dict[int, dict[str, float]]:
    """Per key, the fields the step changes and their new values."""
    v = preset.resolved
    out: dict[int, dict[str, float]] = {}
    for key in step.keys:
        i = key - LOWEST_KEY
        if isinstance(step, Change):
            old = float(v[step.field][i])
            out[key] = {step.field: {"factor": old * step.amount, "add": old + step.amount,
                                     "value": step.amount}[step.op]}
            continue
        a = step.amounts
        if step.op in ("needle", "harden"):
            f1, p = felt_law_change(float(v["felt_force_1mm_n"][i]), float(v["felt_exponent"][i]),
                                    *_felt_factors(step.op, a["amount_percent"], a["where"]),
                                    *compression_points_mm(key))
            out[key] = {"felt_force_1mm_n": f1}
            if p != v["felt_exponent"][i]:
                out[key]["felt_exponent"] = p
        elif step.op == "file":
            out[key] = {}
            if a["mass_g"] != 0:
                out[key]["hammer_mass_g"] = float(v["hammer_mass_g"][i]) - a["mass_g"]
            if a["width_mm"] != 0:
                out[key]["hammer_width_mm"] = float(v["hammer_width_mm"][i]) + a["width_mm"]
        elif step.op == "strike_point":
            sign = -1.0 if a["toward"] == "near_end" else 1.0
            move = sign * a["move_mm"] * 1e-3 / float(v["speaking_length_m"][i])
            out[key] = {"strike_ratio": float(v["strike_ratio"][i]) + move}
        else:  # mating, tune_unison: one string of the unison
            mating = step.op == "mating"
            s = a["string"]
            name = f"mating_{s}_mm" if mating else f"mistune_{s}_cents"
            strings = int(v["strings"][i])
            if strings < s:
                raise PresetError(f"{where}: {'mating' if mating else 'tuning'} string {s}: this key has "
                                  f"{strings} string(s), so there is no string {s}", file=source, key=key,
                                  field=name)
            out[key] = {name: float(v[name][i]) + (a["move_mm"] if mating else a["move_cents"])}
    return out


def _apply_step(preset: Preset, step: Step, where: str, source: str | None) -> VoicedPreset:
    data = preset.to_dict()
    overrides = data.setdefault("override", {})
    for key, values in _new_values(preset, step, where, source).items():
        overrides.setdefault(str(key), {}).update(values)
    try:
        new = parse_preset(data, source=preset.source)
    except PresetError as exc:
        text = f"{where} ({step.describe()})" if isinstance(step, Change) else f"{where}: {step.describe()}"
        raise PresetError(f"{text} gives {exc.reason}", file=source, key=exc.key, field=exc.field) from None
    return VoicedPreset(**{f.name: getattr(new, f.name) for f in fields(Preset)}, voiced_from=preset, step=step)


def apply_voicing(preset: Preset, plan: VoicingPlan) -> Preset:
    """The preset with the plan's steps applied in order (validated).

    An inverse step (from :func:`reverse_plan`) applied to the :class:`VoicedPreset` its
    forward step made returns the preset that step was applied to, exactly; elsewhere
    every step is applied in arithmetic. A plan without steps returns ``preset`` itself.

    Raises
    ------
    PresetError
        Naming the plan file, the step, the key and the field when a result is out of the
        field's range, or a mating operation names a string the key does not have.
    """
    current = preset
    for i, step in enumerate(plan.changes, start=1):
        if (step.undoes is not None and isinstance(current, VoicedPreset) and current.voiced_from is not None
                and current.step == step.undoes):
            current = current.voiced_from
            continue
        label = step.label or f"{'change' if isinstance(step, Change) else 'operation'} {i}"
        current = _apply_step(current, step, label, step.source or plan.source)
    return current


def compose(*plans: VoicingPlan) -> VoicingPlan:
    """One plan doing the plans' steps in order (each step keeps its file for messages)."""
    sources = {p.source for p in plans}
    return VoicingPlan(name=" then ".join(p.name for p in plans if p.name),
                       description="; ".join(p.description for p in plans if p.description),
                       changes=tuple(s for p in plans for s in p.changes),
                       source=sources.pop() if len(sources) == 1 else None)


def _inverse(step: Step, source: str | None) -> Step:
    if step.undoes is not None:
        return step.undoes  # the reverse of a reverse is the step itself
    label = f"reverse of {step.label}" if step.label else "reverse"
    if isinstance(step, Change):
        if step.op == "value":
            raise PresetError(f"{step.label or 'a change'} sets {step.field} to {step.amount:g}: a value change has "
                              "no reverse (the old values belong to the preset); use factor or add to reverse a plan",
                              file=step.source or source, field=step.field)
        amount = 1.0 / step.amount if step.op == "factor" else -step.amount
        return Change(step.keys, step.field, step.op, amount, label=label, source=step.source, undoes=step)
    a = dict(step.amounts)
    op = step.op
    if op == "needle":
        op, a["amount_percent"] = "harden", 100.0 * (1.0 / (1.0 - a["amount_percent"] / 100.0) - 1.0)
    elif op == "harden":
        op, a["amount_percent"] = "needle", 100.0 * (1.0 - 1.0 / (1.0 + a["amount_percent"] / 100.0))
    elif op == "file":
        a["mass_g"], a["width_mm"] = -a["mass_g"], -a["width_mm"]
    elif op == "strike_point":
        a["toward"] = TOWARD[1 - TOWARD.index(a["toward"])]
    elif op == "tune_unison":
        a["move_cents"] = -a["move_cents"]
    else:
        a["move_mm"] = -a["move_mm"]
    return Operation(op=op, keys=step.keys, amounts=a, label=label, source=step.source, undoes=step)


def reverse_plan(plan: VoicingPlan) -> VoicingPlan:
    """The plan that undoes ``plan`` (for previews): the inverse steps in reverse order.

    Raises
    ------
    PresetError
        If the plan has a ``value`` change, which has no inverse.
    """
    return VoicingPlan(name=f"reverse of {plan.name}" if plan.name else "reverse",
                       description=f"undoes: {plan.description}" if plan.description else "",
                       changes=tuple(_inverse(s, plan.source) for s in reversed(plan.changes)), source=plan.source)


def plan_to_toml(plan: VoicingPlan) -> str:
    """The plan as TOML that reads back as the same steps in the same order (format 2 if
    it has operations). A reversed plan's amounts may lie outside the safe ranges, and
    then it does not read back: it is a preview, not a job."""
    fmt = 2 if any(isinstance(s, Operation) for s in plan.changes) else 1
    parts = [tomli_w.dumps({"format": fmt, "name": plan.name, "description": plan.description})]
    for step in plan.changes:  # headers one by one: tables of two kinds keep their order
        kind = "change" if isinstance(step, Change) else "operation"
        parts.append(f"\n[[{kind}]]\n" + tomli_w.dumps(step.to_table()))
    return "".join(parts)


def operations_markdown() -> str:
    """The operation table as Markdown (the README's copy): one row per amount."""
    rows = ["| `op` | amount | unit | allowed | meaning | changes on each listed key |", "|---|---|---|---|---|---|"]
    for spec in OPERATIONS:
        for j, p in enumerate(spec.amounts):
            allowed = p.range_text().removesuffix(f" {p.unit}") if p.unit else p.range_text()
            if p.default is not None:
                allowed += f" (default {p.default:g})"
            first = (f"`{spec.name}`: {spec.help}", spec.maps_to) if j == 0 else ("", "")
            rows.append(f"| {first[0]} | `{p.name}` | {p.unit or '-'} | {allowed} | {p.help} | {first[1]} |")
    return "\n".join(rows) + "\n"
