"""Property-based requests generated from the live OpenAPI schema (/api/schema/).

Every operation is called with generated data by a signed-in lead: no answer may be a
server error, and documented answers must match their schema. Bounded to a few examples
per operation so it runs in CI.
"""

from __future__ import annotations

import pytest
import schemathesis
from django.core.cache import cache
from hypothesis import HealthCheck, given, settings
from rest_framework.authtoken.models import Token
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
)

from config.wsgi import application
from tests.api import build_world

pytestmark = pytest.mark.django_db
EXAMPLES = 8


@pytest.fixture(autouse=True)
def _keep_test_connection():
    """Requests go straight to the WSGI application, which closes database connections
    at the end of each request; the test's connection holds its transaction, so keep it
    open as Django's own test client does."""
    from django.core.signals import request_finished, request_started
    from django.db import close_old_connections

    request_started.disconnect(close_old_connections)
    request_finished.disconnect(close_old_connections)
    yield
    request_started.connect(close_old_connections)
    request_finished.connect(close_old_connections)


def test_no_server_error_and_responses_conform():
    world = build_world()
    token = Token.objects.create(user=world.users["lead"])
    auth = {"Authorization": f"Token {token.key}"}
    schema = schemathesis.openapi.from_wsgi("/api/schema/?format=json", application,
                                            headers=auth)
    operations = [op.ok() for op in schema.get_all_operations()]
    assert len(operations) > 40
    seen = []

    for operation in operations:
        @given(case=operation.as_strategy())
        @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
                  suppress_health_check=list(HealthCheck))
        def run(case):
            cache.clear()
            response = case.call(headers=auth)
            seen.append(response.status_code)
            assert response.status_code < 500, (case.method, case.formatted_path,
                                                response.text[:500])
            case.validate_response(response, checks=[response_schema_conformance,
                                                     content_type_conformance])

        run()
    assert len(seen) >= len(operations)
    assert any(code < 300 for code in seen)
