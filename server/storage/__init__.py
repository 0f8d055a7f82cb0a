"""Durable storage: engine and transactions (engine.py), tables, queries, waveform blobs."""

from server.storage.engine import Database, SchemaNotReady

__all__ = ["Database", "SchemaNotReady"]
