"""The OpenAPI 3.1 document: built from the validating schemas, covering every route; fuzzed by schemathesis.

The fuzz test is the hostile-input run: at least 1,000 cases over every operation, positive (schema-valid) and
negative (schema-violating) data, each checked by schemathesis' built-in checks: no 5xx, status codes, content
types, headers and bodies conform to the document, schema-violating requests are refused, missing or invalid
auth is refused. Seeded (``derandomize=True``), so a failure reproduces. It runs on SQLite only: the fuzzer
exercises validation, auth and routing, which do not depend on the backend, and its budget is about 30 s.
"""

from __future__ import annotations

import re

import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode

from fusion import create_app
from fusion.api import schemas
from fusion.api.openapi import build_spec
from fusion.db import upgrade
from tests.conftest import ADMIN, PLAN, READER


def test_document_is_openapi_3_1_and_served(client):
    doc = client.get("/api/v1/openapi.json").json
    assert doc["openapi"] == "3.1.0"
    assert doc == build_spec()


def test_every_route_is_documented(app):
    documented = {(path, method) for path, ops in build_spec()["paths"].items() for method in ops}
    for rule in app.url_map.iter_rules():
        if rule.endpoint == "static" or rule.endpoint.startswith("web."):  # the dashboard page is not API
            continue
        path = re.sub(r"<(?:\w+:)?(\w+)>", r"{\1}", rule.rule)
        for method in rule.methods - {"HEAD", "OPTIONS"}:
            assert (path, method.lower()) in documented, (path, method)


def test_request_schemas_are_the_validating_models():
    spec = build_spec()
    comp = spec["components"]["schemas"]
    assert comp["ReportIn"]["properties"]["n_samples"]["minimum"] == 1
    assert comp["ReportIn"]["additionalProperties"] is False  # extra="forbid" in the model
    assert set(comp["ReportIn"]["required"]) == {
        name for name, f in schemas.ReportIn.model_fields.items() if f.is_required()}


MIN_CASES = 1_000
# Examples per operation and mode: 16 operations x 2 modes x 70 = 2,240 cases (hypothesis may stop early on
# an operation with a small input space, e.g. one without parameters; the total is asserted below).
EXAMPLES = 70

# Schema-valid requests the document cannot tell from invalid ones, refused with 422 on purpose: a report that
# names a channel the current plan does not have or is timed too far in the future, a plan whose channel ids
# repeat, a history query with since after until. JSON Schema cannot state "in the current plan" or "ids
# unique by property", so the positive-data check accepts a 422 as well (it still fails any 5xx, 400 or 415).
CONFIG = """
[checks.positive_data_acceptance]
expected-statuses = ["2xx", "401", "403", "404", "409", "422"]
"""


@pytest.fixture(scope="module")
def fuzz_app(tmp_path_factory):
    url = f"sqlite:///{tmp_path_factory.mktemp('fuzz') / 'fuzz.db'}"
    upgrade(url)
    # No scheduler runs here, so /healthz would rightly turn "not ready" (503) once the run outlasts the
    # default epoch-age bound; readiness has its own tests (test_health.py), so the bound is a day here.
    app = create_app({"DATABASE_URL": url, "ADMIN_TOKEN": ADMIN, "READ_TOKEN": READER, "TESTING": True,
                      "READY_MAX_EPOCH_AGE_S": 86_400.0})
    client = app.test_client()
    admin = {"Authorization": f"Bearer {ADMIN}"}
    assert client.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
    node_token = client.post("/api/v1/nodes", json={"name": "fuzz-node"}, headers=admin).json["token"]
    yield app, {"admin": ADMIN, "reader": READER, "node": node_token}
    app.extensions["occfuse.engine"].dispose()


def test_every_operation_survives_generated_requests(fuzz_app):
    app, tokens = fuzz_app
    schema = schemathesis.openapi.from_wsgi("/api/v1/openapi.json", app,
                                            config=schemathesis.config.SchemathesisConfig.from_str(CONFIG))

    @schema.auth()
    class Bearer:
        """The token of the role the operation declares (its first non-empty security requirement)."""

        def get(self, case, ctx):
            for requirement in case.operation.definition.raw.get("security", []):
                for name in requirement:
                    return tokens[name]
            return None

        def set(self, case, data, ctx):
            if data:
                case.headers = {**(case.headers or {}), "Authorization": f"Bearer {data}"}

    operations = [result.ok() for result in schema.get_all_operations()]
    # Every documented operation but the document itself, which schemathesis leaves out
    # (test_every_route_is_documented checks that the document covers every route).
    documented = {f"{m.upper()} {p}" for p, ops in build_spec()["paths"].items() for m in ops}
    assert {op.label for op in operations} == documented - {"GET /api/v1/openapi.json"}
    cases = 0
    failures = []
    for op in operations:
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):

            @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
                      suppress_health_check=list(HealthCheck))
            @given(case=op.as_strategy(generation_mode=mode, auth_storage=schema.auth))
            def run(case):
                nonlocal cases
                cases += 1
                try:
                    case.call_and_validate()
                except (Exception, BaseExceptionGroup) as exc:  # collect all, report the first few
                    failures.append(f"{op.label} [{mode.value}]: {str(exc)[:600]}")

            try:
                run()
            except Unsatisfiable:
                # Nothing to violate: an operation without parameters or body has no negative cases.
                raw = op.definition.raw
                assert mode is GenerationMode.NEGATIVE and not raw.get("parameters") and "requestBody" not in raw
    assert not failures, f"{len(failures)} failing cases:\n" + "\n".join(failures[:5])
    assert cases >= MIN_CASES, cases
