"""Shared fixtures: the demo preset, a seeded RNG, and a hypothesis profile for CI."""

from __future__ import annotations

import os

import numpy as np
import pytest
from hypothesis import settings

from voicer.resources import DEMO_PIANO, bundled_pianos
from voicer.tone.preset import Preset, load_preset

# No per-example deadline: the shared 2-core CI machine has noisy timing. On CI the
# examples are derandomized so that a run is reproducible.
settings.register_profile("voicer", deadline=None, max_examples=60, derandomize=bool(os.environ.get("CI")))
settings.load_profile("voicer")


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def demo_path():
    return bundled_pianos()[DEMO_PIANO]


@pytest.fixture(scope="session")
def demo(demo_path) -> Preset:
    return load_preset(demo_path)


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    """Every test gets its own table cache; nothing is written to the user's."""
    monkeypatch.setenv("VOICER_CACHE_DIR", str(tmp_path / "cache"))


@pytest.fixture(scope="module")
def module_cache(tmp_path_factory):
    """One table cache for a module whose module fixtures build tables (they run before the
    per-test cache is set), never the user's; shared by its tests so that each builds only
    the keys it changes. Use with ``pytestmark = pytest.mark.usefixtures("shared_cache")``."""
    folder = str(tmp_path_factory.mktemp("cache"))
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("VOICER_CACHE_DIR", folder)
        yield folder


@pytest.fixture
def shared_cache(private_cache, module_cache, monkeypatch):
    monkeypatch.setenv("VOICER_CACHE_DIR", module_cache)
