"""Settings: built-in defaults, then a TOML file, then ``OCCFUSE_*`` environment variables.

Later sources win. Every key below can be set as ``OCCFUSE_<KEY>`` in the environment or as a lower-case key
in the TOML file named by ``OCCFUSE_CONFIG`` (or ``occfuse --config FILE``). Values are checked here, at
start-up, so a typo fails loudly with the setting's name and where it came from instead of mid-epoch.

The fusion keys (``RULE``, ``K``, ``TARGET_PF``, ...) only seed the fusion settings of a *new* database;
afterwards the stored settings rule and change through ``PUT /api/v1/fusion`` (so every worker sees the same).
"""

from __future__ import annotations

import os
import tomllib
from pathlib import Path
from typing import Any, Mapping

from .errors import ConfigError

__all__ = ["DEFAULTS", "FUSION_KEYS", "load_settings"]

DEFAULTS: dict[str, Any] = {
    # storage and access
    "DATABASE_URL": "sqlite:///occfuse.db",
    "ADMIN_TOKEN": None,  # admin routes are refused until one is set
    "READ_TOKEN": None,  # when set, reads need it (or the admin token) too
    "SQLITE_SYNCHRONOUS": "NORMAL",  # FULL survives power loss, NORMAL survives process death
    "SQLITE_BUSY_TIMEOUT_S": 5.0,  # how long a write waits for another writer's lock before a 503
    "RETRY_AFTER_S": 1,  # the Retry-After of a 503 (database busy)
    # ingest limits
    "MAX_CONTENT_LENGTH": 1_048_576,  # bytes per request body
    "MAX_BATCH": 500,  # reports per batch
    "MAX_MEASUREMENTS": 4096,  # channels per report
    "MAX_SKEW_S": 30.0,  # how far in the future measured_at may be (node clocks drift)
    # scheduler
    "SCHEDULER_ENABLED": False,  # create_app never starts threads; `occfuse serve` turns this on
    "LEASE_TTL_S": 15.0,  # a dead leader's epochs move to another worker within TTL + TTL/3 (README)
    "LOG_LEVEL": "INFO",
    "LOG_FORMAT": "text",  # "json": one JSON object per line
    # retention of raw reports (0 keeps them forever); pruned by the leader in bounded batches
    "RETENTION_S": 0.0,
    "RETENTION_BATCH": 1000,  # rows per delete transaction
    "RETENTION_EVERY_S": 60.0,
    # readiness: /healthz is not ready when the newest epoch is older than this (0: 3 intervals + lease TTL)
    "READY_MAX_EPOCH_AGE_S": 0.0,
    # detection: how well the nodes know their noise floor, in dB (0 = not stated; see README, "SNR wall")
    "NOISE_UNCERTAINTY_DB": 0.0,
    # initial fusion settings of a new database (see module docstring)
    "INTERVAL_S": 10.0,
    "RULE": "weighted_llr",  # see README, "Choosing a rule"
    "K": 2,
    "TARGET_PF": 0.01,
    "MIN_NODES": 2,
    "WINDOW_S": 0.0,
    "MAX_AGE_S": 30.0,
    "CONFIDENCE": 0.95,
    "PRIOR": 0.5,
    "SNR_DB": -10.0,
}

FUSION_KEYS = ("RULE", "K", "TARGET_PF", "MIN_NODES", "WINDOW_S", "MAX_AGE_S", "INTERVAL_S", "CONFIDENCE",
               "PRIOR", "SNR_DB")

_CHOICES = {"LOG_FORMAT": ("text", "json")}
_TRUE, _FALSE = {"1", "true", "yes", "on"}, {"0", "false", "no", "off"}


def _coerce(key: str, value: Any, where: str) -> Any:
    """Convert `value` to the type of the default of `key`; raise ConfigError naming `where`."""
    default = DEFAULTS[key]
    if value is None:
        return None
    try:
        if isinstance(default, bool):
            if isinstance(value, bool):
                return value
            text = str(value).strip().lower()
            if text in _TRUE | _FALSE:
                return text in _TRUE
            raise ValueError
        if isinstance(default, int):
            if isinstance(value, bool) or (isinstance(value, float) and not value.is_integer()):
                raise ValueError
            return int(value)
        if isinstance(default, float):
            if isinstance(value, bool):
                raise ValueError
            return float(value)
        text = str(value)
        if key in _CHOICES and text not in _CHOICES[key]:
            raise ValueError
        return text
    except (TypeError, ValueError):
        kind = type(default).__name__ if default is not None else "str"
        kind = f"a {kind}" if key not in _CHOICES else "one of " + ", ".join(_CHOICES[key])
        raise ConfigError(f"{where}: {key} must be {kind}, was {value!r}") from None


def load_settings(config_file: str | os.PathLike | None = None,
                  environ: Mapping[str, str] | None = None,
                  overrides: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Return the settings dict: defaults < TOML file < environment < `overrides`.

    Parameters
    ----------
    config_file : path, optional
        TOML file with lower-case keys (``database_url = "..."``). Defaults to ``$OCCFUSE_CONFIG``.
    environ : mapping, optional
        Where to read ``OCCFUSE_*`` variables; defaults to ``os.environ``.
    overrides : mapping, optional
        Final values (the app factory's ``test_config``); unknown keys pass through untouched.
    """
    env = os.environ if environ is None else environ
    settings = dict(DEFAULTS)
    path = config_file or env.get("OCCFUSE_CONFIG")
    if path:
        try:
            data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"config file {path} does not exist") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"config file {path} is not valid TOML: {exc}") from None
        for raw_key, value in data.items():
            key = raw_key.upper()
            if key not in DEFAULTS:
                raise ConfigError(f"config file {path}: unknown setting {raw_key!r}; "
                                  f"known: {', '.join(k.lower() for k in DEFAULTS)}")
            settings[key] = _coerce(key, value, f"config file {path}")
    for key in DEFAULTS:
        name = f"OCCFUSE_{key}"
        if name in env and env[name] != "":
            settings[key] = _coerce(key, env[name], f"environment variable {name}")
    if overrides:
        for key, value in overrides.items():
            settings[key] = _coerce(key, value, "configuration") if key in DEFAULTS else value
    x = settings["NOISE_UNCERTAINTY_DB"]
    if not (x >= 0 and x < 20):  # also refuses NaN
        raise ConfigError(f"NOISE_UNCERTAINTY_DB must be in [0, 20) dB, was {x!r}")
    return settings
