"""Result metrics as typed columns that name their measure (peak / r.m.s., unit).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02

* ``results.sub_amplitude`` -> ``sub_accel_peak`` and ``sub_velocity_mm_s`` -> ``sub_velocity_peak_mm_s``
  (both were sine peaks); new real columns ``sub_velocity_rms_mm_s`` (peak / sqrt 2, what the charts and
  the half-order rule compare), ``one_x_accel_peak``, ``one_x_velocity_rms_mm_s`` and
  ``precursor_rate_per_s`` (read from the JSON once here, so no hot query parses JSON).
* The stored result JSON (``results.data``) is rewritten to the version 2.0 keys (``accel_peak``,
  ``velocity_peak_mm_s``, ``velocity_rms_mm_s``, ``zone_limits_rms_mm_s``, ...). The key map below is a
  frozen copy of ``analysis.result_compat`` at this revision, so the migration does not change when the
  library does.
"""

from __future__ import annotations

import json
import math

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

_NEW_COLUMNS = ("sub_velocity_rms_mm_s", "one_x_accel_peak", "one_x_velocity_rms_mm_s",
                "precursor_rate_per_s")
_SECTION_KEYS = (
    ("subharmonic", "amplitude", "accel_peak"),
    ("subharmonic", "velocity_mm_s", "velocity_peak_mm_s"),
    ("growth", "end_amplitude", "end_accel_peak"),
    ("overall", "zone_limits_mm_s", "zone_limits_rms_mm_s"),
    ("waveform", "rms", "accel_rms"),
    ("waveform", "peak", "accel_peak"),
)
_LINE_KEYS = (("amplitude", "accel_peak"), ("velocity_mm_s", "velocity_peak_mm_s"))
_BATCH = 2000


def _num(x):
    return float(x) if isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x) else None


def _ren(d, old, new):
    if isinstance(d, dict) and old in d and new not in d:
        d[new] = d.pop(old)


def _up(data: dict) -> dict:
    if str(data.get("version") or "1.0").split(".")[0] != "1":
        return data
    for section, old, new in _SECTION_KEYS:
        _ren(data.get(section), old, new)
    for line in [data.get("subharmonic"), *(data.get("orders") or {}).values()]:
        if isinstance(line, dict):
            for old, new in _LINE_KEYS:
                _ren(line, old, new)
            peak = _num(line.get("velocity_peak_mm_s"))
            line.setdefault("velocity_rms_mm_s", None if peak is None else peak / math.sqrt(2.0))
    for tone in data.get("tones") or []:
        _ren(tone, "amplitude", "accel_peak")
    data["upgraded_from"] = data.get("version") or "1.0"
    data["version"] = "2.0"
    return data


def _down(data: dict) -> dict:
    if data.get("version") != "2.0" or "upgraded_from" not in data:
        return data
    for section, old, new in _SECTION_KEYS:
        _ren(data.get(section), new, old)
    for line in [data.get("subharmonic"), *(data.get("orders") or {}).values()]:
        if isinstance(line, dict):
            for old, new in _LINE_KEYS:
                _ren(line, new, old)
            line.pop("velocity_rms_mm_s", None)
    for tone in data.get("tones") or []:
        _ren(tone, "accel_peak", "amplitude")
    data["version"] = data.pop("upgraded_from")
    return data


def _rewrite(bind, fn, with_columns: bool) -> None:
    results = sa.table("results", sa.column("id", sa.Integer), sa.column("data", sa.Text),
                       *[sa.column(c, sa.Float) for c in _NEW_COLUMNS[1:]])
    last = 0
    while True:
        rows = bind.execute(sa.select(results.c.id, results.c.data).where(results.c.id > last)
                            .order_by(results.c.id).limit(_BATCH)).all()
        if not rows:
            return
        updates = []
        for rid, text in rows:
            try:
                data = json.loads(text)
            except (TypeError, ValueError):
                continue
            if not isinstance(data, dict):
                continue
            data = fn(data)
            row = {"rid": rid, "data": json.dumps(data, separators=(",", ":"))}
            if with_columns:
                one_x = (data.get("orders") or {}).get("1X") or {}
                pre = (data.get("subharmonic") or {}).get("precursor") or {}
                row.update(one_x_accel_peak=_num(one_x.get("accel_peak")),
                           one_x_velocity_rms_mm_s=_num(one_x.get("velocity_rms_mm_s")),
                           precursor_rate_per_s=_num(pre.get("narrow_rate_per_s")))
            updates.append(row)
        if updates:
            values = {"data": sa.bindparam("data")}
            if with_columns:
                values.update({c: sa.bindparam(c) for c in _NEW_COLUMNS[1:]})
            stmt = results.update().where(results.c.id == sa.bindparam("rid")).values(**values)
            bind.execute(stmt, updates)
        last = rows[-1][0]


def upgrade() -> None:
    # RENAME COLUMN works in place on SQLite (3.25+) and PostgreSQL (fixed statements, no values)
    op.execute("ALTER TABLE results RENAME COLUMN sub_amplitude TO sub_accel_peak")
    op.execute("ALTER TABLE results RENAME COLUMN sub_velocity_mm_s TO sub_velocity_peak_mm_s")
    for name in _NEW_COLUMNS:
        op.add_column("results", sa.Column(name, sa.Float(), nullable=True))
    op.execute("UPDATE results SET sub_velocity_rms_mm_s = sub_velocity_peak_mm_s / sqrt(2.0)"
               if op.get_bind().dialect.name == "postgresql" else
               "UPDATE results SET sub_velocity_rms_mm_s = sub_velocity_peak_mm_s / 1.4142135623730951")
    _rewrite(op.get_bind(), _up, True)


def downgrade() -> None:
    _rewrite(op.get_bind(), _down, False)
    with op.batch_alter_table("results") as batch:
        for name in reversed(_NEW_COLUMNS):
            batch.drop_column(name)
    op.execute("ALTER TABLE results RENAME COLUMN sub_accel_peak TO sub_amplitude")
    op.execute("ALTER TABLE results RENAME COLUMN sub_velocity_peak_mm_s TO sub_velocity_mm_s")
