"""Log lines on stderr, as text or as JSON lines, for every logger under ``upwell``."""

from __future__ import annotations

import json
import logging
import sys
from datetime import datetime
from typing import Any

# --- logging ---------------------------------------------------------------------------------


class JsonLineFormatter(logging.Formatter):
    """One JSON object per line: time, level, message, and the record's ``fields``."""

    def format(self, record: logging.LogRecord) -> str:
        data: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created)
            .astimezone()
            .isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "message": record.getMessage(),
        }
        data.update(getattr(record, "fields", {}))
        if record.exc_info:
            data["traceback"] = self.formatException(record.exc_info)
        return json.dumps(data, ensure_ascii=False, default=str)


def configure_logging(log_format: str = "text") -> None:
    """Log lines on stderr, as plain text or JSON lines."""
    handler = logging.StreamHandler(sys.stderr)
    if log_format == "json":
        handler.setFormatter(JsonLineFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    root = logging.getLogger("upwell")
    root.handlers[:] = [handler]
    root.setLevel(logging.INFO)
    root.propagate = False
