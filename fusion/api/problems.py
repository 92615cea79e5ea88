"""RFC 9457 problem+json for every error, and the JSON body/query helpers that raise them."""

from __future__ import annotations

import json

from flask import Response, current_app, g, request
from pydantic import BaseModel, ValidationError
from pydantic_core import from_json
from sqlalchemy.exc import OperationalError
from sqlalchemy.exc import TimeoutError as PoolTimeout
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

from ..errors import APIError, BadRequest, Unprocessable
from ..plan import error_path

__all__ = ["problem", "init_app", "raw_body", "read_body", "read_query", "respond", "validation_errors"]

PROBLEM_TYPE = "application/problem+json"
MAX_ERRORS = 100  # listed per problem: a 50,000-item bad batch must not produce a 10 MB answer


def problem(status: int, title: str, detail: str | None = None, errors: list | None = None,
            headers: dict | None = None) -> Response:
    body = {"type": "about:blank", "title": title, "status": status}
    if detail:
        body["detail"] = detail
    if errors:
        body["errors"] = errors[:MAX_ERRORS]
        if len(errors) > MAX_ERRORS:
            body["errors_total"] = len(errors)  # the first MAX_ERRORS are listed
    response = Response(json.dumps(body), status=status, mimetype=PROBLEM_TYPE)
    for key, value in (headers or {}).items():
        response.headers[key] = value
    return response


def validation_errors(exc: ValidationError, prefix: tuple = ()) -> list[dict]:
    return [{"path": error_path(prefix + tuple(e["loc"])), "message": e["msg"]}
            for e in exc.errors(include_url=False, include_context=False, include_input=False)]


def _unprocessable(errors: list[dict], what: str) -> Unprocessable:
    detail = "; ".join(f"{e['path']}: {e['message']}" for e in errors[:5]) + (" ..." if len(errors) > 5 else "")
    return Unprocessable(f"{what} failed validation, nothing was stored: {detail}", errors=errors)


def raw_body() -> bytes:
    """The request body's bytes, after the checks every JSON body gets: 415 without a JSON content type, 413
    over MAX_CONTENT_LENGTH (raised by get_data)."""
    if not request.is_json:
        raise _UnsupportedMediaType()
    raw = request.get_data(cache=True)
    limit = request.max_content_length
    if limit is not None and request.content_length is None and len(raw) >= limit:
        # A chunked body (no Content-Length) is cut at the limit by werkzeug's LimitedStream.readall without
        # an error; parsing the cut-off prefix would give a misleading 400. Refuse it as too large instead
        # (a chunked body of exactly the limit is refused too: the cut cannot be told from a real end).
        raise RequestEntityTooLarge()
    return raw


def read_body(model: type[BaseModel] | None = None):
    """Return the parsed JSON body (a dict/list), or a validated `model` instance.

    415 without a JSON content type, 413 over MAX_CONTENT_LENGTH (raised by get_data), 400 for malformed JSON,
    422 with field paths for schema errors.
    """
    raw = raw_body()
    if "occfuse_body" in g:  # parsed and checked once per request (a view may call this twice)
        parsed = g.occfuse_body
    else:
        parsed = g.occfuse_body = _parse(raw)
    if model is None:
        return parsed
    try:
        return model.model_validate_json(raw)
    except ValidationError as exc:
        raise _unprocessable(validation_errors(exc), "the request body") from None


def _parse(raw: bytes):
    try:
        # pydantic's own JSON parser first (~6x faster than json on the float arrays of a batch); it refuses
        # NaN/Infinity, deep nesting and long integers as json below does, but json's answer to any body it
        # refuses is the one we give, so such bodies are parsed again there to get that answer.
        return from_json(raw, allow_inf_nan=False)
    except ValueError:
        pass
    try:
        return json.loads(raw, parse_constant=_reject_constant)
    except RecursionError:
        # RFC 8259 section 9 lets a parser limit nesting; no valid request nests more than a few levels.
        raise Unprocessable("the body nests arrays or objects too deeply (hundreds of levels); a report nests "
                            "three levels", errors=[{"path": "(body)", "message": "nested too deeply"}]) from None
    except _NonFinite as exc:
        raise Unprocessable(f"the body contains {exc.args[0]}, which is not a finite number; JSON has no NaN or "
                            f"Infinity", errors=[{"path": "(body)", "message": f"{exc.args[0]} is not allowed"}])
    except UnicodeDecodeError as exc:
        raise BadRequest(f"the body is not valid UTF-8 JSON: {exc}") from None
    except ValueError as exc:
        if "integer string conversion" in str(exc):  # CPython's 4,300-digit guard (docs: "int max str digits")
            raise Unprocessable("the body contains an integer with thousands of digits; no field takes one",
                                errors=[{"path": "(body)", "message": "integer too long"}]) from None
        raise BadRequest(f"the body is not valid JSON: {exc}") from None


def read_query(model: type[BaseModel]):
    """Validate the query string with a non-strict model (query values are strings)."""
    try:
        return model.model_validate(request.args.to_dict())
    except ValidationError as exc:
        raise _unprocessable(validation_errors(exc, ("query",)), "the query string") from None


def respond(model: type[BaseModel], data, status: int = 200) -> Response:
    """Serialise `data` through `model` (RFC 3339 datetimes, NaN as null)."""
    obj = data if isinstance(data, model) else model.model_validate(data)
    return Response(obj.model_dump_json(), status=status, mimetype="application/json")


class _NonFinite(ValueError):
    pass


def _reject_constant(name: str):
    raise _NonFinite(name)


class _UnsupportedMediaType(APIError):
    status, title = 415, "Unsupported Media Type"

    def __init__(self):
        super().__init__("send the body as JSON with the header Content-Type: application/json")


def init_app(app) -> None:
    @app.errorhandler(APIError)
    def _api_error(exc: APIError):
        return problem(exc.status, exc.title, exc.detail, exc.errors, exc.headers)

    @app.errorhandler(HTTPException)
    def _http_error(exc: HTTPException):
        detail = exc.description
        if exc.code == 404:
            detail = f"no such resource: {request.path}; the API lives under /api/v1 (see /api/v1/openapi.json)"
        elif exc.code == 405:
            detail = f"{request.method} is not allowed on {request.path}; allowed: {', '.join(exc.valid_methods or [])}"
        elif exc.code == 413:
            limit = current_app.config.get("MAX_CONTENT_LENGTH")
            detail = f"the body is larger than the server's limit of {limit} bytes; send smaller batches"
        headers = {k: v for k, v in exc.get_headers() if k.lower() != "content-type"}
        return problem(exc.code or 500, exc.name, detail, headers=headers)

    @app.errorhandler(OperationalError)
    @app.errorhandler(PoolTimeout)
    def _database_busy(exc):
        # A writer held the lock past the busy timeout (or the database is unreachable): the request was rolled
        # back, nothing of it is stored, and the client may simply retry. Log the class only: the message can
        # carry SQL parameters.
        current_app.logger.warning("database busy or unavailable on %s %s: %s", request.method, request.path,
                                   type(getattr(exc, "orig", exc)).__name__)
        retry = current_app.config.get("RETRY_AFTER_S", 1)
        return problem(503, "Service Unavailable", "the database is busy (another writer holds its lock) or "
                       "unavailable; nothing of this request was stored; retry after the Retry-After seconds",
                       headers={"Retry-After": str(retry)})

    @app.errorhandler(Exception)
    def _unhandled(exc: Exception):
        if isinstance(exc, HTTPException):
            return _http_error(exc)
        if isinstance(exc, (OperationalError, PoolTimeout)):
            return _database_busy(exc)
        # Log the traceback for the operator; the client gets no internals.
        current_app.logger.exception("unhandled error on %s %s", request.method, request.path)
        return problem(500, "Internal Server Error", "the server failed to handle this request; it has been logged")
