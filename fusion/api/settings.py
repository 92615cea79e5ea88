"""/api/v1/fusion: the live fusion rule and parameters; a PUT applies from the next epoch."""

from __future__ import annotations

from flask import Blueprint, current_app

from ..db import get_session
from ..settings import get_settings, settings_dict, settings_warnings, update_settings
from .auth import role
from .problems import read_body, respond
from .schemas import FusionSettingsIn, FusionSettingsOut

__all__ = ["bp"]

bp = Blueprint("fusion_settings", __name__, url_prefix="/api/v1/fusion")


def _view(row) -> dict:
    values = settings_dict(row)
    return {**values, "updated_at": row.updated_at, "warnings": settings_warnings(values, current_app.config)}


@bp.get("")
@role("reader")
def show():
    session = get_session()
    row = get_settings(session, current_app.config)
    session.commit()
    return respond(FusionSettingsOut, _view(row))


@bp.put("")
@role("admin")
def replace():
    body = read_body(FusionSettingsIn)
    session = get_session()
    row = update_settings(session, current_app.config, body)
    session.commit()
    return respond(FusionSettingsOut, _view(row))
