"""The live knobs' amounts written out as a voicing plan.

The plan uses the ``[[change]]`` schema of :mod:`voicer.tone.voicing` (format 1): one
change per knob and amount, over the keys that have it (``felt_force_1mm_n`` by a factor,
``strike_ratio`` and ``hammer_mass_g`` by an addition). When playing started from a plan
(``--voicing``), its changes come first, so the saved file reproduces the knobs' state
from the preset alone. A comment header names the preset, the keys, what each amount
means and the amounts per key in words (the strike point also in millimetres).

Before anything is written the plan is read back and applied to the preset, and must
give exactly the knobs' values; the file is then written atomically, an existing one
kept as ``.bak``.
"""

from __future__ import annotations

__all__ = ["default_plan_path", "plan_text", "save_plan"]

import datetime as dt
import textwrap
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

from ..errors import VoicerError
from ..io.atomic import atomic_write_bytes
from ..physics.tuning import key_name
from ..tone.preset import Preset
from ..tone.voicing import Operation, VoicingPlan, apply_voicing, keys_value, parse_voicing
from .knob_state import KnobState, keys_text
from .knobs import KNOB_SPECS


def default_plan_path(now: dt.datetime | None = None) -> Path:
    """``voicing-YYYYMMDD-HHMMSS.toml`` in the current folder."""
    return Path.cwd() / f"voicing-{(now or dt.datetime.now()):%Y%m%d-%H%M%S}.toml"


def _changes(amounts: dict[int, dict[str, float]]) -> list[dict[str, Any]]:
    out = []
    for spec in KNOB_SPECS:
        groups: dict[float, list[int]] = {}
        for key, by_knob in sorted(amounts.items()):
            if spec.name in by_knob:
                groups.setdefault(by_knob[spec.name], []).append(key)
        for amount, keys in sorted(groups.items(), key=lambda item: item[1][0]):
            out.append({"keys": keys_value(tuple(keys)), "field": spec.field, spec.op: amount})  # keys ascending
    return out


def _header(knobs: KnobState, amounts: dict[int, dict[str, float]], *, root: Preset,
            base_plan: VoicingPlan | None, now: dt.datetime) -> list[str]:
    base = knobs.base
    name = root.instrument.get("name") or "?"
    lines = [f"# Voicing plan saved by `voicer play` from its live knobs, {now:%Y-%m-%d %H:%M:%S}.",
             f"# Preset: {root.source or '(not from a file)'} ({name})."]
    if base_plan is not None:
        lines.append(f"# Started from the plan {base_plan.source or base_plan.name}: its changes come first.")
    keys = sorted(amounts)
    lines.append(f"# Keys changed by the knobs: {keys_text(keys) if keys else 'none'}.")
    lines.append("# What the amounts mean:")
    for spec in KNOB_SPECS:
        lines += textwrap.wrap(f"{spec.name}: {spec.help}", 88, initial_indent="#   ", subsequent_indent="#     ")
    if keys:
        lines.append("# Per key:")
    for key in keys:
        i = base.scale.index(key)
        parts = []
        for spec in KNOB_SPECS:
            if spec.name in amounts[key]:
                amount = amounts[key][spec.name]
                text = spec.format(amount)
                if spec.field == "strike_ratio":
                    text += f" ({amount * float(base.resolved['speaking_length_m'][i]) * 1e3:+.1f} mm)"
                elif spec.op == "factor":
                    text += f" ({(amount - 1) * 100:+.1f} %)"
                parts.append(f"{spec.name} {text}")
        lines.append(f"#   {key} {key_name(key)}: {', '.join(parts)}")
    lines += ["# A preview, not a promise: needling cannot be undone. Work toward these amounts in small",
              "# steps, re-test at pp, mf and ff, and let your ears and judgement decide.", ""]
    return lines


def plan_text(knobs: KnobState, *, root: Preset, base_plan: VoicingPlan | None = None,
              amounts: dict[int, dict[str, float]] | None = None, now: dt.datetime | None = None) -> str:
    """The plan as TOML, with its comment header.

    Parameters
    ----------
    knobs : KnobState
        The amounts; ``knobs.base`` is ``root`` with ``base_plan`` applied.
    root : Preset
        The preset as loaded (what the plan is applied to).
    base_plan : VoicingPlan, optional
        The plan playing started from (``--voicing``).
    amounts : mapping, optional
        The amounts to write (a :meth:`KnobState.snapshot`; default the knobs' now).
    now : datetime, optional
        Time stamp of the header (default now).
    """
    now = now or dt.datetime.now()
    amounts = knobs.snapshot()[1] if amounts is None else amounts
    # The starting plan's steps (changes and trade operations, in their order), then the knobs'.
    steps = [("operation" if isinstance(c, Operation) else "change", c.to_table())
             for c in (base_plan.changes if base_plan is not None else ())]
    steps += [("change", c) for c in _changes(amounts)]
    name = f"{base_plan.name or 'plan'} + live knobs" if base_plan is not None else "live knobs"
    data: dict[str, Any] = {"format": 2 if any(kind == "operation" for kind, _ in steps) else 1, "name": name,
                            "description": f"amounts set with the live knobs of voicer play, {now:%Y-%m-%d %H:%M}"}
    body = tomli_w.dumps(data) + "".join(f"\n[[{kind}]]\n" + tomli_w.dumps(table) for kind, table in steps)
    return "\n".join(_header(knobs, amounts, root=root, base_plan=base_plan, now=now)) + body


def save_plan(path: str | Path, knobs: KnobState, *, root: Preset, base_plan: VoicingPlan | None = None,
              amounts: dict[int, dict[str, float]] | None = None, now: dt.datetime | None = None) -> Path:
    """Write the plan atomically (an existing file is kept as ``.bak``), after checking
    that it reproduces the knobs' values from ``root``; ``amounts`` as for :func:`plan_text`.

    Raises
    ------
    VoicerError
        If the plan would not reproduce the knobs' values (nothing is written), or the
        file cannot be written.
    """
    target = Path(path)
    amounts = knobs.snapshot()[1] if amounts is None else amounts
    text = plan_text(knobs, root=root, base_plan=base_plan, amounts=amounts, now=now)
    plan = parse_voicing(tomllib.loads(text), source=str(target))
    got, want = apply_voicing(root, plan).resolved, knobs.preset(amounts).resolved
    differ = [name for name in want if not np.array_equal(got[name], want[name], equal_nan=True)]
    if differ:
        raise VoicerError(f"{target}: not saved: the plan would not reproduce the knobs' {', '.join(differ)}")
    try:
        return atomic_write_bytes(target, text.encode("utf-8"), backup=True)
    except OSError as exc:
        raise VoicerError(f"{target}: cannot write the plan: {exc.strerror or exc}") from None
