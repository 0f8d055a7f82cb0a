"""Generated requests against every alarm endpoint (schemathesis, in-process): never a server error."""

from __future__ import annotations

import pytest
import schemathesis
from alarms.helpers import Feeder, make_result
from hypothesis import HealthCheck, settings
from schemathesis.checks import not_a_server_error


@pytest.fixture
def alarm_schema(app, plant, hw_settings, migrated_db):
    from server.services.users import create_api_key

    feeder = Feeder(migrated_db, hw_settings)
    for v in (0.2, 0.3, 1.5, 1.6, 3.0, 3.1):  # some open alarms for the generated ids to hit
        feeder.feed(plant.point_id, make_result(half_v=v))
    key, _ = create_api_key(app.state.db, name="fuzz", role="engineer", site=None)
    app.state.fuzz_headers = {"Authorization": f"Bearer {key}"}
    return schemathesis.openapi.from_asgi("/openapi.json", app)


schema = schemathesis.pytest.from_fixture("alarm_schema").include(path_regex="^/api/v1/alarms")


@schema.parametrize()
@settings(max_examples=5, deadline=None, suppress_health_check=list(HealthCheck))
def test_alarm_endpoints_never_fail_with_5xx(case, app):
    case.call_and_validate(headers=app.state.fuzz_headers, checks=[not_a_server_error])
