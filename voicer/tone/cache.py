"""On-disk cache of computed per-key tables, keyed by a hash of every input.

A key's entry is named by the SHA-256 of a canonical JSON of everything its table depends
on (the key's resolved preset values, the instrument fields that matter, the table
settings and the model version), so a changed input simply misses and only that key is
recomputed. Entries are ``.npz`` files written atomically; an unreadable entry is
treated as missing and rewritten.

The folder is ``$VOICER_CACHE_DIR``, else ``$XDG_CACHE_HOME/voicer/tables``, else
``~/.cache/voicer/tables``.
"""

from __future__ import annotations

__all__ = ["cache_dir", "digest", "load_entry", "store_entry"]

import hashlib
import io
import json
import os
import zipfile
from pathlib import Path
from typing import Any, Mapping

import numpy as np
from numpy.typing import NDArray

from ..io.atomic import atomic_write_bytes


def cache_dir() -> Path:
    """Folder of the table cache (not created until something is stored)."""
    explicit = os.environ.get("VOICER_CACHE_DIR")
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "voicer" / "tables"


def _canonical(value: Any) -> Any:
    if isinstance(value, float):
        return repr(value)  # exact, and NaN-safe
    if isinstance(value, (np.floating, np.integer)):
        return _canonical(value.item())
    if isinstance(value, Mapping):
        return {str(k): _canonical(v) for k, v in sorted(value.items())}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_canonical(v) for v in value]
    return value


def digest(inputs: Mapping[str, Any]) -> str:
    """SHA-256 hex digest of a canonical JSON form of ``inputs``."""
    text = json.dumps(_canonical(inputs), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def load_entry(name: str, folder: Path | None = None) -> dict[str, NDArray[Any]] | None:
    """Arrays stored under ``name``, or None if absent or unreadable."""
    path = (folder or cache_dir()) / f"{name}.npz"
    try:
        with np.load(path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}
    except (OSError, ValueError, zipfile.BadZipFile, EOFError):
        return None


def store_entry(name: str, arrays: Mapping[str, NDArray[Any]], folder: Path | None = None) -> Path:
    """Store arrays under ``name`` (atomic write; no backup: entries are reproducible)."""
    target = folder or cache_dir()
    target.mkdir(parents=True, exist_ok=True)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return atomic_write_bytes(target / f"{name}.npz", buf.getvalue(), backup=False)
