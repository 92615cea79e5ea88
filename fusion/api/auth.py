"""Bearer-token roles: admin (configured token), node (registered tokens), reader (open unless READ_TOKEN is set).

Every view declares its role with :func:`role`; a view without one is admin-only, so a new route is
protected by default. Tokens are never logged: only the node's name goes into ``g``.
"""

from __future__ import annotations

from flask import current_app, g, request

from ..db import get_session
from ..errors import Forbidden, Unauthorized
from ..registry import node_by_token, same_secret

__all__ = ["role", "init_app", "bearer_token"]

ROLES = ("public", "reader", "node", "admin")


def role(name: str):
    """Mark a view as needing `name` (one of ROLES)."""
    assert name in ROLES

    def mark(view):
        view.required_role = name
        return view

    return mark


def bearer_token() -> str | None:
    scheme, _, token = request.headers.get("Authorization", "").partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        return None
    return token.strip()


def _check() -> None:
    view = current_app.view_functions.get(request.endpoint) if request.endpoint else None
    if view is None:  # 404 / 405 are answered by the routing error itself
        return
    needed = getattr(view, "required_role", "admin")
    if needed == "public":
        return
    token = bearer_token()
    admin = current_app.config.get("ADMIN_TOKEN")
    if needed == "reader":
        reader = current_app.config.get("READ_TOKEN")
        if not reader:
            return
        if token is None:
            raise Unauthorized("reads need a bearer token on this server (Authorization: Bearer <read token>)")
        if not (same_secret(token, reader) or same_secret(token, admin)):
            raise Unauthorized("the bearer token is not valid for reading")
        return
    if token is None:
        raise Unauthorized(f"this route needs a bearer token (Authorization: Bearer <{needed} token>)")
    if needed == "admin":
        if not admin:
            raise Forbidden("admin routes are disabled: no admin token is configured (set OCCFUSE_ADMIN_TOKEN)")
        if not same_secret(token, admin):
            if node_by_token(get_session(), token) is not None:
                raise Forbidden("this route needs the admin token; a node token cannot do it")
            raise Unauthorized("the bearer token is not the admin token")
        return
    # node
    node = node_by_token(get_session(), token)
    if node is None:
        if same_secret(token, admin):
            raise Forbidden("reports must be posted with the node's own token, not the admin token")
        raise Unauthorized("the bearer token matches no node; register the node (occfuse node add NAME)")
    if node.disabled:
        raise Forbidden(f"node {node.name!r} is disabled; an admin can re-enable it")
    g.node_id = node.id


def init_app(app) -> None:
    app.before_request(_check)
