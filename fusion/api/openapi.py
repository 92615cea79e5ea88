"""/api/v1/openapi.json: an OpenAPI 3.1 document built from the same pydantic models that validate requests."""

from __future__ import annotations

from functools import lru_cache

from flask import Blueprint, current_app, jsonify
from pydantic.json_schema import models_json_schema

from . import schemas as s
from .auth import role

__all__ = ["bp", "build_spec"]

bp = Blueprint("openapi", __name__)

_P = {"description": "Problem details (RFC 9457)",
      "content": {"application/problem+json": {"schema": {"$ref": "#/components/schemas/Problem"}}}}
_BUSY = {"description": "The database is busy (another writer holds its lock) or unavailable; nothing was "
                         "stored; retry after Retry-After seconds",
         "headers": {"Retry-After": {"description": "Seconds to wait before retrying", "required": True,
                                     "schema": {"type": "integer", "minimum": 0}}},
         "content": {"application/problem+json": {"schema": {"$ref": "#/components/schemas/Problem"}}}}
_WRITE_ERRORS = {"400": _P, "401": _P, "403": _P, "413": _P, "415": _P, "422": _P, "503": _BUSY}
_READ_ERRORS = {"401": _P, "403": _P, "422": _P, "503": _BUSY}

_IN = [s.NodeIn, s.NodeUpdate, s.PlanIn, s.ReportIn, s.ReportBatchIn, s.FusionSettingsIn]
_OUT = [s.NodeCreated, s.TokenOut, s.NodeOut, s.NodeList, s.PlanOut, s.ReportAck, s.BatchAck, s.ChannelsOut,
        s.HistoryOut, s.FusionSettingsOut, s.Health, s.Problem]


@lru_cache(maxsize=2)
def build_spec(reads_need_token: bool = False) -> dict:
    """The document; `reads_need_token` (a READ_TOKEN is configured) makes the reader scheme required."""
    keymap, defs = models_json_schema([(m, "validation") for m in _IN] + [(m, "serialization") for m in _OUT],
                                      ref_template="#/components/schemas/{model}")

    def ref(model, mode="serialization"):
        return keymap[(model, mode)]

    def body(*models):
        schema = ref(models[0], "validation") if len(models) == 1 else {
            "oneOf": [ref(m, "validation") for m in models]}
        return {"required": True, "content": {"application/json": {"schema": schema}}}

    def ok(model, code="200", text="OK"):
        return {code: {"description": text, "content": {"application/json": {"schema": ref(model)}}}}

    admin, node = [{"admin": []}], [{"node": []}]
    reader = [{"reader": []}] if reads_need_token else [{}, {"reader": []}]
    name = {"name": "name", "in": "path", "required": True, "schema": {"type": "string", "pattern": s.NAME_PATTERN}}
    chan = {"name": "channel_id", "in": "path", "required": True, "schema": {"type": "string"}}
    query = lambda n, schema: {"name": n, "in": "query", "required": False, "schema": schema}  # noqa: E731
    paths = {
        "/api/v1/nodes": {
            "post": {"summary": "Register a node (its token is shown once)", "security": admin,
                     "requestBody": body(s.NodeIn), "responses": {**ok(s.NodeCreated, "201", "Created"),
                                                                  **_WRITE_ERRORS, "409": _P}},
            "get": {"summary": "Nodes with last seen, reliability and flags", "security": reader,
                    "responses": {**ok(s.NodeList), **_READ_ERRORS}}},
        "/api/v1/nodes/{name}": {
            "get": {"summary": "One node", "security": reader, "parameters": [name],
                    "responses": {**ok(s.NodeOut), **_READ_ERRORS, "404": _P}},
            "patch": {"summary": "Disable / enable a node, pin its trust", "security": admin, "parameters": [name],
                      "requestBody": body(s.NodeUpdate), "responses": {**ok(s.NodeOut), **_WRITE_ERRORS,
                                                                       "404": _P}}},
        "/api/v1/nodes/{name}/token": {
            "post": {"summary": "Issue a new token for a node (the old one stops working)", "security": admin,
                     "parameters": [name],
                     "responses": {**ok(s.TokenOut), "401": _P, "403": _P, "404": _P, "503": _BUSY}}},
        "/api/v1/plan": {
            "get": {"summary": "The current band plan", "security": reader,
                    "responses": {**ok(s.PlanOut), **_READ_ERRORS}},
            "put": {"summary": "Replace the band plan (a new revision)", "security": admin,
                    "requestBody": body(s.PlanIn), "responses": {**ok(s.PlanOut), **_WRITE_ERRORS}}},
        "/api/v1/reports": {
            "post": {"summary": "Post one report or a batch (all-or-nothing)", "security": node,
                     "requestBody": body(s.ReportIn, s.ReportBatchIn),
                     "responses": {"201": {"description": "Stored", "content": {"application/json": {
                         "schema": {"oneOf": [ref(s.ReportAck), ref(s.BatchAck)]}}}},
                         "200": {"description": "Already stored (same node, seq and content)",
                                 "content": {"application/json": {"schema": {
                                     "oneOf": [ref(s.ReportAck), ref(s.BatchAck)]}}}},
                         **_WRITE_ERRORS, "409": _P}}},
        "/api/v1/channels": {
            "get": {"summary": "Latest decision per channel", "security": reader,
                    "responses": {**ok(s.ChannelsOut), **_READ_ERRORS}}},
        "/api/v1/channels/free": {
            "get": {"summary": "Channels free now with at least min_confidence", "security": reader,
                    "parameters": [query("min_confidence", {"type": "number", "minimum": 0, "maximum": 1,
                                                            "default": 0.95})],
                    "responses": {**ok(s.ChannelsOut), **_READ_ERRORS}}},
        "/api/v1/channels/{channel_id}/history": {
            "get": {"summary": "A channel's decisions over time and its occupancy", "security": reader,
                    "parameters": [chan, query("since", {"type": "string", "format": "date-time"}),
                                   query("until", {"type": "string", "format": "date-time"}),
                                   query("limit", {"type": "integer", "minimum": 1, "maximum": 100000})],
                    "responses": {**ok(s.HistoryOut), **_READ_ERRORS, "404": _P}}},
        "/api/v1/fusion": {
            "get": {"summary": "The fusion rule and parameters", "security": reader,
                    "responses": {**ok(s.FusionSettingsOut), **_READ_ERRORS}},
            "put": {"summary": "Change the fusion rule or parameters (from the next epoch)", "security": admin,
                    "requestBody": body(s.FusionSettingsIn), "responses": {**ok(s.FusionSettingsOut),
                                                                           **_WRITE_ERRORS}}},
        "/healthz": {"get": {"summary": "Liveness and readiness", "security": [{}],
                             "responses": {**ok(s.Health), "503": {"description": "Not ready: database "
                                                                                  "unreachable or epochs stale",
                                                                   "content": {"application/json": {
                                                                       "schema": ref(s.Health)}}}}}},
        "/healthz/live": {"get": {"summary": "Liveness only (the process answers)", "security": [{}],
                                  "responses": {"200": {"description": "Alive", "content": {"application/json": {
                                      "schema": {"type": "object", "properties": {"live": {"const": True}},
                                                 "required": ["live"]}}}}}}},
        "/metrics": {"get": {"summary": "Prometheus metrics (text exposition format 0.0.4)", "security": reader,
                             "responses": {"200": {"description": "Metrics", "content": {"text/plain": {
                                 "schema": {"type": "string"}}}}, **_READ_ERRORS}}},
        "/api/v1/openapi.json": {"get": {"summary": "This document", "security": [{}],
                                         "responses": {"200": {"description": "OpenAPI 3.1 document",
                                                               "content": {"application/json": {}}}}}},
    }
    return {
        "openapi": "3.1.0",
        "info": {"title": "occfuse", "version": "1",
                 "description": "Cooperative spectrum-occupancy fusion. Output is advisory: local spectrum "
                                "regulations and licensed coordination take precedence; unknown is not free."},
        "paths": paths,
        "components": {"schemas": defs["$defs"],
                       "securitySchemes": {"admin": {"type": "http", "scheme": "bearer"},
                                           "node": {"type": "http", "scheme": "bearer"},
                                           "reader": {"type": "http", "scheme": "bearer"}}},
    }


@bp.get("/api/v1/openapi.json")
@role("public")
def document():
    return jsonify(build_spec(bool(current_app.config.get("READ_TOKEN"))))
