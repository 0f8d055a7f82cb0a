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

# Areas whose database tests also run on PostgreSQL when HALFWATCH_TEST_POSTGRES_URL is set.
BOTH_BACKENDS = ("server", "alarms", "ops")


def pytest_generate_tests(metafunc):
    """Run every test that uses a database (via ``db_backend``) on SQLite and on PostgreSQL."""
    if "db_backend" not in metafunc.fixturenames or not os.environ.get("HALFWATCH_TEST_POSTGRES_URL"):
        return
    parts = metafunc.definition.path.parts
    area = parts[parts.index("tests") + 1] if "tests" in parts else ""
    if area in BOTH_BACKENDS:
        metafunc.parametrize("db_backend", ["sqlite", "postgresql"], indirect=True)
