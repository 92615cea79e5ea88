"""Every error is application/problem+json (RFC 9457) and says what was wrong."""

from __future__ import annotations


def test_unknown_path_is_a_404_problem(client):
    r = client.get("/api/v1/nothing-here")
    assert r.status_code == 404 and r.mimetype == "application/problem+json"
    assert r.json["status"] == 404 and "/api/v1/nothing-here" in r.json["detail"]


def test_wrong_method_is_405_with_allow_header(client):
    r = client.delete("/api/v1/channels")
    assert r.status_code == 405 and r.mimetype == "application/problem+json"
    assert "GET" in r.headers["Allow"]


def test_unhandled_exception_is_500_without_a_traceback(app, client, caplog):
    @app.get("/boom")
    def boom():  # a public route that fails, standing in for any bug
        raise RuntimeError("secret internal detail")

    boom.required_role = "public"
    r = client.get("/boom")
    assert r.status_code == 500 and r.mimetype == "application/problem+json"
    assert "secret internal detail" not in r.get_data(as_text=True)
    assert "Traceback" not in r.get_data(as_text=True)
    assert any("unhandled" in rec.getMessage() for rec in caplog.records)  # the operator still sees it


def test_problem_bodies_have_the_rfc_9457_members(client):
    body = client.get("/api/v1/nodes/nobody").json
    assert {"type", "title", "status", "detail"} <= set(body)
    assert body["type"] == "about:blank"
