"""Tests for zeroline.tsdb: points, validation, line protocol, and the spooled sink.

The integration tests write to a real VictoriaMetrics (Debian `victoria-metrics`) through
influxdb-client's `/api/v2/write` and read the points back from its export API.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from dataclasses import replace
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from influxdb_client.client.write.point import Point as ReferencePoint

from support.victoria import Series, VictoriaMetrics, free_port
from zeroline.errors import ConfigError, InputError
from zeroline.tsdb import (
    QARTOD_PASS,
    QARTOD_SUSPECT,
    TOKEN_ENV,
    InfluxWriter,
    Point,
    TimeseriesConfig,
    TimeseriesSink,
    WriteError,
    alert_point,
    health_point,
    load_token,
    reading_point,
    to_line_protocol,
    validate_point,
)

NOW_NS = 1_760_000_000 * 10**9  # a fixed "now" for validation tests (2025-10-09)
HOUR_NS = 3600 * 10**9
BASE_MS = 1_700_000_000_000  # first timestamp of numbered_readings, in ms (2023-11-14)


def config_for(
    tmp_path: Path, url: str = "http://127.0.0.1:9", **overrides: object
) -> TimeseriesConfig:
    base = TimeseriesConfig(
        url=url,
        org="field",
        bucket="sensors",
        spool_dir=tmp_path / "spool",
        flush_interval_s=0.05,
        retry_initial_s=0.01,
        retry_max_s=0.05,
    )
    return replace(base, **overrides)  # type: ignore[arg-type]


def ms_now_ns() -> int:
    """Now, cut to whole milliseconds (what VictoriaMetrics keeps)."""
    return time.time_ns() // 10**6 * 10**6


# -- line protocol -------------------------------------------------------------------------

_NAME_ALPHABET = st.characters(min_codepoint=32, max_codepoint=0x24F, exclude_characters="\\\x7f")
_names = st.text(_NAME_ALPHABET, min_size=1, max_size=12).filter(
    lambda s: not s.startswith(("_", "#")) and s != "time"
)


def reference_line(point: Point) -> str:
    """The same point encoded by influxdb-client, an independent line protocol encoder."""
    reference = ReferencePoint(point.measurement).time(point.time_ns)
    for key, value in point.tags.items():
        reference = reference.tag(key, value)
    for key, number in point.fields.items():
        reference = reference.field(key, number)
    return reference.to_line_protocol()


class TestLineProtocol:
    """Escaping follows the line protocol rules (checked against influxdb-client's encoder)."""

    @pytest.mark.parametrize(
        ("point", "expected"),
        [
            (Point("m", {}, {"f": 1.5}, 5), "m f=1.5 5"),
            (Point("m", {}, {"n": 3}, 5), "m n=3i 5"),
            (Point("m", {}, {"f": 3.0}, 5), "m f=3 5"),
            (Point("a b,c=d", {}, {"f": 1.0}, 1), r"a\ b\,c=d f=1 1"),
            (Point("m", {"k y": "v,x=1 2"}, {"f": 1.0}, 1), r"m,k\ y=v\,x\=1\ 2 f=1 1"),
            (
                Point("m", {"b": "2", "a": "1"}, {"f=g h": -2.5e-8}, 1),
                r"m,a=1,b=2 f\=g\ h=-2.5e-08 1",
            ),
            (Point("m", {}, {"big": 2**62}, 1), f"m big={2**62}i 1"),
        ],
    )
    def test_known_encodings(self, point: Point, expected: str) -> None:
        """Hand-checked lines (rules from the InfluxDB line protocol reference, from memory)."""
        validate_point(point, NOW_NS)
        assert to_line_protocol(point) == expected

    @settings(max_examples=300, deadline=None, derandomize=True)
    @given(
        measurement=_names,
        tags=st.dictionaries(_names, _names, max_size=4),
        fields=st.dictionaries(
            _names,
            st.one_of(
                st.floats(allow_nan=False, allow_infinity=False), st.integers(-(2**63), 2**63 - 1)
            ),
            min_size=1,
            max_size=4,
        ),
        time_ns=st.integers(0, NOW_NS),
    )
    def test_matches_influxdb_client_encoder(
        self, measurement: str, tags: dict[str, str], fields: dict[str, float | int], time_ns: int
    ) -> None:
        """Any valid point encodes exactly as influxdb-client's Point does (a reference)."""
        point = Point(measurement, tags, fields, time_ns)
        validate_point(point, NOW_NS)
        assert to_line_protocol(point) == reference_line(point)


# -- validation ----------------------------------------------------------------------------


def good(**changes: object) -> Point:
    base = Point("zeroline_reading", {"channel": "c1", "site": "north"}, {"raw": 1.0}, NOW_NS)
    return replace(base, **changes)  # type: ignore[arg-type]


class TestValidation:
    """Every kind of bad point is refused with a message naming the problem."""

    @pytest.mark.parametrize(
        ("point", "message"),
        [
            (good(fields={"raw": math.nan}), "is NaN"),
            (good(fields={"raw": math.inf}), "infinite"),
            (good(fields={"raw": -math.inf}), "infinite"),
            (good(fields={}), "no fields"),
            (good(fields={"raw": "12.5"}), "fields must be numbers"),
            (good(fields={"raw": None}), "fields must be numbers"),
            (good(fields={"flag": True}), "boolean"),
            (good(fields={"n": 2**63}), "64-bit"),
            (good(fields={"": 1.0}), "field key '' is empty"),
            (good(fields={"_raw": 1.0}), "starts with '_'"),
            (good(fields={"time": 1.0}), "reserved"),
            (good(tags={"": "x"}), "tag key '' is empty"),
            (good(tags={"_site": "x"}), "starts with '_'"),
            (good(tags={"time": "x"}), "reserved"),
            (good(tags={"site": ""}), "non-empty text value"),
            (good(tags={"site": 7}), "non-empty text value"),
            (good(tags={"site": "a\nb"}), "control character"),
            (good(tags={"site": "a\tb"}), "control character"),
            (good(tags={"site": "C:\\logs"}), "backslash"),
            (good(tags={"si\\te": "x"}), "backslash"),
            (good(measurement=""), "measurement name is empty"),
            (good(measurement="#reading"), "comment"),
            (good(measurement="read\\ing"), "backslash"),
            (good(time_ns=-1), "before 1970"),
            (good(time_ns=NOW_NS + 25 * HOUR_NS), "in the future"),
            (good(time_ns=float(NOW_NS)), "not an integer"),
            (good(time_ns=True), "not an integer"),
        ],
    )
    def test_rejections(self, point: Point, message: str) -> None:
        """validate_point raises InputError with a specific, readable reason."""
        with pytest.raises(InputError, match=message) as caught:
            validate_point(point, NOW_NS)
        assert "\n" not in str(caught.value)

    @pytest.mark.parametrize(
        "time_ns", [0, NOW_NS - 10 * 365 * 24 * HOUR_NS, NOW_NS + 23 * HOUR_NS]
    )
    def test_times_inside_the_window_pass(self, time_ns: int) -> None:
        """1970 itself, old data and a slightly fast clock are all fine."""
        validate_point(good(time_ns=time_ns), NOW_NS)

    def test_spaces_commas_and_equals_are_allowed_in_names(self) -> None:
        """Characters that need escaping are valid: to_line_protocol escapes them."""
        validate_point(good(tags={"site name": "north, field=1"}, fields={"a b": 1}), NOW_NS)


# -- builders and config -------------------------------------------------------------------


class TestBuilders:
    """The schema's builders: numbers only, missing values left out, labels as tags."""

    def test_reading_point_schema(self) -> None:
        """Measured values become floats, quality an int, None and NaN are omitted."""
        point = reading_point(
            "c1",
            NOW_NS,
            raw=12,
            corrected=11.5,
            baseline=0.5,
            uncertainty=None,
            drift_rate=math.nan,
            quality=QARTOD_SUSPECT,
            labels={"site": "north"},
        )
        assert point.measurement == "zeroline_reading"
        assert point.tags == {"channel": "c1", "site": "north"}
        assert point.fields == {"raw": 12.0, "corrected": 11.5, "baseline": 0.5, "quality": 3}
        assert isinstance(point.fields["raw"], float)
        assert isinstance(point.fields["quality"], int)
        validate_point(point, NOW_NS)

    def test_reading_point_rejects_unknown_quality_and_reserved_label(self) -> None:
        """Quality must be a QARTOD code; a label may not override the channel tag."""
        with pytest.raises(InputError, match="QARTOD"):
            reading_point(
                "c1",
                NOW_NS,
                raw=1.0,
                corrected=1.0,
                baseline=0.0,
                uncertainty=0.1,
                drift_rate=0.0,
                quality=5,
            )
        with pytest.raises(InputError, match="label 'channel'"):
            reading_point(
                "c1",
                NOW_NS,
                raw=1.0,
                corrected=1.0,
                baseline=0.0,
                uncertainty=0.1,
                drift_rate=0.0,
                quality=1,
                labels={"channel": "x"},
            )

    def test_alert_point_schema(self) -> None:
        """An alert carries rule and severity as tags and active as 1/0."""
        raised = alert_point(
            "c1",
            NOW_NS,
            rule="drift_limit",
            severity="warning",
            active=True,
            value=15.2,
            limit=15,
            labels={"site": "north"},
        )
        cleared = alert_point(
            "c1",
            NOW_NS,
            rule="drift_limit",
            severity="warning",
            active=False,
            value=None,
            limit=15.0,
        )
        assert raised.tags == {
            "site": "north",
            "channel": "c1",
            "rule": "drift_limit",
            "severity": "warning",
        }
        assert raised.fields == {"active": 1, "value": 15.2, "limit": 15.0}
        assert cleared.fields == {"active": 0, "limit": 15.0}
        with pytest.raises(InputError, match="label 'rule'"):
            alert_point(
                "c1",
                NOW_NS,
                rule="drift_limit",
                severity="warning",
                active=True,
                value=1.0,
                limit=2.0,
                labels={"rule": "x"},
            )

    def test_health_point_schema(self) -> None:
        """Health counters keep their types; missing ones are left out."""
        point = health_point(
            "gw01",
            NOW_NS,
            {"readings_in": 10, "queue_depth": 0, "loop_lag_s": 0.25, "spool_bytes": None},
        )
        assert point.tags == {"gateway": "gw01"}
        assert point.fields == {"readings_in": 10, "queue_depth": 0, "loop_lag_s": 0.25}


class TestConfig:
    """Config values are checked at construction; the token comes from a file or the env."""

    @pytest.mark.parametrize(
        ("change", "message"),
        [
            ({"url": "127.0.0.1:8086"}, "http"),
            ({"bucket": ""}, "bucket"),
            ({"batch_size": 0}, "batch_size"),
            ({"spool_max_bytes": 1000}, "spool_max_bytes"),
            ({"flush_interval_s": 0.0}, "flush_interval_s"),
            ({"retry_max_s": 0.001}, "retry_max_s"),
        ],
    )
    def test_bad_values(self, tmp_path: Path, change: dict[str, object], message: str) -> None:
        """Each impossible value gets a ConfigError naming its key."""
        with pytest.raises(ConfigError, match=message):
            config_for(tmp_path, **change)

    def test_token_file_first_then_env(
        self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """The file wins over the environment; whitespace is stripped from both."""
        monkeypatch.setenv(TOKEN_ENV, "  from-env \n")
        token_file = tmp_path / "token"
        token_file.write_text("from-file\n")
        assert load_token(config_for(tmp_path, token_file=token_file)) == "from-file"
        assert load_token(config_for(tmp_path)) == "from-env"
        monkeypatch.delenv(TOKEN_ENV)
        assert load_token(config_for(tmp_path)) is None

    def test_unreadable_or_empty_token_file(self, tmp_path: Path) -> None:
        """A missing or empty token file is a config error, not an anonymous write."""
        with pytest.raises(ConfigError, match="cannot read"):
            load_token(config_for(tmp_path, token_file=tmp_path / "absent"))
        (tmp_path / "empty").write_text("  \n")
        with pytest.raises(ConfigError, match="is empty"):
            load_token(config_for(tmp_path, token_file=tmp_path / "empty"))


# -- the sink with a scripted writer ---------------------------------------------------------


class ScriptedWriter:
    """A BatchWriter that fails as told and records what it accepted."""

    def __init__(self, transient_failures: int = 0, refuse_marker: str | None = None) -> None:
        self.transient_failures = transient_failures
        self.refuse_marker = refuse_marker
        self.accepted: list[str] = []
        self.requests = 0
        self.up = threading.Event()
        self.up.set()

    def write(self, lines: list[str]) -> None:
        self.requests += 1
        if not self.up.is_set():
            raise WriteError("cannot connect", "scripted outage")
        if self.transient_failures > 0:
            self.transient_failures -= 1
            raise WriteError("HTTP 503", "scripted")
        if self.refuse_marker and any(self.refuse_marker in line for line in lines):
            raise WriteError("HTTP 400", "scripted bad line", permanent=True)
        self.accepted.extend(lines)

    def close(self) -> None:
        pass


def numbered_readings(count: int, start: int = 0, scenario: str = "unit") -> list[Point]:
    """Readings whose value and timestamp both encode their index."""
    return [
        reading_point(
            "c1",
            (BASE_MS + i) * 10**6,
            raw=float(i),
            corrected=float(i),
            baseline=0.0,
            uncertainty=0.1,
            drift_rate=0.0,
            quality=QARTOD_PASS,
            labels={"scenario": scenario},
        )
        for i in range(start, start + count)
    ]


def wait_for(condition: object, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if callable(condition) and condition():
            return True
        time.sleep(0.02)
    return False


class TestSinkBehaviour:
    """Retry, order, rejection and close semantics, with a scripted writer."""

    def test_transient_failures_are_retried_in_order(self, tmp_path: Path) -> None:
        """Five failed requests, then everything arrives once and in order."""
        writer = ScriptedWriter(transient_failures=5)
        sink = TimeseriesSink(config_for(tmp_path, batch_size=100), writer=writer)
        points = numbered_readings(1000)
        for index in range(0, 1000, 10):
            sink.submit(points[index : index + 10])
        sink.close(timeout=10)
        assert writer.accepted == [to_line_protocol(p) for p in points]
        stats = sink.stats()
        assert stats["write_failures"] == 5
        assert stats["points_written"] == stats["points_submitted"] == 1000

    def test_refused_point_is_isolated_and_dropped(self, tmp_path: Path) -> None:
        """A permanently refused point is bisected out; all others arrive in order."""
        writer = ScriptedWriter(refuse_marker="raw=137,")
        sink = TimeseriesSink(config_for(tmp_path, batch_size=256), writer=writer)
        points = numbered_readings(600)
        sink.submit(points)
        sink.close(timeout=10)
        expected = [to_line_protocol(p) for p in points]
        del expected[137]
        assert writer.accepted == expected
        assert sink.stats()["points_rejected"] == 1

    def test_invalid_points_are_counted_not_raised(self, tmp_path: Path) -> None:
        """submit skips and counts bad points; the good ones in the same call go through."""
        writer = ScriptedWriter()
        sink = TimeseriesSink(config_for(tmp_path), writer=writer)
        bad = good(fields={"raw": "text"})
        assert sink.submit([*numbered_readings(2), bad, *numbered_readings(1, start=2)]) == 3
        sink.close(timeout=5)
        assert sink.stats()["points_invalid"] == 1
        assert len(writer.accepted) == 3

    def test_close_during_outage_keeps_the_rest_for_the_next_sink(self, tmp_path: Path) -> None:
        """close() gives up on a dead database at its timeout; a new sink delivers the rest."""
        writer = ScriptedWriter()
        writer.up.clear()
        sink = TimeseriesSink(config_for(tmp_path), writer=writer)
        sink.submit(numbered_readings(300))
        started = time.monotonic()
        sink.close(timeout=1.0)
        assert time.monotonic() - started < 2.5  # it tried for its timeout, then gave up
        assert sink.stats()["points_written"] == 0

        second = ScriptedWriter()
        successor = TimeseriesSink(config_for(tmp_path), writer=second)
        successor.close(timeout=5)
        assert second.accepted == [to_line_protocol(p) for p in numbered_readings(300)]

    def test_backoff_grows_and_is_capped(self, tmp_path: Path) -> None:
        """During an outage the retry rate falls to about one per retry_max_s."""
        writer = ScriptedWriter()
        writer.up.clear()
        sink = TimeseriesSink(
            config_for(tmp_path, retry_initial_s=0.05, retry_max_s=0.4), writer=writer
        )
        sink.submit(numbered_readings(10))
        time.sleep(3.0)
        requests = writer.requests
        sink.close(timeout=1)
        # Delays 0.05, 0.1, 0.2, then ≤0.4 s (jitter 0.8–1.0): about 9–11 requests in 3 s;
        # without backoff it would be thousands, with no cap only 5.
        assert 7 <= requests <= 14, requests

    def test_failures_are_logged_once_per_cause_and_never_show_the_token(
        self, tmp_path: Path, caplog: pytest.LogCaptureFixture
    ) -> None:
        """A real client against a closed port: one log line per cause, no token in logs."""
        token_file = tmp_path / "token"
        token_file.write_text("s3cr3t-token-value\n")
        config = config_for(tmp_path, url=f"http://127.0.0.1:{free_port()}", token_file=token_file)
        with caplog.at_level(logging.DEBUG):
            sink = TimeseriesSink(config)
            sink.submit(numbered_readings(5))
            assert wait_for(lambda: sink.stats()["write_failures"] >= 5, timeout=10)
            sink.close(timeout=1)
        assert "s3cr3t" not in caplog.text
        failure_lines = [r for r in caplog.records if "cannot connect" in r.getMessage()]
        assert len(failure_lines) == 1


# -- the real database ---------------------------------------------------------------------


class RecordingWriter:
    """The real InfluxWriter, recording every batch the database accepted, in order."""

    def __init__(self, inner: InfluxWriter, record: list[str]) -> None:
        self._inner = inner
        self.record = record

    def write(self, lines: list[str]) -> None:
        self._inner.write(lines)
        self.record.extend(lines)

    def close(self) -> None:
        self._inner.close()


def recording_sink(config: TimeseriesConfig, record: list[str]) -> TimeseriesSink:
    return TimeseriesSink(config, writer=RecordingWriter(InfluxWriter(config, None), record))


def by_name(series: list[Series]) -> dict[str, Series]:
    return {s.name: s for s in series}


@pytest.mark.service
class TestVictoriaMetrics:
    """Points written through the sink into a real VictoriaMetrics and read back."""

    def test_round_trip_of_the_schema(self, victoria: VictoriaMetrics, tmp_path: Path) -> None:
        """Readings, alerts and health points come back with equal values (time in ms).

        VictoriaMetrics names series measurement_field, keeps tags as labels and cuts time
        to milliseconds (its documentation; checked in /work/shared/services.md).
        """
        t0 = ms_now_ns() - HOUR_NS
        sub_ms = 123_456  # dropped by the database: it keeps milliseconds
        labels = {"site": "north field, A=1", "probe": "ph-2"}
        readings = [
            reading_point(
                "ph 1",
                t0 + i * 10**9 + sub_ms,
                raw=7.0 + i / 8,
                corrected=6.9 + i / 8,
                baseline=0.1,
                uncertainty=0.0125,
                drift_rate=-2.5e-7,
                quality=QARTOD_PASS,
                labels=labels,
            )
            for i in range(20)
        ]
        alerts = [
            alert_point(
                "ph 1",
                t0 + 5 * 10**9,
                rule="drift_limit",
                severity="warning",
                active=True,
                value=0.75,
                limit=0.5,
                labels=labels,
            ),
            alert_point(
                "ph 1",
                t0 + 9 * 10**9,
                rule="drift_limit",
                severity="warning",
                active=False,
                value=0.25,
                limit=0.5,
                labels=labels,
            ),
        ]
        health = health_point(
            "gw01", t0, {"readings_in": 20, "spool_bytes": 4096, "spool_dropped": 0}
        )
        sink = TimeseriesSink(config_for(tmp_path, url=victoria.url))
        assert sink.submit([*readings, *alerts, health]) == 23
        sink.close(timeout=20)
        assert sink.stats()["points_written"] == 23

        series = by_name(victoria.export_after_flush('{__name__=~"zeroline_.*"}'))
        expected_times = [(t0 + i * 10**9) // 10**6 for i in range(20)]
        for name in ("raw", "corrected", "baseline", "uncertainty", "drift_rate", "quality"):
            got = series[f"zeroline_reading_{name}"]
            assert got.labels == {"channel": "ph 1", **labels}
            assert [t for t, _ in got.samples] == expected_times
            assert [v for _, v in got.samples] == [float(p.fields[name]) for p in readings]
        active = series["zeroline_alert_active"]
        assert active.labels == {
            "channel": "ph 1",
            "rule": "drift_limit",
            "severity": "warning",
            **labels,
        }
        assert [v for _, v in active.samples] == [1.0, 0.0]
        assert [v for _, v in series["zeroline_alert_value"].samples] == [0.75, 0.25]
        assert series["zeroline_health_readings_in"].labels == {"gateway": "gw01"}
        assert series["zeroline_health_spool_bytes"].samples == [(t0 // 10**6, 4096.0)]

    def test_bulk_write_throughput(self, victoria: VictoriaMetrics, tmp_path: Path) -> None:
        """50,000 readings in batches of 5,000: all stored once; the rate is printed."""
        count = 50_000
        t0 = ms_now_ns() - HOUR_NS
        points = [
            reading_point(
                "c1",
                t0 + i * 10**6,
                raw=float(i),
                corrected=float(i),
                baseline=0.0,
                uncertainty=0.1,
                drift_rate=0.0,
                quality=1,
            )
            for i in range(count)
        ]
        sink = TimeseriesSink(config_for(tmp_path, url=victoria.url, batch_size=5000))
        started = time.perf_counter()
        for index in range(0, count, 500):
            sink.submit(points[index : index + 500])
        assert wait_for(lambda: sink.stats()["points_written"] == count, timeout=60)
        elapsed = time.perf_counter() - started
        sink.close(timeout=10)
        print(
            f"\n{count} points ({count * 6} samples) in {elapsed:.2f} s: "
            f"{count / elapsed:,.0f} points/s"
        )
        raw = by_name(victoria.export_after_flush('{__name__="zeroline_reading_raw"}'))
        samples = raw["zeroline_reading_raw"].samples
        assert [v for _, v in samples] == [float(i) for i in range(count)]

    def test_outage_of_a_minute_loses_nothing(
        self, victoria: VictoriaMetrics, tmp_path: Path
    ) -> None:
        """The database is down ~60 s while points keep coming; afterwards all are there.

        Two gateways at once: "continuous" keeps its sink running through the outage;
        "restarted" closes its sink during the outage and opens a new one on the same spool
        after the database is back. Both must end with every point stored, in submission
        order, none twice (the server runs without deduplication, so a resend would show).
        """
        common = {
            "batch_size": 500,
            "flush_interval_s": 0.2,
            "retry_initial_s": 0.2,
            "retry_max_s": 2.0,
        }
        cfg_cont = config_for(tmp_path / "cont", url=victoria.url, **common)
        cfg_rest = config_for(tmp_path / "rest", url=victoria.url, **common)
        sent: dict[str, list[str]] = {"continuous": [], "restarted": []}
        written: dict[str, list[str]] = {"continuous": [], "restarted": []}
        continuous = recording_sink(cfg_cont, written["continuous"])
        restarted: dict[str, TimeseriesSink | None] = {
            "sink": recording_sink(cfg_rest, written["restarted"])
        }
        stop = threading.Event()
        lock = threading.Lock()

        def produce() -> None:
            while not stop.is_set():
                for scenario in ("continuous", "restarted"):
                    with lock:
                        target = continuous if scenario == "continuous" else restarted["sink"]
                        if target is None:
                            continue  # that gateway is "down" between its two sinks
                        index = len(sent[scenario])
                        point = numbered_readings(1, start=index, scenario=scenario)[0]
                        target.submit([point])
                        sent[scenario].append(to_line_protocol(point))
                time.sleep(0.01)

        producer = threading.Thread(target=produce)
        producer.start()
        time.sleep(2.0)
        victoria.stop()
        outage_started = time.monotonic()
        time.sleep(20.0)
        with lock:
            old = restarted["sink"]
            restarted["sink"] = None
        assert old is not None
        old.close(timeout=1.0)
        assert old.stats()["write_failures"] > 0
        time.sleep(max(0.0, 60.0 - (time.monotonic() - outage_started)))
        failures_during_outage = continuous.stats()["write_failures"]
        victoria.start()
        outage_s = time.monotonic() - outage_started
        with lock:
            restarted["sink"] = recording_sink(cfg_rest, written["restarted"])
        time.sleep(3.0)
        stop.set()
        producer.join()
        new = restarted["sink"]
        assert new is not None
        continuous.close(timeout=30)
        new.close(timeout=30)

        print(
            f"\noutage {outage_s:.1f} s; continuous: {len(sent['continuous'])} points, "
            f"{failures_during_outage} failed requests; restarted: "
            f"{len(sent['restarted'])} points"
        )
        assert failures_during_outage >= 20  # it was really down, and retried (capped 2 s)
        for scenario in ("continuous", "restarted"):
            assert written[scenario] == sent[scenario], scenario
        exported = victoria.export_after_flush('{__name__="zeroline_reading_raw"}')
        for series in exported:
            scenario = series.labels["scenario"]
            expected = [(BASE_MS + i, float(i)) for i in range(len(sent[scenario]))]
            assert series.samples == expected, scenario
        assert sorted(s.labels["scenario"] for s in exported) == ["continuous", "restarted"]

    def test_full_spool_drops_oldest_and_keeps_running(
        self, victoria: VictoriaMetrics, tmp_path: Path
    ) -> None:
        """With the database down the spool stays within its bound, counting drops; the
        sink keeps running and delivers the newest points once the database is back."""
        victoria.stop()
        max_bytes = 64 * 1024
        config = config_for(
            tmp_path, url=victoria.url, spool_max_bytes=max_bytes, batch_size=200, retry_max_s=0.5
        )
        record: list[str] = []
        sink = recording_sink(config, record)
        points = numbered_readings(3000, scenario="full")
        for index in range(0, len(points), 50):
            sink.submit(points[index : index + 50])
            assert sink.stats()["spool_bytes"] <= max_bytes
        stats = sink.stats()
        assert stats["spool_dropped"] > 0
        victoria.start()
        later = numbered_readings(100, start=3000, scenario="full")
        sink.submit(later)
        assert wait_for(
            lambda: sink.stats()["points_written"] + sink.stats()["spool_dropped"] == 3100,
            timeout=30,
        ), str(sink.stats())
        sink.close(timeout=10)
        assert sink.stats()["points_written"] == len(record) > 100
        index_of = {to_line_protocol(p): i for i, p in enumerate(points + later)}
        written = [index_of[line] for line in record]
        # In order and none twice; the oldest went (drop_oldest), the newest all arrived.
        # (A batch being sent while its segment is dropped is delivered, so there may be
        # one gap before the newest run.)
        assert written == sorted(set(written))
        assert written[-100:] == list(range(3000, 3100))
        assert written[0] > 0
        exported = by_name(victoria.export_after_flush('{__name__="zeroline_reading_raw"}'))
        values = [v for _, v in exported["zeroline_reading_raw"].samples]
        assert values == [float(i) for i in written]
