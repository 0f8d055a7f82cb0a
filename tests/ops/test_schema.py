"""schemathesis against the OpenAPI schema of a real uvicorn on 127.0.0.1: no 5xx, and every response
matches what the schema documents (status codes, the one error shape, content types).

Settings are in schemathesis.toml (bounded by max-examples; no time budget). The caller is an admin
API key, so every operation is reachable; revoking keys and logging out are left out (they would end the
run's own credentials) and are covered by tests/ops/test_security.py.
"""

from __future__ import annotations

import pytest
import schemathesis
from hypothesis import HealthCheck, settings

pytestmark = pytest.mark.slow


@pytest.fixture
def live_schema(db_backend, app, plant, live_server):
    from server.services.users import create_api_key

    if db_backend == "postgresql":  # one schema for both; the PostgreSQL paths are tested elsewhere
        pytest.skip("schemathesis runs once, on SQLite")

    key, _ = create_api_key(app.state.db, name="schema fuzz", role="admin")
    app.state.fuzz_headers = {"Authorization": f"Bearer {key}"}
    return schemathesis.openapi.from_url(f"{live_server}/openapi.json")


schema = (schemathesis.pytest.from_fixture("live_schema")
          .exclude(path="/api/v1/apikeys/{key_id}", method="DELETE")
          .exclude(path="/api/v1/session", method="DELETE"))


@schema.parametrize()
@settings(max_examples=3, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
def test_api_matches_its_schema_and_never_fails(case, app):
    from schemathesis.checks import not_a_server_error
    from schemathesis.specs.openapi.checks import (
        content_type_conformance,
        response_schema_conformance,
        status_code_conformance,
    )

    case.call_and_validate(headers=app.state.fuzz_headers, timeout=20,
                           checks=[not_a_server_error, status_code_conformance, content_type_conformance,
                                   response_schema_conformance])
