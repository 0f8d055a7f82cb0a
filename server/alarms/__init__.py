"""Alarm rules, states, events, acknowledgement/shelving, outbox and alert emails.

The worker calls :func:`evaluate_result` in the same transaction that stores an analysis
result. This first version does nothing; the engine replaces it.
"""

from __future__ import annotations


def evaluate_result(session, record, result) -> list:
    """Evaluate the alarm rules of ``record``'s point against ``result``; return new events."""
    return []


__all__ = ["evaluate_result"]
