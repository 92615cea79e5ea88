"""The dashboard: one server-rendered page at ``/`` that then polls the read API (see :mod:`.dashboard`)."""

from __future__ import annotations

__all__ = ["init_app"]


def init_app(app) -> None:
    """Register the dashboard blueprint on `app`."""
    from . import dashboard

    app.register_blueprint(dashboard.bp)
