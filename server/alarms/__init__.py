"""Alarm rules, states, events, acknowledgement/shelving, outbox and alert emails.

The worker calls :func:`evaluate_result` in the same transaction that stores an analysis result
(``evaluate_result(session, record, result, settings=settings)``; ``settings`` is optional and
carries the speed tolerances). The mailer loop is :func:`run_mailer_once` / :func:`run_mailer_forever`.
Heavy modules are imported lazily so ``import server.alarms`` stays cheap.
"""

from __future__ import annotations


def evaluate_result(session, record, result, **kwargs) -> list:
    """Evaluate the alarm rules of ``record``'s point against ``result``; return the new events."""
    from .evaluate import evaluate_result as _evaluate

    return _evaluate(session, record, result, **kwargs)


def ensure_default_rules(session, point) -> list:
    """Create the default rules for a new point (optional hook: the engine also does it lazily)."""
    from .evaluate import ensure_default_rules as _ensure

    return _ensure(session, point)


def run_mailer_once(db, settings, **kwargs) -> int:
    from .mailer import run_mailer_once as _once

    return _once(db, settings, **kwargs)


def run_background_once(db, settings, **kwargs) -> int:
    """Refresh operating-window fits and send due emails (what the worker loop calls between jobs)."""
    from .mailer import run_background_once as _once

    return _once(db, settings, **kwargs)


def run_mailer_forever(db, settings, stop=None) -> None:
    from .mailer import run_mailer_forever as _forever

    _forever(db, settings, stop)


__all__ = ["ensure_default_rules", "evaluate_result", "run_background_once", "run_mailer_forever",
           "run_mailer_once"]
