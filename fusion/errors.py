"""The exceptions occfuse raises, in one place.

::

    OccfuseError                 base of everything below
    ├── ConfigError              settings that cannot work (bad env var, bad TOML); raised at start-up
    ├── PlanError                a band plan that is not usable (duplicate ids, overlapping nonsense, bad values)
    └── APIError                 anything a client did wrong; rendered as RFC 9457 problem+json
        ├── BadRequest      400  body is not JSON, or a query parameter is malformed
        ├── Unauthorized    401  no bearer token, or one that matches nobody
        ├── Forbidden       403  a valid token that may not do this (wrong node, disabled node, not admin)
        ├── NotFound        404  no such node / channel
        ├── Conflict        409  same report seq with other content; node name taken
        └── Unprocessable   422  well-formed JSON that fails validation; `errors` lists each field path

Each APIError carries `errors`: a list of ``{"path": "measurements[2].channel", "message": "..."}`` so a
client can see exactly what to fix.
"""

from __future__ import annotations

__all__ = [
    "OccfuseError",
    "ConfigError",
    "PlanError",
    "APIError",
    "BadRequest",
    "Unauthorized",
    "Forbidden",
    "NotFound",
    "Conflict",
    "Unprocessable",
]


class OccfuseError(Exception):
    """Base class of every occfuse error."""


class ConfigError(OccfuseError):
    """A setting is missing or invalid; the message names the setting and where it came from."""


class PlanError(OccfuseError):
    """A band plan cannot be used; `errors` lists ``{path, message}`` items."""

    def __init__(self, message: str, errors: list[dict] | None = None):
        super().__init__(message)
        self.errors = errors or []


class APIError(OccfuseError):
    """An error a client caused; the API renders it as problem+json."""

    status = 400
    title = "Bad Request"

    def __init__(self, detail: str, *, errors: list[dict] | None = None, headers: dict | None = None):
        super().__init__(detail)
        self.detail = detail
        self.errors = errors or []
        self.headers = headers or {}


class BadRequest(APIError):
    status, title = 400, "Bad Request"


class Unauthorized(APIError):
    status, title = 401, "Unauthorized"

    def __init__(self, detail: str, **kw):
        kw.setdefault("headers", {"WWW-Authenticate": 'Bearer realm="occfuse"'})
        super().__init__(detail, **kw)


class Forbidden(APIError):
    status, title = 403, "Forbidden"


class NotFound(APIError):
    status, title = 404, "Not Found"


class Conflict(APIError):
    status, title = 409, "Conflict"


class Unprocessable(APIError):
    status, title = 422, "Unprocessable Content"
