"""The dashboard page at ``/`` and its three assets (script, style sheet, icon).

Authentication follows the read API (fusion/api/auth.py). When no ``READ_TOKEN`` is configured, reads are open:
the page is rendered with the current data and its script polls the API without a token. When one is configured,
the page shell carries no data at all; the script asks for the read token, keeps it in the tab's
``sessionStorage`` and sends it as a bearer token. No token is ever written into the page.
"""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, current_app, render_template, send_from_directory
from sqlalchemy import select

from ..api.auth import role
from ..api.nodes import node_view
from ..api.schemas import ChannelsOut, FusionSettingsOut, NodeList
from ..db import get_session
from ..decisions import latest_states
from ..models import Node, NodeReliability
from ..settings import get_settings, settings_dict

__all__ = ["bp", "initial_data", "SECURITY_HEADERS"]

STATIC = Path(__file__).parent / "static"

bp = Blueprint("web", __name__, template_folder="templates")

# Same-origin only: the page loads its own script and style and talks to its own API; nothing else.
SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
                               "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
}


def initial_data(session) -> dict:
    """What the first render shows, in exactly the JSON shapes the API answers with (the script reuses them)."""
    rows = session.execute(select(Node, NodeReliability).outerjoin(NodeReliability).order_by(Node.name)).all()
    settings = get_settings(session, current_app.config)
    return {
        "channels": ChannelsOut.model_validate(latest_states(session)).model_dump(mode="json"),
        "nodes": NodeList.model_validate({"nodes": [node_view(n, r) for n, r in rows]}).model_dump(mode="json"),
        "fusion": FusionSettingsOut.model_validate({**settings_dict(settings), "updated_at": settings.updated_at,
                                                    "warnings": []}).model_dump(mode="json"),
    }


@bp.get("/")
@role("public")
def index():
    locked = bool(current_app.config.get("READ_TOKEN"))
    data = None
    if not locked:
        session = get_session()
        data = initial_data(session)
        session.commit()  # a new database gets its settings row here, as GET /api/v1/fusion does
    response = current_app.make_response(render_template("dashboard.html", data=data, locked=locked))
    response.headers.update(SECURITY_HEADERS)
    response.headers["Cache-Control"] = "no-store"
    return response


@bp.get("/dashboard/<any('dashboard.js', 'dashboard.css', 'favicon.svg'):name>")
@role("public")
def asset(name: str):
    response = send_from_directory(STATIC, name, max_age=300)
    response.headers.update(SECURITY_HEADERS)
    return response
