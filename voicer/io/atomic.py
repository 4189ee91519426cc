"""Writing files so that nothing is lost: temporary file + rename, with a backup.

A technician's preset is work; a crash or a full disk in the middle of a save must leave
the old file intact, and a save over an existing file keeps the old one as ``.bak``.
"""

from __future__ import annotations

__all__ = ["atomic_write_bytes", "backup_path", "check_output"]

import os
import shutil
import tempfile
from pathlib import Path

from ..errors import VoicerError


def backup_path(path: Path) -> Path:
    """Where the previous version of ``path`` is kept: ``name.ext.bak``."""
    return path.with_name(path.name + ".bak")


def check_output(path: Path, *, suffix: str, what: str, force: bool) -> None:
    """Refuse, before any work, an output ``-o path`` that would be lost or not written:
    an existing file without ``force``, another suffix, a folder that does not exist.

    Raises
    ------
    VoicerError
        Naming the file and what to do (``what``: e.g. "a preset").
    """
    if path.exists() and not force:
        raise VoicerError(f"{path} exists; give --force to replace it (the old one is kept as {path.name}.bak)")
    if path.suffix != suffix:
        raise VoicerError(f"-o {path}: {what} is a {suffix} file")
    if not path.parent.is_dir():
        raise VoicerError(f"-o {path}: folder {path.parent} does not exist")


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, *, backup: bool = True) -> Path:
    """Write ``data`` to ``path`` atomically.

    The bytes go to a temporary file in the same folder, are flushed to disk and then
    renamed over ``path`` (``os.replace`` is atomic on POSIX and Windows). If ``path``
    already exists and ``backup`` is true, its current content is first copied to
    ``path.bak``. On any failure the temporary file is removed and ``path`` is untouched.

    Returns
    -------
    Path
        The path written.
    """
    target = Path(path)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        # mkstemp makes the file private; give it the mode a plain save would have.
        tmp.chmod(target.stat().st_mode & 0o777 if target.exists() else 0o644)
        if backup and target.exists():
            shutil.copy2(target, backup_path(target))
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target
