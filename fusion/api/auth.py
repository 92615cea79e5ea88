"""Bearer-token roles: admin (configured token), node (registered tokens), reader (open unless READ_TOKEN is set).

Every view declares its role with :func:`role`; a view without one is admin-only, so a new route is
protected by default. Tokens are never logged: only the node's name goes into ``g``.
"""

from __future__ import annotations

from flask import current_app, g, request

from sqlalchemy import bindparam, select

from ..errors import Forbidden, Unauthorized
from ..models import Node
from ..registry import hash_token, same_secret

__all__ = ["role", "init_app", "bearer_token", "forget", "check_node_again"]

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


_BY_TOKEN = (select(Node.__table__.c.id, Node.__table__.c.name, Node.__table__.c.disabled)
             .where(Node.__table__.c.token_hash == bindparam("token_hash")))  # built once: it runs per request


def _node_for(token: str):
    """(id, name, disabled) of the node whose token this is, or None. A short Core read, never the write
    lock."""
    with current_app.extensions["occfuse.read_engine"].connect() as conn:
        row = conn.execute(_BY_TOKEN, {"token_hash": hash_token(token)}).first()
    return None if row is None else tuple(row)


_CACHE_MAX = 10_000  # enabled nodes remembered per app (a network has 5 to 1,000)


def _cached_node(token_hash: str):
    """(id, name) of an enabled node this process has seen with this token hash, or None.

    Only for the report route: a hit is confirmed inside the report's own write transaction
    (fusion/store.py, step 3), so a rotated token or a disabled node is refused there, and :func:`forget`
    drops the stale entry.
    """
    return current_app.extensions["occfuse.node_cache"].get(token_hash)


def forget(token_hash: str) -> None:
    """Drop a cached node (its token or state changed)."""
    current_app.extensions["occfuse.node_cache"].pop(token_hash, None)


def check_node_again() -> None:
    """Redo the node check from the database (after :class:`fusion.store.StaleNode`): raises 401 or 403 as
    :func:`_check` would, or sets ``g.node_*`` afresh."""
    forget(g.node_token_hash)
    _check()


def _who(token: str) -> tuple[str | None, tuple | None]:
    """Which role a presented token proves ("admin", "reader", "node" or None), and the node if it is one."""
    if same_secret(token, current_app.config.get("ADMIN_TOKEN")):
        return "admin", None
    if same_secret(token, current_app.config.get("READ_TOKEN")):
        return "reader", None
    node = _node_for(token)
    return ("node" if node else None), node


def _check() -> None:
    """401 when no token or one matching nobody; 403 when a valid token of another role (see the README table)."""
    view = current_app.view_functions.get(request.endpoint) if request.endpoint else None
    if view is None:  # 404 / 405 are answered by the routing error itself
        return
    needed = getattr(view, "required_role", "admin")
    if needed == "public" or (needed == "reader" and not current_app.config.get("READ_TOKEN")):
        return  # reads are open unless a read token is configured; a presented token is then ignored
    token = bearer_token()
    if token is None:
        raise Unauthorized(f"this route needs a bearer token (Authorization: Bearer <{needed} token>)")
    if needed == "admin" and not current_app.config.get("ADMIN_TOKEN"):
        raise Forbidden("admin routes are disabled: no admin token is configured (set OCCFUSE_ADMIN_TOKEN)")
    if needed == "node":
        token_hash = hash_token(token)
        hit = _cached_node(token_hash)
        if hit is not None and not same_secret(token, current_app.config.get("ADMIN_TOKEN")) \
                and not same_secret(token, current_app.config.get("READ_TOKEN")):
            g.node_id, g.node_name = hit
            g.node_token_hash = token_hash
            return
    who, node = _who(token)
    if who is None:
        raise Unauthorized(f"the bearer token matches no {needed} and no node; check the token "
                           f"(a node's token changes when it is rotated)")
    if needed == "reader":
        if who == "node":
            raise Forbidden("a node token cannot read; use the read token (OCCFUSE_READ_TOKEN) or the admin token")
        return
    if needed == "admin":
        if who != "admin":
            raise Forbidden(f"this route needs the admin token; a {who} token cannot do it")
        return
    # needed == "node"
    if who != "node":
        raise Forbidden(f"reports must be posted with the node's own token, not the {who} token")
    node_id, name, disabled = node
    if disabled:
        raise Forbidden(f"node {name!r} is disabled; an admin can re-enable it")
    g.node_id, g.node_name = node_id, name
    g.node_token_hash = token_hash
    cache = current_app.extensions["occfuse.node_cache"]
    if len(cache) >= _CACHE_MAX:
        cache.clear()
    cache[token_hash] = (node_id, name)


def init_app(app) -> None:
    app.extensions["occfuse.node_cache"] = {}  # token hash -> (id, name); see _cached_node
    app.before_request(_check)
