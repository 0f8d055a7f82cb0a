"""Request bodies of the API (pydantic). Responses are plain dicts documented by the routes."""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field

from server.names import Name, UserName  # the one control-character rule for names
from server.times import ApiTime

MachineKind = Literal["pump", "fan", "compressor", "gearbox", "reciprocating_compressor", "engine", "other"]


# a row id: positive and within the 64-bit signed range every backend stores (a larger one was a 500)
DbId = Annotated[int, Field(ge=1, le=2**63 - 1, strict=True)]


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class RecordJson(Strict):
    """One record as JSON: samples as base64 of little-endian floats, or as a list of numbers."""

    fs_hz: float = Field(gt=0, description="sample rate, Hz")
    units: str = Field(description="acceleration units: g, m/s2 or mm/s2")
    measured_at: ApiTime = Field(description="start of the record, ISO 8601 with a zone (not a number)")
    samples_b64: str | None = Field(default=None, description="base64 of little-endian float32 (or float64)")
    dtype: Literal["float32", "float64"] = "float32"
    samples: list[float] | None = Field(default=None, description="the samples as numbers (small records)")
    speed_hz: float | None = Field(default=None, description="shaft speed during the record, rev/s")
    speed_source: str | None = Field(default=None, max_length=32, description="tachometer, drive, ...")
    client_ref: str | None = Field(default=None, max_length=200, description="your id for safe retries")
    tach_pulses_s: list[float] | None = Field(
        default=None, max_length=1_000_000,
        description="tachometer pulse times, s from the first sample (or give tach_samples)")
    tach_samples: list[float] | None = Field(
        default=None, description="a tach pulse channel sampled with the samples, same length (or "
        "tach_pulses_s); its pulse times are taken at ingest")
    pulses_per_rev: int | None = Field(default=None, ge=1, le=360,
                                       description="tach pulses per shaft revolution (default 1)")
    tach_level: float | None = Field(default=None, description="trigger level of tach_samples (default: "
                                     "halfway up the pulses)")


class LoginBody(Strict):
    username: str = Field(min_length=1, max_length=80)
    password: str = Field(min_length=1, max_length=200)


class SiteIn(Strict):
    name: Name
    description: str = ""


class AreaIn(Strict):
    site_id: DbId
    name: Name
    description: str = ""


class AssetIn(Strict):
    area_id: DbId
    name: Name
    kind: MachineKind = "other"
    rated_power_kw: float | None = Field(default=None, gt=0)
    machine_group: Literal[1, 2] = 2
    foundation: Literal["rigid", "flexible"] = "rigid"
    nominal_speed_hz: float = Field(gt=0, le=2000, description="nominal shaft speed, rev/s")
    forcing_kind: Literal["shaft", "stroke", "mesh", "other"] = "shaft"
    forcing_multiplier: float = Field(default=1.0, gt=0, description="forcing = shaft speed x this")
    description: str = ""


class PointIn(Strict):
    asset_id: DbId
    name: Name
    location: str = ""
    direction: Literal["horizontal", "vertical", "axial", "radial", "other"] = "radial"
    sensitivity_mv_per_unit: float | None = Field(default=None, gt=0)
    units: Literal["g", "m/s2", "mm/s2"] = "m/s2"
    expected_fs_hz: float | None = Field(default=None, gt=0)


class RouteStopIn(Strict):
    point_id: DbId
    due_interval_h: float = Field(default=720.0, gt=0, description="hours between readings")


class RouteIn(Strict):
    site_id: DbId
    name: Name
    description: str = ""
    stops: list[RouteStopIn] = Field(default_factory=list, max_length=2000)


class UserIn(Strict):
    username: UserName
    password: str = Field(min_length=1, max_length=200, description="at least 8 characters; not the user "
                          "name, not a very common password, not one character repeated")
    role: Literal["viewer", "technician", "engineer", "admin"] = "viewer"
    email: str = ""
    site_id: DbId | None = Field(None, description="limit the user to this site; leave out for every site")


class ApiKeyIn(Strict):
    name: Name
    role: Literal["viewer", "technician", "engineer", "admin"] = "technician"
    site_id: DbId | None = None


def utc(value: dt.datetime) -> str:
    return value.astimezone(dt.UTC).isoformat().replace("+00:00", "Z")
