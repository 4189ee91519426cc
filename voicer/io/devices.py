"""PortAudio devices of one direction (input or output): import, list, show, choose.

The live sink (:mod:`voicer.io.sinks`) and the recorder's input (:mod:`voicer.io.capture`)
share these; each says in its own words what to do without PortAudio or a device.
"""

from __future__ import annotations

__all__ = ["import_sounddevice", "list_devices", "format_device_table", "resolve_device"]

from types import ModuleType
from typing import Any, Literal

import numpy as np

from ..errors import VoicerError

Kind = Literal["input", "output"]


def import_sounddevice(needs: str, without: str) -> ModuleType:
    """sounddevice, or an error saying that ``needs`` PortAudio and what works ``without`` it."""
    try:
        import sounddevice
    except OSError as exc:  # sounddevice raises OSError when it cannot load the PortAudio library
        raise VoicerError(f"{needs} PortAudio ({exc}): install the Debian package libportaudio2 "
                          f"(apt-get install libportaudio2); {without}") from exc
    return sounddevice


def list_devices(sd: ModuleType, kind: Kind) -> list[dict[str, Any]]:
    """The devices with channels of ``kind``: ``index``, ``name``, ``hostapi``, ``channels``,
    ``default_samplerate_hz`` and ``default``."""
    try:
        default = int(sd.query_devices(kind=kind)["index"])
    except sd.PortAudioError:  # PortAudio has no default device of this kind
        default = -1
    hostapis = sd.query_hostapis()
    field = f"max_{kind}_channels"
    return [
        {"index": index, "name": info["name"], "hostapi": hostapis[info["hostapi"]]["name"],
         "channels": int(info[field]), "default_samplerate_hz": float(info["default_samplerate"]),
         "default": index == default}
        for index, info in enumerate(sd.query_devices())
        if info[field] > 0
    ]


def format_device_table(devices: list[dict[str, Any]], kind: Kind, *, none_found: str) -> str:
    """A table of :func:`list_devices`' result (``none_found`` when it is empty)."""
    if not devices:
        return none_found
    width = max(len(d["name"]) for d in devices)
    lines = [f"audio {kind} devices (* = default):"]
    for d in devices:
        mark = "*" if d["default"] else " "
        lines.append(f"{mark} {d['index']:>3}  {d['name']:<{width}}  {d['hostapi']:<6} "
                     f"{d['channels']:>4} ch  {d['default_samplerate_hz']:>7.0f} Hz")
    return "\n".join(lines)


def resolve_device(sd: ModuleType, devices: list[dict[str, Any]], spec: int | str | None, kind: Kind, *,
                   help: str) -> int:
    """PortAudio index of the device ``spec`` (index, digits, part of a name, or None for
    the default) among ``devices``; errors name it, list the others and end with ``help``."""
    wanted = f"default audio {kind} device" if spec is None else f"audio {kind} device {spec!r}"
    if not devices:
        raise VoicerError(f"{wanted} not found: PortAudio sees no {kind} device; {help}")
    available = ", ".join(f"[{d['index']}] {d['name']}" for d in devices)
    if spec is None:
        chosen = [d["index"] for d in devices if d["default"]]
        if not chosen:
            raise VoicerError(f"no {wanted} is set (available: {available}); {help}")
        return int(chosen[0])
    if isinstance(spec, str) and spec.strip().isdigit():
        spec = int(spec)
    if isinstance(spec, (int, np.integer)) and not isinstance(spec, bool):
        if any(d["index"] == spec for d in devices):
            return int(spec)
        raise VoicerError(f"{wanted} not found: no {kind} device has that index (available: {available}); {help}")
    if not isinstance(spec, str) or not spec.strip():
        raise VoicerError(f"{wanted}: give a device index or a part of its name; {help}")
    try:
        return int(sd.query_devices(spec, kind=kind)["index"])
    except ValueError as exc:  # sounddevice: no device or several devices match
        reason = str(exc).replace("\n", "; ")
        raise VoicerError(f"{wanted} not found: {reason} (available: {available}); {help}") from exc
