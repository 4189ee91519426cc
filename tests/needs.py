"""What some tests need from the machine beyond pip's packages, and what a test does
without it.

Debian's libportaudio2 (real PortAudio streams on ALSA's null device), fluid-soundfont-gm
(real piano notes) and chromium (the HTML report in a real browser) are installed by
``.ci/run``. There (``CI`` set, or ``VOICER_DATASETS=required`` as ``.ci/run`` sets) a
missing one fails the test, never a silent skip; elsewhere the test is skipped with what
to install, so the README's test command also runs on a machine without them.
"""

from __future__ import annotations

import os
from typing import NoReturn

import pytest

PORTAUDIO_HINT = "libportaudio2 is missing (apt-get install libportaudio2; .ci/run installs it)"


def skip_or_fail(message: str) -> NoReturn:
    """Fail (on CI) or skip (elsewhere) the calling test."""
    if os.environ.get("CI") or os.environ.get("VOICER_DATASETS") == "required":
        pytest.fail(message, pytrace=False)
    pytest.skip(message)


def check_portaudio(text: str) -> None:
    """Skip or fail when voicer's output ``text`` says PortAudio could not be loaded (its
    message names the Debian package libportaudio2)."""
    if "libportaudio2" in text:
        skip_or_fail(f"{PORTAUDIO_HINT}: {text.strip()}")
