"""The one exception type for bad signals and bad files."""

from __future__ import annotations


class SignalError(ValueError):
    """A record or file that cannot be analysed.

    The message names the problem and the fix (for example "samples contain 3 non-finite values (NaN or
    inf); remove or interpolate them before upload"). ``field`` names the input that is wrong
    ("samples", "sample_rate_hz", "units", "file", "forcing_hz", ...) so the API can point at it.
    """

    def __init__(self, message: str, *, field: str = "samples") -> None:
        super().__init__(message)
        self.field = field

    @property
    def message(self) -> str:
        return str(self)
