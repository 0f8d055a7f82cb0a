"""Response models of the API: what ``/openapi.json`` promises a client for each success answer.

The dashboard's chart answers are typed field by field, each amplitude naming its measure. Every other
JSON operation that declares no model of its own gets :class:`OkAnswer` (the common envelope: ``ok`` and
the operation's fields) from :func:`server.routes.discover`, so no success response is undocumented.
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field


class OkAnswer(BaseModel):
    """The common envelope of a success answer: ``ok`` true and the operation's own fields."""

    model_config = ConfigDict(extra="allow")
    ok: bool | None = Field(None, description="true for a success answer")


class SeriesValues(BaseModel):
    """One chart series: per reading ``mean`` only; per time bucket ``min``, ``max`` and ``mean``."""

    mean: list[float | None]
    min: list[float | None] | None = None
    max: list[float | None] | None = None


class ForecastLine(BaseModel):
    t: list[str | None]
    value: list[float]
    cross: str | None
    cross_lo: str | None
    cross_hi: str | None
    model_config = ConfigDict(extra="allow")


class TrendAnswer(BaseModel):
    """The trend of the half-order velocity r.m.s. and its forecast to the danger level: the same fit of
    the same 6-hour buckets as the alarm emails (``limit_iso`` is the date both give)."""

    model_config = ConfigDict(extra="allow")
    status: str | None
    message: str | None = None
    model: str | None = None
    growth_db_per_day: float | None = None
    days_to_limit: float | None = None
    days_to_limit_lo: float | None = None
    days_to_limit_hi: float | None = None
    limit_rms_mm_s: float | None = Field(None, description="the danger level, mm/s r.m.s.")
    limit_iso: str | None = Field(None, description="when the fitted trend reaches the danger level (UTC)")
    forecast: ForecastLine | None = None


class SeriesAnswer(BaseModel):
    """``GET /api/v1/dashboard/points/{id}/series``: every series names its measure in its key."""

    model_config = ConfigDict(extra="allow")
    ok: bool
    point_id: int
    start: str
    end: str
    max_points: int
    bucketed: bool
    n_source: int
    t: list[str | None]
    detected: list[bool]
    record_id: list[int] | None = Field(None, description="per reading (absent when bucketed)")
    count: list[int] | None = Field(None, description="readings per bucket (when bucketed)")
    units: dict[str, str] = Field(description="series name -> unit with its measure, e.g. 'mm/s r.m.s.'")
    half_order_velocity_rms_mm_s: SeriesValues
    one_x_velocity_rms_mm_s: SeriesValues
    half_order_to_1x_ratio: SeriesValues
    overall_velocity_rms_mm_s: SeriesValues
    growth_rate_per_s: SeriesValues
    forcing_hz: SeriesValues
    precursor_rate_per_s: SeriesValues
    trend: TrendAnswer


class WindowReading(BaseModel):
    t: str | None
    forcing_hz: float
    one_x_accel_peak: float = Field(description="1X acceleration peak, record units")
    present: bool
    half_order_accel_peak: float | None = Field(None, description="0.5X acceleration peak, record units")
    growth_per_s: float | None = None
    record_id: int
    model_config = ConfigDict(extra="allow")


class WindowAnswer(BaseModel):
    """``GET /api/v1/dashboard/points/{id}/window``: readings in (1X frequency, 1X acceleration peak)."""

    model_config = ConfigDict(extra="allow")
    ok: bool
    readings: list[WindowReading]
    today: WindowReading | None
    fit: dict
    conclusion: dict | None = Field(None, description="the plain conclusion at today's 1X acceleration peak "
                                    "(analysis.window.WindowConclusion: text, unstable band and its 95 % "
                                    "intervals in Hz and r/min, nearest stable speeds, skipped-speed range)")
