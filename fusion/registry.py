"""Nodes and their tokens: registration, token rotation, lookup by token (plain functions over a session)."""

from __future__ import annotations

import hashlib
import hmac
import secrets

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from .errors import Conflict, NotFound
from .models import Node, NodeReliability

__all__ = ["new_token", "hash_token", "same_secret", "register_node", "rotate_token", "node_by_token",
           "node_by_name"]


def new_token() -> str:
    """A random 256-bit URL-safe bearer token."""
    return secrets.token_urlsafe(32)


def hash_token(token: str) -> str:
    """sha256 hex digest; enough for 256-bit random tokens (no slow hash needed)."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def same_secret(given: str, expected: str | None) -> bool:
    """Constant-time comparison of a presented token with a configured one."""
    if not expected:
        return False
    return hmac.compare_digest(hash_token(given), hash_token(expected))


def register_node(session: Session, name: str, *, lat=None, lon=None, x_m=None, y_m=None) -> tuple[Node, str]:
    """Create a node and return it with its token (the only time the token exists in clear)."""
    token = new_token()
    node = Node(name=name, token_hash=hash_token(token), lat=lat, lon=lon, x_m=x_m, y_m=y_m)
    session.add(node)
    try:
        session.flush()
    except IntegrityError:
        session.rollback()
        raise Conflict(f"a node named {name!r} already exists; pick another name or rotate its token "
                       f"with POST /api/v1/nodes/{name}/token",
                       errors=[{"path": "name", "message": "already taken"}]) from None
    session.add(NodeReliability(node_id=node.id, flags=[], state={}))
    return node, token


def node_by_name(session: Session, name: str) -> Node:
    node = session.scalars(select(Node).where(Node.name == name)).one_or_none()
    if node is None:
        raise NotFound(f"no node named {name!r}")
    return node


def rotate_token(session: Session, name: str) -> str:
    """Give node `name` a new token; the old one stops working at once."""
    node = node_by_name(session, name)
    token = new_token()
    node.token_hash = hash_token(token)
    return token


def node_by_token(session: Session, token: str) -> Node | None:
    return session.scalars(select(Node).where(Node.token_hash == hash_token(token))).one_or_none()
