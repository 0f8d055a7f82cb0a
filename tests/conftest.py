"""Shared fixtures for every test area. Area fixtures live in each area's own conftest.py."""

from __future__ import annotations

import os

import numpy as np
import pytest


@pytest.fixture(autouse=True)
def _clean_environ(monkeypatch):
    """Keep HALFWATCH_* settings from the developer's shell out of the tests (test URLs stay)."""
    for key in list(os.environ):
        if key.startswith("HALFWATCH_") and not key.startswith("HALFWATCH_TEST_"):
            monkeypatch.delenv(key, raising=False)


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator: every test that needs noise gets the same noise on every run."""
    return np.random.default_rng(20261201)

pytest_plugins = ["support.fixtures"]
