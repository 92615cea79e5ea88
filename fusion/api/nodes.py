"""/api/v1/nodes: register nodes, rotate tokens, list nodes with their reliability."""

from __future__ import annotations

from flask import Blueprint
from sqlalchemy import func, select

from ..db import get_session
from ..models import Node, NodeReliability, Report
from ..registry import node_by_name, register_node, rotate_token
from .auth import role
from .problems import read_body, respond
from .schemas import NodeCreated, NodeIn, NodeList, NodeOut, NodeUpdate, TokenOut

__all__ = ["bp", "node_view"]

bp = Blueprint("nodes", __name__, url_prefix="/api/v1/nodes")


def node_view(node: Node, rel: NodeReliability | None, last_seq: int | None = None) -> dict:
    def mean(a, b):
        return a / (a + b) if rel is not None and (a + b) > 0 else None

    return {"id": node.id, "name": node.name, "lat": node.lat, "lon": node.lon, "x_m": node.x_m, "y_m": node.y_m,
            "created_at": node.created_at, "last_seen": node.last_seen, "disabled": node.disabled,
            "trust": rel.trust if rel else None,
            "pd": mean(rel.pd_a, rel.pd_b) if rel else None, "pf": mean(rel.pf_a, rel.pf_b) if rel else None,
            "noise_dbm": rel.noise_dbm if rel else None, "flags": list(rel.flags or []) if rel else [],
            "pinned": rel.pinned if rel else None, "last_seq": last_seq}


def _last_seqs(session) -> dict[int, int]:
    return dict(session.execute(select(Report.node_id, func.max(Report.seq)).group_by(Report.node_id)).all())


@bp.post("")
@role("admin")
def create():
    body = read_body(NodeIn)
    session = get_session()
    node, token = register_node(session, body.name, lat=body.lat, lon=body.lon, x_m=body.x_m, y_m=body.y_m)
    session.commit()
    return respond(NodeCreated, {"id": node.id, "name": node.name, "token": token}, 201)


@bp.get("")
@role("reader")
def list_nodes():
    session = get_session()
    rows = session.execute(select(Node, NodeReliability).outerjoin(NodeReliability).order_by(Node.name)).all()
    seqs = _last_seqs(session)
    return respond(NodeList, {"nodes": [node_view(n, r, seqs.get(n.id)) for n, r in rows]})


@bp.get("/<name>")
@role("reader")
def show(name: str):
    session = get_session()
    node = node_by_name(session, name)
    last = session.scalar(select(func.max(Report.seq)).where(Report.node_id == node.id))
    return respond(NodeOut, node_view(node, session.get(NodeReliability, node.id), last))


@bp.patch("/<name>")
@role("admin")
def update(name: str):
    body = read_body(NodeUpdate)
    session = get_session()
    node = node_by_name(session, name)
    rel = session.get(NodeReliability, node.id) or NodeReliability(node_id=node.id, flags=[], state={})
    session.add(rel)
    if body.disabled is not None:
        node.disabled = body.disabled
    if body.pinned is not None:
        rel.pinned = body.pinned
    elif body.unpin:
        rel.pinned = None
    session.commit()
    return respond(NodeOut, node_view(node, rel))


@bp.post("/<name>/token")
@role("admin")
def new_token(name: str):
    session = get_session()
    token = rotate_token(session, name)
    session.commit()
    return respond(TokenOut, {"name": name, "token": token})
