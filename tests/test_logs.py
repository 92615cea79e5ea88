"""Structured logs: one JSON object per line, tokens masked in text and JSON alike."""

from __future__ import annotations

import io
import json
import logging

import pytest

from fusion.config import load_settings
from fusion.errors import ConfigError
from fusion.logs import JsonFormatter, RedactTokens, formatter, redact, setup_logging


def _logger(fmt: str):
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(formatter(fmt))
    handler.addFilter(RedactTokens())
    log = logging.getLogger(f"fusion.test_logs.{fmt}")
    log.handlers[:] = [handler]
    log.propagate = False
    log.setLevel(logging.DEBUG)
    return log, stream


def test_json_lines_carry_time_level_logger_pid_and_message():
    log, stream = _logger("json")
    log.info("epoch %d: %s", 7, "multi\nline")
    try:
        raise RuntimeError("boom with Authorization: Bearer s3cr3t-token")
    except RuntimeError:
        log.exception("failed")
    lines = stream.getvalue().splitlines()
    assert len(lines) == 2  # the newline inside a message stays escaped: one record, one line
    first, second = map(json.loads, lines)
    assert first["message"] == "epoch 7: multi\nline" and first["level"] == "INFO"
    assert first["logger"] == "fusion.test_logs.json" and isinstance(first["pid"], int)
    assert first["time"].endswith("+00:00")  # RFC 3339 in UTC
    assert "RuntimeError" in second["exception"] and "s3cr3t-token" not in lines[1]


@pytest.mark.parametrize("fmt", ["text", "json"])
def test_tokens_never_reach_the_log(fmt):
    log, stream = _logger(fmt)
    log.warning("request with headers %s", {"Authorization": "Bearer abc.DEF-123"})
    log.warning("GET /x?token=qwerty&y=1 and bearer   zzz999")
    out = stream.getvalue()
    for secret in ("abc.DEF-123", "qwerty", "zzz999"):
        assert secret not in out
    assert out.count("[redacted]") == 3


def test_redact_leaves_ordinary_text_alone():
    assert redact("node n1 posted 3 reports (tokens are hashed)") == "node n1 posted 3 reports (tokens are hashed)"


def test_setup_logging_installs_one_handler():
    root = logging.getLogger()
    before, level = list(root.handlers), logging.getLogger("fusion").level
    try:
        setup_logging("json", "DEBUG")
        setup_logging("json", "DEBUG")  # idempotent: a second call replaces, not adds
        ours = [h for h in root.handlers if getattr(h, "_occfuse", False)]
        assert len(ours) == 1 and isinstance(ours[0].formatter, JsonFormatter)
        assert logging.getLogger("fusion").level == logging.DEBUG
    finally:
        root.handlers[:] = before
        logging.getLogger("fusion").setLevel(level)


def test_log_format_is_checked():
    assert load_settings(environ={"OCCFUSE_LOG_FORMAT": "json"})["LOG_FORMAT"] == "json"
    with pytest.raises(ConfigError, match="LOG_FORMAT must be one of text, json"):
        load_settings(environ={"OCCFUSE_LOG_FORMAT": "xml"})
