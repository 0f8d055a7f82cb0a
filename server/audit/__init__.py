"""Configuration audit trail (``record`` inside the change's own transaction) and CSV export helpers."""

from __future__ import annotations

import csv
import io

from server.storage.tables import utcnow

FORMULA_START = ("=", "+", "-", "@", "\t", "\r", "|", "%")


def record(session, *, actor: str, action: str, target: str, target_id: int | None = None,
           **details):
    """Add one audit row in the caller's transaction (so the change and its record commit together);
    returns the row (its id is set once the session flushes)."""
    from .tables import ConfigChange

    change = ConfigChange(created_at=utcnow(), actor=(actor or "unknown")[:120], action=action,
                          target=target, target_id=target_id, details=_plain(details))
    session.add(change)
    return change


def _plain(value):
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if value is None or isinstance(value, bool | int | float | str):
        return value
    return str(value)


def csv_cell(value) -> str:
    """A cell a spreadsheet will show as text: values that would start a formula get a leading quote.

    The OWASP guidance on CSV injection (from memory): prefix cells starting with = + - @ (and tab, CR)
    with a single quote. Plain numbers (like -1.5) stay numbers."""
    if value is None:
        return ""
    if isinstance(value, bool | int | float):
        return repr(value) if isinstance(value, float) else str(value)
    text = str(value)
    if text.startswith(FORMULA_START) and not _is_number(text):
        return "'" + text
    return text


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def to_csv(header: list[str], rows: list[list]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(header)
    for row in rows:
        w.writerow([csv_cell(v) for v in row])
    return buf.getvalue()
