"""Defaults of the engine that the command line shows without importing the engine."""

from __future__ import annotations

__all__ = ["DEFAULT_SAMPLE_RATE", "DEFAULT_GAIN_DB", "DEFAULT_MAX_VOICES", "DEFAULT_CULL_DBFS"]

DEFAULT_SAMPLE_RATE = 48_000
#: Bridge force (newtons) to full scale: a forte chord of the demo peaks near -6 dBFS.
DEFAULT_GAIN_DB = -50.0
DEFAULT_MAX_VOICES = 96
#: Partials below this level re full scale are dropped.
DEFAULT_CULL_DBFS = -100.0
