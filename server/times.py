"""Times given to the API: one rule for what a stored or compared time may be.

Every time is kept as UTC (``server.storage.tables.UTCDateTime``). A time whose zone pushes it past the
years 1 to 9999 once turned to UTC (``0001-01-01T00:00:00+05:00`` is year 0 in UTC) cannot be stored or
compared; Python raises OverflowError. :data:`ApiTime` refuses it at the edge, so the caller gets a 422
naming the field instead of a 500 from deep inside a query.
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Annotated

from pydantic import AfterValidator, AwareDatetime, BeforeValidator

OUT_OF_RANGE = ("is outside the years 1 to 9999 once turned to UTC; give a time such as "
                "2026-03-01T08:00:00Z")


def to_utc(value: dt.datetime) -> dt.datetime:
    """The same instant in UTC; ValueError (with :data:`OUT_OF_RANGE`) if it has none."""
    try:
        return value.astimezone(dt.UTC)
    except OverflowError:
        raise ValueError(OUT_OF_RANGE) from None


NOT_A_NUMBER = ("is a bare number; give an ISO 8601 time with a zone, e.g. 2026-03-01T08:00:00Z (a number "
                "is refused: seconds or milliseconds since 1970 cannot be told apart)")
_NUMBER = re.compile(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$")


def no_bare_number(value):
    """Refuse 1767225600 or "1767225600" (pydantic would read it as Unix seconds)."""
    text = value.decode("latin-1") if isinstance(value, bytes) else value
    if isinstance(value, int | float) or (isinstance(text, str) and _NUMBER.match(text)):
        raise ValueError(NOT_A_NUMBER)
    return value


#: an ISO 8601 time with a zone, as UTC, for query parameters and bodies (never a bare number)
ApiTime = Annotated[AwareDatetime, BeforeValidator(no_bare_number), AfterValidator(to_utc)]
