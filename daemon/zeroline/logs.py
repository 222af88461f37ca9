"""Logging for the daemon: human-readable lines by default, JSON lines as an option, and a
rate limiter so a cause that repeats (a broker down, a sensor sending garbage every second)
is logged once per interval with a count of what was suppressed.

`setup_logging(format, level)` configures the root logger once at start-up; every module
then logs through `logging.getLogger(__name__)`. The JSON formatter writes one object per
line with `time` (RFC 3339 UTC), `level`, `logger`, `message` and, for exceptions, `error`,
so a log shipper needs no parsing rules. Secrets never reach a log line: the broker seam
never formats its password, and payloads are quoted only by the decoders, truncated.
"""

from __future__ import annotations

import datetime as _dt
import json
import logging
import sys
import threading
import time
from collections.abc import Callable
from typing import TextIO

LEVELS = {
    "debug": logging.DEBUG,
    "info": logging.INFO,
    "warning": logging.WARNING,
    "error": logging.ERROR,
}
TEXT_FORMAT = "%(asctime)s %(levelname)s %(name)s: %(message)s"


class JsonLineFormatter(logging.Formatter):
    """One JSON object per record.

    >>> record = logging.LogRecord("zeroline.x", logging.INFO, "f", 1, "hello %s", ("w",), None)
    >>> record.created = 0.0
    >>> json.loads(JsonLineFormatter().format(record))["message"]
    'hello w'
    """

    def format(self, record: logging.LogRecord) -> str:
        moment = _dt.datetime.fromtimestamp(record.created, tz=_dt.timezone.utc)
        entry = {
            "time": moment.strftime("%Y-%m-%dT%H:%M:%S.") + f"{moment.microsecond // 1000:03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            entry["error"] = self.formatException(record.exc_info)
        return json.dumps(entry, ensure_ascii=False)


def setup_logging(fmt: str = "text", level: str = "info", stream: TextIO | None = None) -> None:
    """Send every log record at `level` or above to `stream` (stderr) as text or JSON lines."""
    handler = logging.StreamHandler(stream or sys.stderr)
    if fmt == "json":
        handler.setFormatter(JsonLineFormatter())
    else:
        formatter = logging.Formatter(TEXT_FORMAT)
        formatter.converter = time.gmtime  # log times in UTC, like every time zeroline writes
        handler.setFormatter(formatter)
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(LEVELS.get(level, logging.INFO))
    logging.getLogger("paho").setLevel(logging.WARNING)


class RateLimitedLogger:
    """Log a message at most once per `interval_s` for each cause key, counting the rest.

    >>> quiet = logging.getLogger("doctest.quiet")
    >>> quiet.addHandler(logging.NullHandler())
    >>> limiter = RateLimitedLogger(quiet, interval_s=60.0)
    >>> limiter.warning("disk", "spool disk full")
    True
    >>> limiter.warning("disk", "spool disk full")
    False
    """

    def __init__(
        self,
        logger: logging.Logger,
        interval_s: float = 60.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.interval_s = interval_s
        self._logger = logger
        self._clock = clock
        self._last: dict[str, float] = {}
        self._suppressed: dict[str, int] = {}
        self._lock = threading.Lock()

    def warning(self, cause: str, message: str) -> bool:
        """Log `message` for `cause` unless it was logged recently; True if it was logged."""
        with self._lock:
            now = self._clock()
            last = self._last.get(cause)
            if last is not None and now - last < self.interval_s:
                self._suppressed[cause] = self._suppressed.get(cause, 0) + 1
                return False
            suppressed = self._suppressed.pop(cause, 0)
            self._last[cause] = now
        suffix = f" ({suppressed} similar messages suppressed)" if suppressed else ""
        self._logger.warning("%s%s", message, suffix)
        return True

    def forget(self, cause: str) -> None:
        """Let the next message for `cause` through at once (the cause has gone away)."""
        with self._lock:
            self._last.pop(cause, None)
            self._suppressed.pop(cause, None)
