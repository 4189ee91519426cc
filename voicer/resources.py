"""Where the bundled instruments live, and how a command-line preset name is found.

A wheel carries them as ``voicer/_presets``; a source checkout (or an editable install)
reads the repository's ``presets/`` folder.
"""

from __future__ import annotations

__all__ = ["DEMO_PIANO", "presets_dir", "bundled_pianos", "find_preset"]

from pathlib import Path

from .errors import VoicerError

#: Name of the bundled demo instrument (``presets/pianos/<name>.toml``).
DEMO_PIANO = "kestrel-190"


def presets_dir() -> Path:
    """The folder holding ``pianos/``, ``voicings/`` and ``midi/``."""
    packaged = Path(__file__).resolve().parent / "_presets"
    if packaged.is_dir():
        return packaged
    return Path(__file__).resolve().parent.parent / "presets"


def bundled_pianos() -> dict[str, Path]:
    """Bundled piano presets by name."""
    folder = presets_dir() / "pianos"
    return {p.stem: p for p in sorted(folder.glob("*.toml"))}


def find_preset(name: str) -> Path:
    """A preset given on the command line: a file path, a bundled name, or ``demo``.

    Raises
    ------
    VoicerError
        If nothing matches; the message lists the bundled names.
    """
    path = Path(name)
    if path.is_file():
        return path
    bundled = bundled_pianos()
    key = DEMO_PIANO if name == "demo" else name
    if key in bundled:
        return bundled[key]
    names = ", ".join(["demo", *bundled]) or "none"
    raise VoicerError(f"{name}: no such preset file (bundled presets: {names})")
