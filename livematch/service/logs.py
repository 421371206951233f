"""Structured logs: one line per event, ``key=value`` pairs, stdlib :mod:`logging`.

A log call passes its fields as ``extra={"fields": {...}}``; :class:`KeyValueFormatter`
renders ``ts=… level=… logger=… event="…" key=value …``, quoting values with spaces.
Secrets never reach a log call: URLs are logged through
:func:`livematch.config.redact_url` and credentials are not logged at all.

Example:
    >>> rec = logging.LogRecord("livematch", logging.INFO, __file__, 1, "connected",
    ...                         None, None)
    >>> rec.fields = {"broker": "mqtt://127.0.0.1:1883", "note": "a b"}
    >>> KeyValueFormatter(with_time=False).format(rec)
    'level=info logger=livematch event=connected broker=mqtt://127.0.0.1:1883 note="a b"'
"""

from __future__ import annotations

import logging
import sys
import time
from typing import Any


def _quote(value: Any) -> str:
    text = str(value)
    if text == "" or any(c in text for c in ' "=\n\t'):
        escaped = text.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
        return f'"{escaped}"'
    return text


class KeyValueFormatter(logging.Formatter):
    """Formats a record as ``key=value`` pairs (see the module docstring)."""

    def __init__(self, *, with_time: bool = True) -> None:
        super().__init__()
        self.with_time = with_time

    def format(self, record: logging.LogRecord) -> str:
        """One line: time, level, logger, event, then the record's ``fields``."""
        pairs: list[tuple[str, Any]] = []
        if self.with_time:
            stamp = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            pairs.append(("ts", f"{stamp}.{int(record.msecs):03d}Z"))
        pairs += [("level", record.levelname.lower()), ("logger", record.name),
                  ("event", record.getMessage())]
        pairs += list(getattr(record, "fields", {}).items())
        line = " ".join(f"{k}={_quote(v)}" for k, v in pairs)
        if record.exc_info:
            line += " exc=" + _quote(self.formatException(record.exc_info))
        return line


def setup_logging(level: str) -> None:
    """Send livematch's logs to stderr as key=value lines at ``level`` (``info``...)."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(KeyValueFormatter())
    root = logging.getLogger("livematch")
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False


def fields(**kv: Any) -> dict[str, Any]:
    """``extra=`` argument carrying key=value fields: ``log.info("x", extra=fields(a=1))``."""
    return {"fields": kv}
