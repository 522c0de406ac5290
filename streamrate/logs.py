"""Log output: plain text lines, or one JSON object per line (``log_format = "json"``).

A JSON line holds ``time`` (UTC, ISO 8601 with milliseconds), ``level``,
``logger``, ``message`` (arguments already filled in), ``space`` (the model
space the line is about, or ``null``) and, when an exception is logged,
``exception`` (its traceback as text). The space comes from ``extra={"space":
...}`` when given, else from the name of the thread that logged: the service
names its threads ``consumer-<space>``, ``queries-<space>`` and ``answers-<space>``.

>>> import logging
>>> rec = logging.LogRecord("streamrate.demo", logging.INFO, __file__, 1, "%d events", (3,), None)
>>> rec.threadName = "consumer-duel"
>>> line = json.loads(JsonFormatter().format(rec))
>>> line["message"], line["space"], line["level"]
('3 events', 'duel', 'INFO')
"""

from __future__ import annotations

import json
import logging
from datetime import UTC, datetime
from typing import Literal

LogFormat = Literal["text", "json"]
TEXT_FORMAT = "%(asctime)s %(levelname)s %(name)s: %(message)s"
THREAD_ROLES = ("consumer-", "queries-", "answers-")
"""Thread name prefixes whose remainder is the space name (see service.py, responder.py)."""
FIELDS = ("time", "level", "logger", "message", "space", "exception")


def space_of(record: logging.LogRecord) -> str | None:
    """The space a record is about: its ``space`` extra, else its thread's name."""
    given = getattr(record, "space", None)
    if isinstance(given, str):
        return given
    name = record.threadName or ""
    for prefix in THREAD_ROLES:
        if name.startswith(prefix):
            return name[len(prefix) :]
    return None


class JsonFormatter(logging.Formatter):
    """One JSON object per line with the fields of :data:`FIELDS`."""

    def format(self, record: logging.LogRecord) -> str:
        stamp = datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds")
        out: dict[str, object] = {
            "time": stamp.replace("+00:00", "Z"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
            "space": space_of(record),
        }
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        elif record.exc_text:
            out["exception"] = record.exc_text
        return json.dumps(out, ensure_ascii=False, default=str)


def setup_logging(level: str, fmt: LogFormat = "text") -> None:
    """Configure the root logger once, at the edge (the ``serve`` command)."""
    handler = logging.StreamHandler()
    formatter = JsonFormatter() if fmt == "json" else logging.Formatter(TEXT_FORMAT)
    handler.setFormatter(formatter)
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(level)
