"""Logging for people and for servers.

Text lines on a terminal; ``--log-format json`` gives one JSON object per line. The run id
is put on every line logged while a run is active (:func:`run_context`). Secrets and
message bodies are never passed to the logger in the first place.
"""

from __future__ import annotations

import contextvars
import json
import logging
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime

_RUN_ID: contextvars.ContextVar[str] = contextvars.ContextVar("digest_run_id", default="-")


@contextmanager
def run_context(run_id: str) -> Iterator[None]:
    token = _RUN_ID.set(run_id)
    try:
        yield
    finally:
        _RUN_ID.reset(token)


class _RunIdFilter(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        record.run_id = _RUN_ID.get()
        return True


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "run_id": getattr(record, "run_id", "-"),
            "message": record.getMessage(),
        }
        if record.exc_info:
            entry["error"] = self.formatException(record.exc_info)
        return json.dumps(entry, ensure_ascii=False)


def configure_logging(verbose: int = 0, fmt: str = "text") -> None:
    level = logging.WARNING - 10 * min(verbose, 2)
    handler = logging.StreamHandler(sys.stderr)
    handler.addFilter(_RunIdFilter())
    if fmt == "json":
        handler.setFormatter(JsonFormatter())
    else:
        handler.setFormatter(
            logging.Formatter("%(asctime)s %(levelname)s %(name)s [run %(run_id)s] %(message)s")
        )
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(level)
    logging.getLogger("mail.log").setLevel(logging.ERROR)  # aiosmtpd's own chatter
