"""Shared test helpers for every area (importable as ``support.*``); fixtures in support.fixtures."""
