"""The OpenAPI 3.1 document: built from the validating schemas, covering every route; fuzzed by schemathesis."""

from __future__ import annotations

import re

import pytest

from fusion.api import schemas
from fusion.api.openapi import build_spec


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


def test_api_survives_schemathesis_fuzzing(app, net, admin):
    """Property-based fuzzing (schemathesis): no 500, and answers conform to the document. Seeded, few examples."""
    schemathesis = pytest.importorskip("schemathesis")
    from hypothesis import HealthCheck, settings

    schema = schemathesis.openapi.from_wsgi("/api/v1/openapi.json", app)
    failures = []
    for op_result in schema.get_all_operations():
        op = op_result.ok()

        @settings(max_examples=8, deadline=None, derandomize=True, database=None,
                  suppress_health_check=list(HealthCheck))
        def check(case):
            case.headers = {**(case.headers or {}), "Authorization": admin["Authorization"]}
            response = case.call()
            if response.status_code >= 500:
                failures.append((op.label, response.status_code, response.text[:200]))

        from hypothesis import given

        given(op.as_strategy())(check)()
    assert failures == []
