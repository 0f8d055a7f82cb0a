"""Durable storage: engine and transactions (engine.py), tables, queries, waveform blobs."""

from server.storage.engine import Database, SchemaNotReady


def _guard_names() -> None:
    from server.names import guard_models  # the one control-character rule on every ORM name write

    guard_models()


_guard_names()

__all__ = ["Database", "SchemaNotReady"]
