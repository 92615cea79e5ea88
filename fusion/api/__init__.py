"""The HTTP API v1: one blueprint per resource, bearer auth, problem+json errors, the OpenAPI document."""

from __future__ import annotations

__all__ = ["init_app"]


def init_app(app) -> None:
    """Register error handlers, the auth check and every blueprint on `app`."""
    from . import auth, channels, health, nodes, openapi, plan, problems, reports, settings

    problems.init_app(app)
    auth.init_app(app)
    for module in (nodes, plan, reports, channels, settings, health, openapi):
        app.register_blueprint(module.bp)
