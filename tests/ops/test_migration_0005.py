"""Alembic revision 0005 on a database with version 1.0 results: typed columns filled, JSON keys renamed.

Reference for the r.m.s. columns: a sine's r.m.s. is its peak / sqrt 2 (handbook relation). The stored
rows are invented; the 1.0 keys are those the analysis wrote before every amplitude named its measure.
"""

from __future__ import annotations

import json
import math

import pytest
import sqlalchemy as sa

from server.migrations import alembic_config, upgrade

V1 = {"version": "1.0", "units": "g",
      "subharmonic": {"detected": True, "amplitude": 0.02, "velocity_mm_s": 2.0,
                      "precursor": {"narrow_rate_per_s": 0.7}},
      "orders": {"1X": {"amplitude": 0.4, "velocity_mm_s": 5.0},
                 "2X": {"amplitude": 0.1, "velocity_mm_s": None}},
      "growth": {"end_amplitude": 0.03}, "overall": {"zone_limits_mm_s": [1.4, 2.8, 4.5]},
      "waveform": {"rms": 0.5, "peak": 1.5}, "tones": [{"amplitude": 0.2}]}


def _seed(engine) -> None:
    """One results row (SQLite does not enforce the foreign keys on this plain connection)."""
    with engine.begin() as c:
        c.execute(sa.text("INSERT INTO results (record_id, point_id, measured_ts, analysis_version, current, "
                          "created_at, data, spectrum, sub_detected, sub_amplitude, sub_velocity_mm_s, "
                          "quality_ok) VALUES (1, 1, 0, '1.0', 1, '2026-01-01 00:00:00', :d, :b, 1, 0.02, "
                          "2.0, 1)"), {"d": json.dumps(V1), "b": b""})


def test_0005_fills_typed_columns_and_renames_the_json_keys(tmp_path):
    from alembic import command

    url = f"sqlite:///{tmp_path / 'old.db'}"
    upgrade(url, "0004")
    engine = sa.create_engine(url)
    try:
        _seed(engine)
    except sa.exc.DBAPIError as exc:  # the fixture rows must fit the 0004 schema
        pytest.fail(f"seed rows do not fit revision 0004: {exc}")
    upgrade(url, "0005")
    with engine.connect() as c:
        row = c.execute(sa.text("SELECT sub_accel_peak, sub_velocity_peak_mm_s, sub_velocity_rms_mm_s, "
                                "one_x_accel_peak, one_x_velocity_rms_mm_s, precursor_rate_per_s, data "
                                "FROM results")).one()
    assert row[0] == 0.02 and row[1] == 2.0
    assert row[2] == pytest.approx(2.0 / math.sqrt(2.0), rel=1e-12)  # peak / sqrt 2
    assert row[3] == 0.4 and row[4] == pytest.approx(5.0 / math.sqrt(2.0), rel=1e-12)
    assert row[5] == 0.7
    data = json.loads(row[6])
    assert data["version"] == "2.0" and data["upgraded_from"] == "1.0"
    assert data["subharmonic"]["velocity_peak_mm_s"] == 2.0 and "velocity_mm_s" not in data["subharmonic"]
    assert data["orders"]["2X"]["velocity_rms_mm_s"] is None
    assert data["overall"]["zone_limits_rms_mm_s"] == [1.4, 2.8, 4.5]
    assert data["waveform"] == {"accel_rms": 0.5, "accel_peak": 1.5}
    assert data["tones"] == [{"accel_peak": 0.2}] and data["growth"] == {"end_accel_peak": 0.03}
    # and back: the 1.0 keys and columns return
    command.downgrade(alembic_config(url), "0004")
    with engine.connect() as c:
        back = c.execute(sa.text("SELECT sub_amplitude, sub_velocity_mm_s, data FROM results")).one()
    engine.dispose()
    assert back[0] == 0.02 and back[1] == 2.0
    assert json.loads(back[2]) == V1
