"""Shared by bench/workers.py and bench/load.py: a fresh database and a small invented plant."""

from __future__ import annotations

import uuid
from pathlib import Path

SPEED_HZ = 24.75


def fresh_database(tmp: Path, pg_url: str | None):
    """(url, cleanup) of an empty database: a SQLite file in tmp, or a new schema on ``pg_url``."""
    if not pg_url:
        return f"sqlite:///{(tmp / f'bench-{uuid.uuid4().hex[:8]}.db').as_posix()}", lambda: None
    from sqlalchemy import create_engine, text

    schema = f"bench_{uuid.uuid4().hex[:10]}"
    admin = create_engine(pg_url)
    with admin.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))

    def drop():
        with admin.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()

    sep = "&" if "?" in pg_url else "?"
    return f"{pg_url}{sep}options=-csearch_path%3D{schema}", drop


def migrated_plant(url: str, *, assets: int = 1, points: tuple[str, ...] = ("DE-H",)):
    """(Database, point ids): the schema, one site and area, ``assets`` pumps with the named points."""
    from server.migrations import upgrade
    from server.storage import Database
    from server.storage.tables import Area, Asset, Point, Site

    upgrade(url)
    db = Database(url)
    ids = []
    with db.unit_of_work() as s:
        site = Site(name="Bench works")
        s.add(site)
        s.flush()
        area = Area(site_id=site.id, name="Pump house")
        s.add(area)
        s.flush()
        for a in range(assets):
            asset = Asset(area_id=area.id, name=f"Pump {a + 1}", kind="pump", machine_group=2,
                          foundation="rigid", nominal_speed_hz=SPEED_HZ)
            s.add(asset)
            s.flush()
            for name in points:
                p = Point(asset_id=asset.id, name=name, units="m/s2")
                s.add(p)
                s.flush()
                ids.append(p.id)
    return db, ids
