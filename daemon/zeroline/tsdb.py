"""Time-series output: zeroline's points, their schema, and a sink that never loses them.

Points are written as InfluxDB line protocol to an InfluxDB-2-style `/api/v2/write`
endpoint (InfluxDB 2.x, or VictoriaMetrics, which accepts the same request). The schema
(also in deploy/timeseries.md) is:

=================  ===========================================  ================================
measurement        tags                                         fields (numbers only)
=================  ===========================================  ================================
zeroline_reading   channel, plus the channel's labels (site ..)  raw, corrected, baseline,
                                                                uncertainty, drift_rate (units
                                                                per second), quality (QARTOD
                                                                code: 1 pass, 2 not evaluated,
                                                                3 suspect, 4 fail, 9 missing)
zeroline_alert     channel, rule, severity (+ channel labels)   active (1 raised / 0 cleared),
                                                                value, limit
zeroline_health    gateway (the daemon's client id)             readings_in, readings_out,
                                                                decode_errors, queue_depth,
                                                                spool_bytes, spool_dropped, ..
=================  ===========================================  ================================

A field without a value (None or NaN) is left out of the point, never written as NaN, and
no field is ever a string: VictoriaMetrics stores a string field as 0, and InfluxDB refuses
a field whose type changes. So measured values are always floats and codes/flags always
integers. VictoriaMetrics names the series `<measurement>_<field>` (`zeroline_reading_raw`)
with the tags as labels.

Delivery: `TimeseriesSink.submit` validates and encodes points and appends them to a disk
spool (zeroline.spool); a sender thread reads the oldest batch, writes it in one synchronous
request and acks the spool only after the server said yes. On any failure it waits
(exponential backoff, capped) and retries the same batch, so order is kept and nothing is
dropped unless the spool's bound is reached (policy `drop_oldest`, counted). After a crash a
sent-but-unacked batch is sent again; that is harmless because a point with the same series
and timestamp replaces the earlier one (InfluxDB always; VictoriaMetrics with
`-dedup.minScrapeInterval=1ms`, see deploy/timeseries.md).

>>> point = reading_point("no2", 1_700_000_000_000_000_000, raw=12.5, corrected=11.0,
...                       baseline=None, uncertainty=None, drift_rate=float("nan"),
...                       quality=QARTOD_PASS, labels={"site": "north 1"})
>>> print(to_line_protocol(point))
zeroline_reading,channel=no2,site=north\\ 1 corrected=11,quality=1i,raw=12.5 1700000000000000000
"""

from __future__ import annotations

import functools
import logging
import math
import os
import random
import re
import threading
import time
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Protocol

from zeroline.errors import ConfigError, InputError, ZerolineError
from zeroline.spool import Batch, RateLimitedLogger, Spool

_log = logging.getLogger(__name__)

READING = "zeroline_reading"
ALERT = "zeroline_alert"
HEALTH = "zeroline_health"
TOKEN_ENV = "ZEROLINE_TSDB_TOKEN"

# QARTOD flag codes (U.S. IOOS, "Manual for Real-Time Quality Control", flag scheme).
QARTOD_PASS = 1
QARTOD_NOT_EVALUATED = 2
QARTOD_SUSPECT = 3
QARTOD_FAIL = 4
QARTOD_MISSING = 9
QARTOD_CODES = frozenset({1, 2, 3, 4, 9})
# zeroline's quality flags as QARTOD codes; our own mapping (common practice, no source).
QARTOD_BY_QUALITY_FLAG: Mapping[str, int] = {
    "ok": QARTOD_PASS,
    "learning": QARTOD_NOT_EVALUATED,
    "extrapolating": QARTOD_SUSPECT,
    "input_stale": QARTOD_SUSPECT,
    "ill_conditioned": QARTOD_FAIL,
}

_FUTURE_LIMIT_NS = 86_400 * 10**9  # VictoriaMetrics silently drops points > ~1 day ahead
_INT64_MAX = 2**63 - 1
_RESERVED_KEYS = frozenset({"time"})  # InfluxDB ignores a tag or field called "time"

FieldValue = float | int


@dataclass(frozen=True)
class Point:
    """One time-series point; `time_ns` is nanoseconds since 1970-01-01 UTC."""

    measurement: str
    tags: dict[str, str]
    fields: dict[str, FieldValue]
    time_ns: int


# -- validation ----------------------------------------------------------------------------


def validate_point(point: Point, now_ns: int) -> None:
    """Raise InputError saying what is wrong with `point` and what would be right."""
    where = f"point {point.measurement!r}"
    _check_name(point.measurement, f"{where}: measurement name", key=False)
    if point.measurement.startswith("#"):
        raise InputError(
            f"{where}: a measurement starting with '#' is read as a comment; start it with a letter"
        )
    for key, value in point.tags.items():
        _check_name(key, f"{where}: tag key {key!r}", key=True)
        if not isinstance(value, str) or not value:
            raise InputError(
                f"{where}: tag {key!r} has value {value!r}; "
                "tags need a non-empty text value (leave the tag out instead)"
            )
        _check_name(value, f"{where}: tag {key!r} value {value!r}", key=False)
    if not point.fields:
        raise InputError(f"{where}: has no fields; a point needs at least one numeric field")
    for name, number in point.fields.items():
        _check_name(name, f"{where}: field key {name!r}", key=True)
        _check_field_value(number, f"{where}: field {name!r}")
    _check_time(point.time_ns, now_ns, where)


def _check_name(name: str, what: str, *, key: bool) -> None:
    if not isinstance(name, str) or not name:
        raise InputError(f"{what} is empty; give a non-empty name")
    problem = _name_problem(name, key)
    if problem is not None:
        raise InputError(f"{what} {problem}")


_UNSAFE_CHARACTER = re.compile(r"[\x00-\x1f\x7f\\]")


@functools.lru_cache(maxsize=4096)  # the same few names recur in every point
def _name_problem(name: str, key: bool) -> str | None:
    unsafe = _UNSAFE_CHARACTER.search(name)
    if unsafe is not None and unsafe.group() == "\\":
        return (
            "contains a backslash, which line protocol cannot carry unambiguously; "
            "use '/' or '_' instead"
        )
    if unsafe is not None:
        return f"contains the control character {unsafe.group()!r}; use printable characters only"
    if key and name.startswith("_"):
        return "starts with '_', which InfluxDB reserves; start it with a letter"
    if key and name in _RESERVED_KEYS:
        return "is a reserved key; choose another name"
    return None


def _check_field_value(value: object, what: str) -> None:
    if isinstance(value, bool):
        raise InputError(f"{what} is a boolean; write 1 or 0 as an integer")
    if isinstance(value, int):
        if not -_INT64_MAX - 1 <= value <= _INT64_MAX:
            raise InputError(f"{what} = {value} does not fit a 64-bit integer; write it as a float")
        return
    if isinstance(value, float):
        if math.isnan(value):
            raise InputError(f"{what} is NaN; leave a field without a value out of the point")
        if math.isinf(value):
            raise InputError(f"{what} is infinite; only finite numbers can be stored")
        return
    raise InputError(
        f"{what} is {type(value).__name__} {value!r}; fields must be numbers "
        "(VictoriaMetrics stores text fields as 0): put text in a tag"
    )


def _check_time(time_ns: object, now_ns: int, where: str) -> None:
    if isinstance(time_ns, bool) or not isinstance(time_ns, int):
        raise InputError(
            f"{where}: time {time_ns!r} is not an integer number of nanoseconds "
            "since 1970-01-01 UTC"
        )
    if time_ns < 0:
        raise InputError(
            f"{where}: time {time_ns} ns is before 1970-01-01 UTC; check the logger's clock"
        )
    if time_ns > now_ns + _FUTURE_LIMIT_NS:
        ahead_h = (time_ns - now_ns) / 3.6e12
        raise InputError(
            f"{where}: time is {ahead_h:.1f} h in the future (more than 24 h "
            "would be silently dropped by the database); check the logger's clock"
        )


# -- line protocol -------------------------------------------------------------------------

_ESCAPE_MEASUREMENT = str.maketrans({",": r"\,", " ": r"\ "})
_ESCAPE_KEY = str.maketrans({",": r"\,", "=": r"\=", " ": r"\ "})


def to_line_protocol(point: Point) -> str:
    """Encode a validated point as one line of InfluxDB line protocol (ns precision).

    Tags and fields are sorted by key (what InfluxDB recommends); integers get the `i`
    suffix, floats are written in Python's shortest round-trip form.

    >>> to_line_protocol(Point("a b", {"k=1": "v,2"}, {"f x": 3, "g": 0.5}, 7))
    'a\\\\ b,k\\\\=1=v\\\\,2 f\\\\ x=3i,g=0.5 7'
    """
    head = point.measurement.translate(_ESCAPE_MEASUREMENT)
    tags = "".join(
        f",{key.translate(_ESCAPE_KEY)}={value.translate(_ESCAPE_KEY)}"
        for key, value in sorted(point.tags.items())
    )
    fields = ",".join(
        f"{key.translate(_ESCAPE_KEY)}={_format_field(value)}"
        for key, value in sorted(point.fields.items())
    )
    return f"{head}{tags} {fields} {point.time_ns}"


def _format_field(value: FieldValue) -> str:
    if isinstance(value, int):
        return f"{value}i"
    text = repr(value)
    return text[:-2] if text.endswith(".0") else text  # "3.0" -> "3": still a float


# -- builders ------------------------------------------------------------------------------


def _present(values: Mapping[str, float | int | None]) -> dict[str, FieldValue]:
    """Drop fields that have no value (None or NaN)."""
    return {
        key: value
        for key, value in values.items()
        if value is not None and not (isinstance(value, float) and math.isnan(value))
    }


def _as_float(value: float | None) -> float | None:
    return None if value is None else float(value)


def _channel_tags(channel: str, labels: Mapping[str, str], **fixed: str) -> dict[str, str]:
    clash = sorted(set(labels) & ({"channel"} | set(fixed)))
    if clash:
        raise InputError(
            f"channel {channel!r}: label {clash[0]!r} is set by zeroline itself; rename the label"
        )
    return {**labels, "channel": channel, **fixed}


def reading_point(
    channel: str,
    time_ns: int,
    *,
    raw: float | None,
    corrected: float | None,
    baseline: float | None,
    uncertainty: float | None,
    drift_rate: float | None,
    quality: int,
    labels: Mapping[str, str] | None = None,
) -> Point:
    """A corrected reading; `quality` is a QARTOD code (see QARTOD_BY_QUALITY_FLAG)."""
    if quality not in QARTOD_CODES:
        raise InputError(
            f"channel {channel!r}: quality {quality!r} is not a QARTOD code; use 1, 2, 3, 4 or 9"
        )
    fields = _present(
        {
            "raw": _as_float(raw),
            "corrected": _as_float(corrected),
            "baseline": _as_float(baseline),
            "uncertainty": _as_float(uncertainty),
            "drift_rate": _as_float(drift_rate),
            "quality": int(quality),
        }
    )
    return Point(READING, _channel_tags(channel, labels or {}), fields, time_ns)


def alert_point(
    channel: str,
    time_ns: int,
    *,
    rule: str,
    severity: str,
    active: bool,
    value: float | None,
    limit: float | None,
    labels: Mapping[str, str] | None = None,
) -> Point:
    """An alert raise (`active=True`) or clear, for one channel and rule."""
    tags = _channel_tags(channel, labels or {}, rule=rule, severity=severity)
    fields = _present({"active": int(active), "value": _as_float(value), "limit": _as_float(limit)})
    return Point(ALERT, tags, fields, time_ns)


def health_point(client_id: str, time_ns: int, counters: Mapping[str, float | int | None]) -> Point:
    """The daemon's own health: counters such as readings_in, queue_depth, spool_bytes.

    Integers stay integers and floats stay floats; keep each counter's type stable.
    """
    return Point(HEALTH, {"gateway": client_id}, _present(counters), time_ns)


# -- configuration -------------------------------------------------------------------------


@dataclass(frozen=True)
class TimeseriesConfig:
    """Where and how to write points; the `timeseries:` section of the config."""

    url: str
    org: str
    bucket: str
    spool_dir: Path
    token_file: Path | None = None
    token_env: str | None = None  # a variable the user named; unset is then an error
    spool_max_bytes: int = 256 * 1024 * 1024
    batch_size: int = 5000
    flush_interval_s: float = 1.0
    request_timeout_s: float = 10.0
    retry_initial_s: float = 0.5
    retry_max_s: float = 30.0
    gzip: bool = True

    def __post_init__(self) -> None:
        if not self.url.startswith(("http://", "https://")):
            raise ConfigError(
                f"timeseries.url: {self.url!r} is not an http(s) URL; "
                "write e.g. http://127.0.0.1:8086"
            )
        for name in ("org", "bucket"):
            if not getattr(self, name):
                raise ConfigError(f"timeseries.{name}: is empty; give the InfluxDB {name}")
        if not 1 <= self.batch_size <= 100_000:
            raise ConfigError(
                f"timeseries.batch_size: {self.batch_size} is out of range; "
                "use 1 to 100000 points per request"
            )
        if self.spool_max_bytes < 64 * 1024:
            raise ConfigError(
                f"timeseries.spool_max_bytes: {self.spool_max_bytes} is too "
                "small; use at least 65536 bytes"
            )
        for name in ("flush_interval_s", "request_timeout_s", "retry_initial_s"):
            if not getattr(self, name) > 0:
                raise ConfigError(f"timeseries.{name}: must be a positive number of seconds")
        if self.retry_max_s < self.retry_initial_s:
            raise ConfigError("timeseries.retry_max_s: must be at least retry_initial_s")


def load_token(config: TimeseriesConfig) -> str | None:
    """The API token: from `token_file` if set, else from the variable `token_env` (which
    must then be set), else $ZEROLINE_TSDB_TOKEN, else None."""
    if config.token_file is not None:
        try:
            token = Path(config.token_file).read_text(encoding="utf-8").strip()
        except OSError as error:
            raise ConfigError(
                f"timeseries.token_file: cannot read {config.token_file} "
                f"({error.strerror}); check the path and its permissions"
            ) from None
        if not token:
            raise ConfigError(
                f"timeseries.token_file: {config.token_file} is empty; put the API token in it"
            )
        return token
    if config.token_env is not None:
        token = os.environ.get(config.token_env, "").strip()
        if not token:
            raise ConfigError(
                f"timeseries.token_env: the environment variable {config.token_env} is not "
                "set or empty; set it to the API token, or remove token_env"
            )
        return token
    token = os.environ.get(TOKEN_ENV, "").strip()
    return token or None


# -- writing -------------------------------------------------------------------------------


class WriteError(ZerolineError):
    """A batch was not stored; `cause` is a short key for logs, `permanent` = do not retry."""

    def __init__(self, cause: str, detail: str, *, permanent: bool = False) -> None:
        super().__init__(f"{cause}: {detail}")
        self.cause = cause
        self.permanent = permanent


class BatchWriter(Protocol):
    """The seam between the sink and the database client."""

    def write(self, lines: list[str]) -> None:
        """Store `lines` in one request, or raise WriteError."""

    def close(self) -> None:
        """Release connections."""


# HTTP statuses that mean "this data will never be accepted": retrying would stall the queue.
_PERMANENT_STATUSES = frozenset({400, 413, 422})


class InfluxWriter:
    """BatchWriter over influxdb-client's synchronous write API (one request per batch)."""

    def __init__(self, config: TimeseriesConfig, token: str | None) -> None:
        # Imported here so the rest of zeroline does not pay for influxdb-client's import.
        from influxdb_client.client.influxdb_client import InfluxDBClient
        from influxdb_client.client.write_api import SYNCHRONOUS

        self._config = config
        self._client = InfluxDBClient(
            url=config.url,
            token=token or "",
            org=config.org,
            timeout=int(config.request_timeout_s * 1000),
            enable_gzip=config.gzip,
            retries=False,  # the sink retries, from the spool, with its own backoff
        )
        self._write_api = self._client.write_api(write_options=SYNCHRONOUS)

    def write(self, lines: list[str]) -> None:
        """Send `lines`; map every client failure to WriteError at this boundary."""
        import urllib3.exceptions
        from influxdb_client.client.exceptions import InfluxDBError
        from influxdb_client.rest import ApiException

        try:
            # The default write precision is nanoseconds, as to_line_protocol writes.
            self._write_api.write(bucket=self._config.bucket, org=self._config.org, record=lines)
        except ApiException as error:
            status = int(error.status or 0)
            raise WriteError(
                f"HTTP {status}",
                f"{error.reason} from {self._config.url}",
                permanent=status in _PERMANENT_STATUSES,
            ) from None
        except InfluxDBError as error:
            raise WriteError("server error", f"{error.message} from {self._config.url}") from None
        except urllib3.exceptions.NewConnectionError:
            raise WriteError(
                "cannot connect", f"{self._config.url} refused or unreachable"
            ) from None
        except (urllib3.exceptions.TimeoutError, TimeoutError):
            raise WriteError(
                "timeout",
                f"no answer from {self._config.url} within {self._config.request_timeout_s} s",
            ) from None
        except (urllib3.exceptions.HTTPError, OSError) as error:
            raise WriteError(type(error).__name__, f"talking to {self._config.url}") from None

    def close(self) -> None:
        """Close the HTTP connection pool."""
        self._client.close()  # type: ignore[no-untyped-call]  # the library leaves it bare


# -- the sink ------------------------------------------------------------------------------


@dataclass
class _Counters:
    points_submitted: int = 0
    points_invalid: int = 0
    points_written: int = 0
    points_rejected: int = 0
    write_failures: int = 0
    spool_errors: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def add(self, name: str, amount: int = 1) -> None:
        with self.lock:
            setattr(self, name, getattr(self, name) + amount)


class TimeseriesSink:
    """Durable, ordered delivery of points to the time-series database.

    Guarantees: `submit` never blocks on the network (only, every `flush_lines` points, on
    one local fsync); points are written in submission order; a point leaves the spool only
    after the database accepted it, after `drop_oldest` made room (counted in
    `spool_dropped`), or after the database refused it as malformed (`points_rejected`).
    """

    def __init__(
        self,
        config: TimeseriesConfig,
        *,
        writer: BatchWriter | None = None,
        clock_ns: Callable[[], int] = time.time_ns,
    ) -> None:
        self.config = config
        self._writer = writer if writer is not None else InfluxWriter(config, load_token(config))
        self._spool = Spool(
            config.spool_dir, config.spool_max_bytes, flush_interval_s=config.flush_interval_s
        )
        self._clock_ns = clock_ns
        self._counts = _Counters()
        self._problems = RateLimitedLogger(_log)
        self._random = random.Random()
        self._wake = threading.Event()
        self._closing = threading.Event()
        self._stop_now = threading.Event()
        self._failures_in_a_row = 0
        self._limit = config.batch_size  # smaller only while isolating a refused point
        self._sender = threading.Thread(target=self._send_loop, name="tsdb-sender", daemon=True)
        self._flusher = threading.Thread(target=self._flush_loop, name="tsdb-flusher", daemon=True)
        self._sender.start()
        self._flusher.start()

    # -- producer side -------------------------------------------------------------------

    def submit(self, points: Iterable[Point]) -> int:
        """Validate, encode and spool `points`; return how many were accepted."""
        if self._closing.is_set():
            raise RuntimeError("TimeseriesSink.submit called after close()")
        now_ns = self._clock_ns()
        lines: list[str] = []
        for point in points:
            try:
                validate_point(point, now_ns)
            except InputError as error:
                self._counts.add("points_invalid")
                self._problems.warning("invalid point", f"time-series point skipped: {error}")
                continue
            lines.append(to_line_protocol(point))
        try:
            self._spool.append(lines)
        except OSError as error:
            self._counts.add("spool_errors")
            self._problems.warning(
                "spool write",
                f"time-series spool write failed "
                f"({error.strerror}); points are kept in memory for now",
            )
        self._counts.add("points_submitted", len(lines))
        self._wake.set()
        return len(lines)

    def flush(self) -> None:
        """Make every point submitted so far durable in the spool (one write + fsync).

        The daemon calls this before it acknowledges the readings behind the points, so a
        point is on disk before the broker may forget its reading. Raises OSError if the
        spool cannot be written: the caller must then not acknowledge."""
        self._spool.flush()
        self._wake.set()

    def stats(self) -> dict[str, int]:
        """Counters for /metrics and the health point."""
        counts = self._counts
        with counts.lock:
            result = {
                "points_submitted": counts.points_submitted,
                "points_invalid": counts.points_invalid,
                "points_written": counts.points_written,
                "points_rejected": counts.points_rejected,
                "write_failures": counts.write_failures,
                "spool_errors": counts.spool_errors,
            }
        result["spool_dropped"] = self._spool.dropped_lines
        result["spool_bytes"] = self._spool.disk_bytes
        result["spool_buffered"] = self._spool.buffered_lines
        return result

    def close(self, timeout: float = 10.0) -> None:
        """Deliver what can be delivered within `timeout` s; the rest stays in the spool."""
        if self._closing.is_set():
            return
        self._closing.set()
        self._flush_spool()
        self._wake.set()
        self._sender.join(timeout)
        if self._sender.is_alive():
            self._stop_now.set()
            self._sender.join(self.config.request_timeout_s + 1.0)
        self._flusher.join()
        if self._sender.is_alive():
            _log.warning("time-series sender did not stop; its unacked batch will be resent")
        else:
            try:
                self._spool.close()
            except OSError as error:
                _log.warning(
                    "time-series spool could not be flushed at close (%s); "
                    "the points still in memory are lost",
                    error.strerror,
                )
        self._writer.close()

    # -- background threads --------------------------------------------------------------

    def _flush_loop(self) -> None:
        while not self._closing.wait(self.config.flush_interval_s / 2):
            try:
                if self._spool.flush_if_due():
                    self._wake.set()
            except OSError as error:
                self._problems.warning(
                    "spool write", f"time-series spool flush failed ({error.strerror}); will retry"
                )

    def _flush_spool(self) -> None:
        try:
            self._spool.flush()
        except OSError as error:
            self._problems.warning(
                "spool write", f"time-series spool flush failed ({error.strerror}) while closing"
            )

    def _send_loop(self) -> None:
        while not self._stop_now.is_set():
            try:
                if not self._send_next():
                    return
            except Exception:  # a bug, not an outage: keep the thread alive, say where
                _log.exception("time-series sender failed unexpectedly; retrying")
                if not self._back_off(WriteError("internal error", "see the traceback")):
                    return

    def _send_next(self) -> bool:
        """Try to deliver the oldest batch once; False when the sender should stop."""
        batch = self._spool.peek(self._limit)
        if not batch.lines:
            if self._closing.is_set():
                return False
            self._wake.wait(self.config.flush_interval_s)
            self._wake.clear()
            return True
        try:
            self._writer.write(batch.lines)
        except WriteError as failure:
            if not failure.permanent:
                return self._back_off(failure)
            if len(batch.lines) > 1:
                self._limit = max(1, len(batch.lines) // 2)  # bisect down to the bad line
            else:
                self._drop_rejected(batch, failure)
                self._limit = self.config.batch_size
            return True
        self._spool.ack(batch)
        self._on_written(len(batch.lines))
        self._limit = self.config.batch_size
        return True

    def _on_written(self, count: int) -> None:
        self._counts.add("points_written", count)
        if self._failures_in_a_row:
            _log.info(
                "time-series writes to %s work again after %d failed attempts",
                self.config.url,
                self._failures_in_a_row,
            )
            self._failures_in_a_row = 0

    def _drop_rejected(self, batch: Batch, failure: WriteError) -> None:
        """Drop one point the database refuses for good, so it cannot stall the queue."""
        self._spool.ack(batch)
        self._counts.add("points_rejected", len(batch.lines))
        self._problems.warning(
            f"rejected {failure.cause}",
            f"time-series database refused a point ({failure}); dropped it: {batch.lines[0][:200]}",
        )

    def _back_off(self, failure: WriteError) -> bool:
        """Count and log `failure`, wait before the retry; False when the sink should stop."""
        self._counts.add("write_failures")
        self._failures_in_a_row += 1
        delay = min(
            self.config.retry_max_s,
            self.config.retry_initial_s * 2.0 ** min(self._failures_in_a_row - 1, 30),
        )
        delay *= self._random.uniform(0.8, 1.0)  # so a fleet of gateways does not retry in step
        self._problems.warning(
            failure.cause,
            f"time-series write to {self.config.url} failed ({failure}); retrying the same "
            f"batch in {delay:.1f} s, {self._spool.disk_bytes} bytes waiting in the spool",
        )
        # While closing, retries go on until close()'s deadline sets _stop_now.
        return not self._stop_now.wait(delay)
