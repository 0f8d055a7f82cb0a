"""API-key lookups are cached for ``api_key_cache_s`` (server/security.py KeyCache): a key revoked by another
process (here: a direct UPDATE, as `halfwatch apikey revoke` on another machine would make) is refused once
that time has passed; revoking through this process refuses it at once; 0 turns the cache off."""

from __future__ import annotations

import time

from fastapi.testclient import TestClient
from sqlalchemy import update
from support.fixtures import settings_for

from server.storage.tables import ApiKey, utcnow


def _app(tmp_path, migrated_db, ttl):
    from server.app import create_app

    return create_app(settings_for(tmp_path, api_key_cache_s=ttl))


def _revoke_elsewhere(db, key_id):
    with db.write() as conn:
        conn.execute(update(ApiKey.__table__).where(ApiKey.__table__.c.id == key_id)
                     .values(revoked_at=utcnow()))


def _key(app, plant):
    from server.services.users import create_api_key

    key, info = create_api_key(app.state.db, name="gateway B", role="technician", site=plant.site_id)
    return {"X-API-Key": key}, info["id"]


def test_a_key_revoked_elsewhere_is_refused_within_the_cache_time(tmp_path, migrated_db, plant):
    ttl = 1.5
    app = _app(tmp_path, migrated_db, ttl)
    headers, key_id = _key(app, plant)
    with TestClient(app) as c:
        assert c.get("/api/v1/tree", headers=headers).status_code == 200
        looked_up = time.monotonic()
        _revoke_elsewhere(migrated_db, key_id)
        # inside the cache time the earlier lookup still answers (this is what the cache saves) ...
        if time.monotonic() - looked_up < ttl * 0.8:
            assert c.get("/api/v1/tree", headers=headers).status_code == 200
        time.sleep(max(0.0, ttl - (time.monotonic() - looked_up)) + 0.05)
        # ... and once it has passed, the revocation holds
        r = c.get("/api/v1/tree", headers=headers)
        assert r.status_code == 401 and "revoked" in r.json()["error"]["message"]


def test_revoking_in_this_process_and_a_zero_cache_time_refuse_at_once(tmp_path, migrated_db, plant):
    from server.services.users import revoke_api_key

    app = _app(tmp_path, migrated_db, 60.0)
    headers, key_id = _key(app, plant)
    with TestClient(app) as c:
        assert c.get("/api/v1/tree", headers=headers).status_code == 200
        revoke_api_key(app.state.db, key_id)
        assert c.get("/api/v1/tree", headers=headers).status_code == 401
    app = _app(tmp_path, migrated_db, 0.0)
    headers, key_id = _key(app, plant)
    with TestClient(app) as c:
        assert c.get("/api/v1/tree", headers=headers).status_code == 200
        _revoke_elsewhere(migrated_db, key_id)
        assert c.get("/api/v1/tree", headers=headers).status_code == 401
