"""The one rule for names people give things: sites, areas, machines, points, routes, users, API keys.

A name may not hold control characters: C0 (U+0000-U+001F, which includes NUL, TAB, CR and LF), DEL
and C1 (U+007F-U+009F), nor the bidirectional embedding/override/isolate controls (U+202A-U+202E,
U+2066-U+2069) that make a name display differently from what it is. Names reach email headers,
CSV exports, log lines and page titles; a line break in one could split a header, a bidi override
could disguise one machine as another.

Where the rule is applied (each calls :func:`name_problem` or :func:`check_name`, nothing else):

- the API's request bodies: :data:`Name` / :data:`UserName` in ``server/schemas.py`` (422 naming the
  field and the fix);
- every ORM write of a name column, whatever the caller (CLI, demo, services): :func:`guard_models`
  listens to attribute sets on the name columns and raises :class:`NameRefused` (an ``AppError``, 422);
- route-ZIP manifest rows name points: a row whose point name breaks the rule is refused with its reason;
- email headers: :func:`header_safe` turns any stored value (old data may predate the rule) into one
  line without control characters before it becomes a header.
"""

from __future__ import annotations

import re
from typing import Annotated

from pydantic import AfterValidator, Field

from server.errors import AppError

# C0, DEL, C1, bidi embeddings/overrides (U+202A-U+202E) and isolates (U+2066-U+2069)
_FORBIDDEN = re.compile("[\x00-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")

FIX = ("remove control characters (line breaks, tabs, NUL, U+0080-U+009F) and bidirectional "
       "override/isolate marks (U+202A-U+202E, U+2066-U+2069); use plain printable text")


# one plain address (the rule for user and subscription emails)
EMAIL_RE = re.compile(r"^[^@\s]+@[^@\s]+\.[^@\s]+$")


class NameRefused(AppError):
    status = 422
    code = "invalid"


def name_problem(value: str) -> str | None:
    """None if ``value`` is acceptable, else what is wrong with it (the first offending character)."""
    m = _FORBIDDEN.search(value)
    if m is None:
        return None
    return f"contains the control character U+{ord(m.group()):04X} at position {m.start() + 1}"


def check_name(value: str, field: str = "name") -> str:
    """Return ``value`` or raise :class:`NameRefused` (422) naming the field, the character and the fix."""
    problem = name_problem(value)
    if problem is not None:
        raise NameRefused(f"{field} {problem}; {FIX}", field=field)
    return value


def _pydantic_check(value: str) -> str:
    problem = name_problem(value)
    if problem is not None:
        raise ValueError(f"{problem}; {FIX}")
    return value


# pydantic field types for request bodies (the 422 handler prefixes the field name)
Name = Annotated[str, Field(min_length=1, max_length=120), AfterValidator(_pydantic_check)]
_USERNAME = re.compile(r"^[A-Za-z0-9_.@-]+$")


def _username_check(value: str) -> str:
    _pydantic_check(value)
    if not _USERNAME.match(value):
        raise ValueError("use only letters A-Z and a-z, digits and . _ @ -")
    return value


UserName = Annotated[str, Field(min_length=1, max_length=80), AfterValidator(_username_check)]


def header_safe(value: object, limit: int = 250) -> str:
    """One header-safe line: every forbidden character becomes a space, runs of spaces collapse."""
    text = _FORBIDDEN.sub(" ", str(value))
    text = re.sub(r"\s+", " ", text).strip()
    return text[:limit]


_GUARDED = False


def guard_models() -> None:
    """Refuse forbidden characters on every ORM write of a name column (idempotent)."""
    global _GUARDED
    if _GUARDED:
        return
    from sqlalchemy import event

    from server.storage.tables import ApiKey, Area, Asset, Point, Route, Site, User

    columns = [(Site.name, "name"), (Area.name, "name"), (Asset.name, "name"), (Point.name, "name"),
               (Route.name, "name"), (User.username, "username"), (ApiKey.name, "name")]
    for attribute, field in columns:
        def on_set(target, value, oldvalue, initiator, field=field):
            if isinstance(value, str):
                check_name(value, field)
            return value

        event.listen(attribute, "set", on_set, retval=True)
    _GUARDED = True
