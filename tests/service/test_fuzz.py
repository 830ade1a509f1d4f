"""Contract fuzzing: schemathesis generates requests from the service's own /openapi.json (valid and
invalid ones) and checks every answer: no 5xx, a documented status code and content type, a body
matching its declared schema, and invalid input refused with a 4xx. In process (ASGI), a bounded
number of examples per operation, derandomized so a run repeats.

Two of schemathesis's checks are left out, with reasons: "positive data acceptance" (a request the
schema allows may still be refused on meaning: settings a model does not have, a scene folder that
does not exist, a version that was never published: 404 or 422 by design), and "Allow header
conformance" (OPTIONS is not an operation of this API)."""
import pytest
from api_helpers import KEY, LIMITS

schemathesis = pytest.importorskip("schemathesis")
from hypothesis import HealthCheck, settings  # noqa: E402
from schemathesis.checks import not_a_server_error  # noqa: E402
from schemathesis.specs.openapi.checks import (  # noqa: E402
    content_type_conformance,
    negative_data_rejection,
    response_schema_conformance,
    status_code_conformance,
)

from geotween.service.api import create_app  # noqa: E402
from geotween.service.settings import Settings  # noqa: E402

CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance, response_schema_conformance,
          negative_data_rejection]


@pytest.fixture(scope="module")
def api_schema(registry):
    app = create_app(Settings(registry=registry.root, api_keys=[KEY], **LIMITS))
    return schemathesis.openapi.from_asgi("/openapi.json", app)


schema = schemathesis.pytest.from_fixture("api_schema")


@schema.parametrize()
@settings(max_examples=12, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
def test_every_operation_answers_within_its_contract(case):
    case.call_and_validate(headers={"Authorization": f"Bearer {KEY}"}, checks=CHECKS)
