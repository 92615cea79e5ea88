"""occfuse: cooperative spectrum-occupancy fusion service."""

from __future__ import annotations

import logging
import time

from flask import Flask

__all__ = ["create_app"]


def create_app(test_config: dict | None = None) -> Flask:
    """Build the Flask app. Starts no threads: `occfuse serve` starts the scheduler itself."""
    from . import api, db, metrics, web
    from .config import load_settings

    app = Flask(__name__)
    # Defaults, then the TOML file / OCCFUSE_* environment, then the caller's overrides.
    settings = load_settings(overrides=test_config)
    app.config.update(settings)
    app.json.sort_keys = False
    app.extensions["occfuse.started"] = time.monotonic()  # readiness: how long without any epoch
    logging.getLogger("fusion").setLevel(app.config["LOG_LEVEL"])
    # Storage: one engine per app (and per process), one session per request.
    db.init_app(app)
    # Request timing first, so it also covers requests that auth refuses; then errors, auth, blueprints.
    metrics.init_app(app)
    api.init_app(app)
    # The dashboard page at /, a reader of the same API.
    web.init_app(app)
    return app
