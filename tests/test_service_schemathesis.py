"""Property-based API tests generated from the service's own OpenAPI document (schemathesis).

For every operation in /v1/openapi.json, schemathesis generates requests from the documented
parameters and bodies (valid ones and, in its negative phase, invalid ones) and sends them over
real HTTP to a server process on 127.0.0.1. Checks, all schemathesis's own:

* not_a_server_error: no 5xx for any generated input (the issue's requirement);
* status_code_conformance: every status answered is documented for that operation;
* content_type_conformance and response_schema_conformance: the answer's media type and JSON
  match the document, so the document describes what the server really does.

The server has its own copy of the store: generated verdicts may be stored there.

The document is loaded with `schemathesis.openapi.from_dict` from the same function that serves
/v1/openapi.json (test_service_api.py checks that the served document lists exactly the routes),
not lazily from the running server: schemathesis 4.32's lazy loader (`pytest.from_fixture`)
reads a private attribute that pytest 9 no longer has (`Function._nodeid`).
"""

import pytest
import schemathesis
from hypothesis import HealthCheck, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from nearsight.indexer import __version__
from nearsight.service.openapi import openapi_document

from .service_support import API_KEY, ServerProcess

CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance, response_schema_conformance]


@pytest.fixture(scope="module")
def fuzz_server(service_store):
    server = ServerProcess(service_store.copy("fuzz"), env={"NEARSIGHT_MAX_UPLOAD_BYTES": str(512 * 1024)}).start()
    yield server
    server.stop()


schema = schemathesis.openapi.from_dict(openapi_document(__version__))


@schema.parametrize()
@settings(max_examples=30, deadline=None, derandomize=True, print_blob=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much, HealthCheck.function_scoped_fixture])
def test_generated_requests_get_documented_answers_and_never_a_5xx(case, fuzz_server):
    case.call_and_validate(base_url=fuzz_server.base, headers={"Authorization": f"Bearer {API_KEY}"},
                           checks=CHECKS, timeout=60)


@schema.parametrize()
@settings(max_examples=10, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much, HealthCheck.function_scoped_fixture])
def test_without_the_key_answers_are_documented_too(case, fuzz_server):
    """Anonymous callers (writes need the key): still no 5xx, and the 401s are documented."""
    case.call_and_validate(base_url=fuzz_server.base, checks=CHECKS, timeout=60)
