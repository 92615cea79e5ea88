"""Logging set-up: plain text or one JSON object per line (``LOG_FORMAT``), with bearer tokens masked.

Nothing in occfuse logs a token on purpose (auth.py keeps only the node's name); :class:`RedactTokens` is the
second line of defence for messages and tracebacks that quote a header or a URL with a token in it.
"""

from __future__ import annotations

import json
import logging
import re
import sys
from datetime import datetime, timezone

__all__ = ["JsonFormatter", "RedactTokens", "TEXT_FORMAT", "formatter", "redact", "setup_logging"]

TEXT_FORMAT = "%(asctime)s %(levelname)s %(name)s[%(process)d]: %(message)s"

# "Bearer <token>" in any case, and token=/access_token= query or form parameters.
_PATTERNS = (re.compile(r"(?i)(bearer\s+)[^\s,;'\"]+"),
             re.compile(r"(?i)((?:access_)?token[\"']?\s*[=:]\s*[\"']?)[^\s&,;'\"]+"))


def redact(text: str) -> str:
    """`text` with bearer tokens and ``token=...`` values replaced by ``[redacted]``."""
    for pattern in _PATTERNS:
        text = pattern.sub(r"\1[redacted]", text)
    return text


class RedactTokens(logging.Filter):
    """Masks tokens in the formatted message (arguments included) before any handler writes it."""

    def filter(self, record: logging.LogRecord) -> bool:
        message = record.getMessage()
        cleaned = redact(message)
        if cleaned != message:
            record.msg, record.args = cleaned, None
        return True


class JsonFormatter(logging.Formatter):
    """One JSON object per line: time (RFC 3339, UTC), level, logger, pid, message, and exception if any."""

    def format(self, record: logging.LogRecord) -> str:
        out = {"time": datetime.fromtimestamp(record.created, timezone.utc).isoformat(timespec="milliseconds"),
               "level": record.levelname, "logger": record.name, "pid": record.process,
               "message": redact(record.getMessage())}
        if record.exc_info:
            out["exception"] = redact(self.formatException(record.exc_info))
        if record.stack_info:
            out["stack"] = redact(self.formatStack(record.stack_info))
        return json.dumps(out, ensure_ascii=False)


class _RedactingText(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        return redact(super().format(record))


def formatter(fmt: str) -> logging.Formatter:
    """The formatter for ``LOG_FORMAT`` `fmt` ("text" or "json")."""
    return JsonFormatter() if fmt == "json" else _RedactingText(TEXT_FORMAT)


class _StderrHandler(logging.StreamHandler):
    """Writes to whatever ``sys.stderr`` is at the time (test runners swap it and close the old one)."""

    @property
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, _value):
        pass


def setup_logging(fmt: str = "text", level: str = "INFO") -> None:
    """Send warnings from everything and `level` from ``fusion.*`` to stderr, as text or JSON lines."""
    root = logging.getLogger()
    handler = _StderrHandler()
    handler.setFormatter(formatter(fmt))
    handler.addFilter(RedactTokens())
    for old in list(root.handlers):
        if getattr(old, "_occfuse", False):
            root.removeHandler(old)
    handler._occfuse = True
    root.addHandler(handler)
    root.setLevel(logging.WARNING)
    logging.getLogger("fusion").setLevel(level)
