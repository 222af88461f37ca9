"""`zeroline run` writing into a real VictoriaMetrics, fed through a real Mosquitto.

The chain under test is the whole daemon: `mosquitto_pub` publishes readings, the daemon
corrects them, publishes `zeroline/<channel>/corrected` and `/alert` (read back with
`mosquitto_sub`) and writes the same results through its disk spool into VictoriaMetrics
(read back with its `/api/v1/export`). The MQTT outputs are the reference for the database:
both come from the same `Corrected` result, so every output must be in the database with
equal values (VictoriaMetrics cuts time to milliseconds and values to 12-15 significant
digits; the schema is in deploy/timeseries.md). VictoriaMetrics runs without
`-dedup.minScrapeInterval`, so a point written twice would show up twice.

Reading times are whole milliseconds, written as decimals (…613.123, not exact in binary):
the database must store each on the millisecond it names. Data are invented demo
readings (a slowly drifting gas signal with noise, seeded), timed in the recent past so the
decoder's time window accepts them.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import subprocess
import sys
import threading
import time
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from support.broker import Mosquitto, Subscriber, publish_lines, wait_until
from support.victoria import Series, VictoriaMetrics
from test_daemon_integration import Daemon
from zeroline.tsdb import QARTOD_BY_QUALITY_FLAG

pytestmark = pytest.mark.service

READING_FIELDS = ("raw", "corrected", "baseline", "uncertainty")
CHANNELS = ("a-gas", "b-gas")
STATUS_PAGE = re.compile(r"status page on (http://127\.0\.0\.1:\d+)")


# -- the stack: broker, database, daemon --------------------------------------------------


@pytest.fixture()
def daemons() -> Iterator[list[Daemon]]:
    """Every daemon a test starts; the ones still alive are SIGKILLed at the end."""
    started: list[Daemon] = []
    yield started
    for daemon in started:
        if daemon.alive():
            daemon.kill()


def write_config(
    directory: Path,
    broker: Mosquitto,
    tsdb_url: str | None,
    *,
    drift_limit: float = 1.0,
    spool_max_bytes: int = 16 * 1024 * 1024,
    client_id: str | None = None,
) -> Path:
    """A daemon config: one template `{1}-gas` on site/+/gas, status page on a free port,
    and (with `tsdb_url`) the time-series output with its spool under `directory`."""
    timeseries = ""
    if tsdb_url is not None:
        timeseries = f"""
timeseries:
  url: {tsdb_url}
  org: field
  bucket: sensors
  spool_dir: {directory / "spool"}
  spool_max_bytes: {spool_max_bytes}
  batch_size: 500
  flush_every: 1s
"""
    path = directory / "zeroline.yaml"
    path.write_text(f"""
broker:
  host: 127.0.0.1
  port: {broker.port}
  client_id: {client_id or f"zl-ts-{os.getpid()}-{directory.name}"}
  inflight: 50
state: {{dir: {directory / "state"}, snapshot_every: 2s}}
http: {{listen: "127.0.0.1:0"}}
limits: {{queue: 200}}
logging: {{level: info}}
{timeseries}
channels:
  - name: "{{1}}-gas"
    topic: site/+/gas
    basis: [constant, {{polynomial: {{of: t, degree: 1, scale: 1d}}}}]
    memory: {{half_life: 2d}}
    alerts: {{drift_limit: {drift_limit}}}
""")
    return path


def start_daemon(daemons: list[Daemon], config: Path) -> Daemon:
    daemon = Daemon(config)
    daemons.append(daemon)
    daemon.start()
    return daemon


def subscribe(broker: Mosquitto, *topics: str) -> Subscriber:
    """`mosquitto_sub` on `topics` and zeroline/status; returns once it is subscribed,
    which the retained `online` status arriving shows (mosquitto_sub has no ready signal)."""
    subscriber = Subscriber(broker, "zeroline/status", *topics)
    assert subscriber.wait_count("zeroline/status", 1, 10), "no retained status arrived"
    return subscriber


def status_url(daemon: Daemon) -> str:
    """The status page's address, from the daemon's log line."""
    found: list[str] = []

    def logged() -> bool:
        found[:] = STATUS_PAGE.findall(daemon.new_log())
        return bool(found)

    assert wait_until(logged, 10), daemon.new_log()
    return found[-1]


def http_get(url: str) -> tuple[int, bytes]:
    try:
        with urllib.request.urlopen(url, timeout=10) as response:
            return int(response.status), bytes(response.read())
    except urllib.error.HTTPError as error:
        return int(error.code), bytes(error.read())


def daemon_gauges(daemon: Daemon) -> dict[str, float]:
    """The unlabelled samples of the daemon's /metrics, by name."""
    from prometheus_client.parser import text_string_to_metric_families

    status, body = http_get(status_url(daemon) + "/metrics")
    assert status == 200
    return {
        sample.name: sample.value
        for family in text_string_to_metric_families(body.decode())
        for sample in family.samples
        if not sample.labels
    }


# -- demo data ------------------------------------------------------------------------------


def readings(count: int, seed: int, start: float, step: float) -> list[dict[str, float]]:
    """Invented demo readings: level 1.5, drift 0.3 per day, noise SD 0.02 (seeded)."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(count):
        t = round(start + step * i, 3)
        value = 1.5 + 0.3 * (t - start) / 86400 + rng.normal(0.0, 0.02)
        out.append({"time": t, "value": float(value)})
    return out


def recent_start(hours_ago: float) -> float:
    """A whole second `hours_ago` in the past: with 1/8 s steps every time is exact."""
    return float(int(time.time() - 3600 * hours_ago))


class SteadyPublisher:
    """`mosquitto_pub -l` per site, fed one reading every `period` s from a thread."""

    def __init__(self, broker: Mosquitto, sites: tuple[str, ...], period: float) -> None:
        self.period = period
        self.start_time = recent_start(2.0)
        self.sent = {site: 0 for site in sites}
        self._rng = np.random.default_rng(5)
        self._stop = threading.Event()
        self._processes = {
            site: subprocess.Popen(
                ["mosquitto_pub", *broker.client_args(), "-q", "1", "-t", f"site/{site}/gas", "-l"],
                stdin=subprocess.PIPE,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
            )
            for site in sites
        }
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        next_at = time.monotonic()
        index = 0
        while not self._stop.is_set():
            for site, process in self._processes.items():
                t = self.start_time + index / 8.0
                value = 1.5 + 1e-5 * index + float(self._rng.normal(0.0, 0.02))
                assert process.stdin is not None
                process.stdin.write((json.dumps({"time": t, "value": value}) + "\n").encode())
                process.stdin.flush()
                self.sent[site] = index + 1
            index += 1
            next_at += self.period
            self._stop.wait(max(0.0, next_at - time.monotonic()))

    def stop(self) -> dict[str, int]:
        """Stop feeding, let each mosquitto_pub deliver what it has, return counts sent."""
        self._stop.set()
        self._thread.join(10)
        for process in self._processes.values():
            assert process.stdin is not None
            process.stdin.close()
            assert process.wait(30) == 0
        return dict(self.sent)

    def kill(self) -> None:
        self._stop.set()
        for process in self._processes.values():
            if process.poll() is None:
                process.kill()
                process.wait(5)


# -- what came out -------------------------------------------------------------------------


def outputs(subscriber: Subscriber, channel: str, kind: str) -> list[dict[str, Any]]:
    """Payloads received on zeroline/<channel>/<kind>, in arrival order."""
    return [json.loads(p) for _, p in subscriber.messages(f"zeroline/{channel}/{kind}")]


def by_time(items: list[dict[str, Any]]) -> dict[int, list[dict[str, Any]]]:
    """Outputs keyed by their time in whole milliseconds (what the database keeps)."""
    seen: dict[int, list[dict[str, Any]]] = {}
    for item in items:
        seen.setdefault(to_ms(item["time"]), []).append(item)
    return seen


def to_ms(seconds: float) -> int:
    """The millisecond a reading's time names (these tests only use whole milliseconds)."""
    milliseconds = round(seconds * 1000)
    assert abs(seconds * 1000 - milliseconds) < 1e-3, "times in these tests are whole ms"
    return milliseconds


Stored = dict[tuple[str, str, str], Series]


def export(victoria: VictoriaMetrics, match: str) -> Stored:
    """The series matching `match`, keyed by (name, channel, rule)."""
    return {
        (s.name, s.labels.get("channel", ""), s.labels.get("rule", "")): s
        for s in victoria.export(match)
    }


def wait_for_export(
    victoria: VictoriaMetrics,
    match: str,
    complete: Callable[[Stored], bool],
    timeout: float,
) -> Stored:
    """Poll the export (after a force_flush each time) until `complete` holds."""
    found: Stored = {}

    def ready() -> bool:
        victoria.force_flush()
        found.clear()
        found.update(export(victoria, match))
        return complete(found)

    wait_until(ready, timeout, interval=0.5)
    return found


def sample_count(series: Stored, name: str, channel: str) -> int:
    """Samples of every series `name` of `channel` (all rules, for alert series)."""
    return sum(len(s.samples) for (n, c, _), s in series.items() if (n, c) == (name, channel))


def duplicate_times(series: Series) -> list[int]:
    times = [t for t, _ in series.samples]
    return sorted({t for t in times if times.count(t) > 1})


def assert_readings_stored(stored: Stored, channel: str, published: list[dict[str, Any]]) -> int:
    """Every corrected output is in the database once, with equal values; return the count.

    `published` are the MQTT outputs, possibly with identical copies of one reading: after
    a daemon crash the broker redelivers what was not acknowledged, and a reading processed
    but not yet journaled is processed again (at-least-once outputs, zeroline.service).
    Copies must agree. A point may be stored twice only for such a re-published reading:
    its first point reached the spool on disk just before the crash (see the report in
    TestOutage); any other duplicate is a fault."""
    reference = by_time(published)
    for copies in reference.values():
        assert all(copy == copies[0] for copy in copies[1:]), copies
    republished = [t for t, copies in reference.items() if len(copies) > 1]
    times = sorted(reference)
    for field in (*READING_FIELDS, "quality"):
        series = stored[(f"zeroline_reading_{field}", channel, "")]
        twice = duplicate_times(series)
        assert set(twice) <= set(republished), f"{field}: points stored twice: {twice}"
        series = Series(series.name, series.labels, sorted(set(series.samples)))
        assert duplicate_times(series) == [], f"{field}: two different values at one time"
        expected = []
        for t in times:
            body = reference[t][0]
            value = QARTOD_BY_QUALITY_FLAG[body["quality"]] if field == "quality" else body[field]
            if value is not None:  # a field without a value is left out of the point
                expected.append((t, float(value)))
        assert_samples_equal(series.samples, expected, field)
    return len(times)


def assert_samples_equal(
    got: list[tuple[int, float]], expected: list[tuple[int, float]], what: str
) -> None:
    """Same timestamps exactly; values equal to VictoriaMetrics' precision.

    VictoriaMetrics stores values as float64 but converts them through a decimal mantissa
    on ingestion, keeping 12 to 15 significant digits (its docs, keyConcepts "values"
    section; observed here: 1.5071754681600782 comes back as 1.50717546816), so values are
    compared to a relative 1e-11, far below any sensor's resolution."""
    assert [t for t, _ in got] == [t for t, _ in expected], what
    assert [v for _, v in got] == pytest.approx([v for _, v in expected], rel=1e-11, abs=0), what


# -- the tests -----------------------------------------------------------------------------


class TestRoundTrip:
    def test_every_output_is_in_the_database(
        self, broker: Mosquitto, victoria: VictoriaMetrics, tmp_path: Path, daemons: list[Daemon]
    ) -> None:
        """300 readings on each of 2 channels (mosquitto_pub): every corrected reading and
        every alert event published over MQTT is in VictoriaMetrics, equal, once."""
        config = write_config(tmp_path, broker, victoria.url, drift_limit=1.0)
        daemon = start_daemon(daemons, config)
        subscriber = subscribe(broker, "zeroline/+/corrected", "zeroline/+/alert")
        start = recent_start(24.0)
        data = {
            "a": readings(300, seed=21, start=start, step=60.001),
            "b": readings(300, seed=22, start=start + 0.5, step=60.013),
        }
        for site, rows in data.items():
            publish_lines(broker, f"site/{site}/gas", [json.dumps(row) for row in rows])
        for channel in CHANNELS:
            assert subscriber.wait_count(f"/{channel}/corrected", 300, 30)
        alerts = {channel: outputs(subscriber, channel, "alert") for channel in CHANNELS}
        assert all(alerts.values()), "the small drift_limit raised no alert"

        def complete(found: Stored) -> bool:
            return all(
                sample_count(found, "zeroline_reading_raw", c) >= 300
                and sample_count(found, "zeroline_alert_active", c) >= len(alerts[c])
                for c in CHANNELS
            )

        stored = wait_for_export(
            victoria, '{__name__=~"zeroline_(reading|alert)_.*"}', complete, timeout=30
        )
        checked = 0
        for channel, site in zip(CHANNELS, data, strict=True):
            corrected = outputs(subscriber, channel, "corrected")
            assert [c["raw"] for c in corrected] == [row["value"] for row in data[site]]
            checked += assert_readings_stored(stored, channel, corrected)
            checked += assert_alerts_stored(stored, channel, alerts[channel])
        assert daemon.terminate() == 0
        print(f"\nround trip: {checked} readings and alert events checked in the database")


def assert_alerts_stored(stored: Stored, channel: str, events: list[dict[str, Any]]) -> int:
    """Every alert event is a point: active 1/0, value and limit, tags rule and severity."""
    checked = 0
    for rule in sorted({event["rule"] for event in events}):
        mine = [e for e in events if e["rule"] == rule]
        expected = {
            "active": [(to_ms(e["time"]), 1.0 if e["state"] == "raised" else 0.0) for e in mine],
            "value": [
                (to_ms(e["time"]), float(e["value"])) for e in mine if e["value"] is not None
            ],
            "limit": [
                (to_ms(e["time"]), float(e["limit"])) for e in mine if e["limit"] is not None
            ],
        }
        for field, samples in expected.items():
            series = stored[(f"zeroline_alert_{field}", channel, rule)]
            assert series.labels["severity"] == mine[0]["severity"]
            assert_samples_equal(series.samples, sorted(samples), f"{field} {rule}")
        checked += len(mine)
    return checked


def run_until(moment: float) -> None:
    """Wait for a point of the scenario's timeline (monotonic clock)."""
    time.sleep(max(0.0, moment - time.monotonic()))


def unique_outputs(subscriber: Subscriber, channel: str) -> int:
    return len(by_time(outputs(subscriber, channel, "corrected")))


class TestOutage:
    OUTAGE_S = 60.0
    DAEMON_KILLED_AT_S = 30.0  # into the outage
    DAEMON_RESTARTED_AT_S = 35.0  # its sender's backoff then retries just after the outage

    def test_database_down_a_minute_with_a_daemon_crash_inside(
        self, broker: Mosquitto, victoria: VictoriaMetrics, tmp_path: Path, daemons: list[Daemon]
    ) -> None:
        """Readings flow at a steady 10/s per channel while VictoriaMetrics is stopped
        (SIGTERM) for 60 s; inside the outage the daemon is SIGKILLed and restarted on the
        same spool and state. Afterwards every corrected reading is in the database, on its
        millisecond, none twice, with the values published over MQTT."""
        config = write_config(tmp_path, broker, victoria.url, drift_limit=5.0)
        daemon = start_daemon(daemons, config)
        subscriber = subscribe(broker, "zeroline/+/corrected")
        publisher = SteadyPublisher(broker, ("a", "b"), period=0.1)
        try:
            assert wait_until(lambda: unique_outputs(subscriber, "a-gas") >= 30, 20)
            assert wait_for_export(
                victoria,
                '{__name__="zeroline_reading_raw"}',
                lambda found: sample_count(found, "zeroline_reading_raw", "a-gas") >= 10,
                timeout=20,
            )
            victoria.stop()
            down = time.monotonic()
            before_outage = unique_outputs(subscriber, "a-gas")
            assert wait_until(lambda: "time-series write" in daemon.new_log(), 20)

            run_until(down + self.DAEMON_KILLED_AT_S)
            corrected_while_down = unique_outputs(subscriber, "a-gas") - before_outage
            sent_at_kill = publisher.sent["a"]
            daemon.kill()
            spool_at_kill = spool_bytes(tmp_path / "spool")
            run_until(down + self.DAEMON_RESTARTED_AT_S)
            daemon.start()
            assert "restored 2 channel(s) from the snapshot" in daemon.new_log()

            run_until(down + self.OUTAGE_S)
            victoria.start()
            outage_s = time.monotonic() - down
            back = time.monotonic()
            run_until(back + 5.0)  # readings keep flowing after the outage too
        finally:
            sent = publisher.stop()
        assert wait_until(
            lambda: all(
                unique_outputs(subscriber, channel) >= sent[site]
                for channel, site in zip(CHANNELS, sent, strict=True)
            ),
            30,
        )

        def complete(found: Stored) -> bool:
            return all(
                sample_count(found, f"zeroline_reading_{field}", channel) >= sent[site]
                for channel, site in zip(CHANNELS, sent, strict=True)
                for field in ("raw", "corrected")
            )

        stored = wait_for_export(
            victoria, '{__name__=~"zeroline_(reading|health)_.*"}', complete, timeout=60
        )
        recovered_s = time.monotonic() - back
        duplicates_vm = {
            channel: duplicate_times(stored[("zeroline_reading_raw", channel, "")])
            for channel in CHANNELS
        }
        republished = {
            channel: sum(
                len(c) - 1 for c in by_time(outputs(subscriber, channel, "corrected")).values()
            )
            for channel in CHANNELS
        }
        print(
            f"\noutage {outage_s:.1f} s; {sum(sent.values())} readings published "
            f"({sent_at_kill} per channel before the kill), {corrected_while_down} corrected on "
            f"a-gas while the database was down before the kill; spool {spool_at_kill} bytes "
            f"at the kill; all stored {recovered_s:.1f} s after the database came back (5 s of "
            f"them still publishing); "
            f"duplicates in the database {duplicates_vm}; readings re-published over MQTT "
            f"after the crash {republished}"
        )
        # The daemon kept correcting while the database was away (10 readings/s).
        assert corrected_while_down >= 0.8 * 10 * self.DAEMON_KILLED_AT_S
        checked = 0
        for channel in CHANNELS:
            published = outputs(subscriber, channel, "corrected")
            assert sorted(by_time(published)) == [
                to_ms(p["time"]) for p in unique_in_order(published)
            ]
            checked += assert_readings_stored(stored, channel, published)
        assert checked == sum(sent.values())
        failures = stored[("zeroline_health_tsdb_write_failures", "", "")]
        assert max(v for _, v in failures.samples) > 0  # the outage was seen and counted
        assert daemon.terminate() == 0
        print(f"outage: {checked} points checked, none missing, none twice")


def unique_in_order(items: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The first copy of each reading, in arrival order."""
    seen: set[int] = set()
    first = []
    for item in items:
        key = to_ms(item["time"])
        if key not in seen:
            seen.add(key)
            first.append(item)
    return first


def spool_bytes(directory: Path) -> int:
    """Bytes in the spool's segment files (a file may vanish while we look: dropped)."""
    total = 0
    for path in directory.glob("*.seg"):
        with contextlib.suppress(FileNotFoundError):
            total += path.stat().st_size
    return total


class SpoolWatcher:
    """Samples the spool's size every few ms in a thread, to see transient peaks.

    The spool enforces its bound after each flush, not after each segment written, so
    during a flush the files may exceed the bound by up to that flush (reported, not a
    test failure; the bound is checked at quiet moments)."""

    def __init__(self, directory: Path) -> None:
        self.directory = directory
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(0.002):
            self.peak = max(self.peak, spool_bytes(self.directory))

    def stop(self) -> int:
        self._stop.set()
        self._thread.join(5)
        return self.peak


def wait_committed(daemon: Daemon, count: int) -> None:
    """Until `count` readings are acknowledged, i.e. their points flushed to the spool."""
    assert wait_until(
        lambda: daemon_gauges(daemon).get("zeroline_acked_total", 0) >= count, 20, interval=0.05
    ), daemon_gauges(daemon)


class TestSpoolFull:
    MAX_BYTES = 65536  # the loader's minimum

    def test_bound_holds_drops_are_counted_and_the_daemon_goes_on(
        self, broker: Mosquitto, victoria: VictoriaMetrics, tmp_path: Path, daemons: list[Daemon]
    ) -> None:
        """With the database down, 1500 readings (~4x the spool's 64 KiB in points): the
        spool stays within its bound, the drop is counted (/metrics and one log line), every
        reading is still corrected; once the database is back the newest points arrive and
        written + dropped = submitted."""
        victoria.stop()
        config = write_config(
            tmp_path, broker, victoria.url, drift_limit=5.0, spool_max_bytes=self.MAX_BYTES
        )
        daemon = start_daemon(daemons, config)
        subscriber = subscribe(broker, "zeroline/+/corrected")
        data = readings(1500, seed=31, start=recent_start(12.0), step=10.007)
        watcher = SpoolWatcher(tmp_path / "spool")
        largest = 0
        try:
            for index in range(0, len(data), 100):
                chunk = data[index : index + 100]
                publish_lines(broker, "site/a/gas", [json.dumps(row) for row in chunk])
                assert subscriber.wait_count("/a-gas/corrected", index + len(chunk), 20)
                wait_committed(daemon, index + len(chunk))
                largest = max(largest, spool_bytes(tmp_path / "spool"))
                assert largest <= self.MAX_BYTES  # at every quiet moment
        finally:
            peak = watcher.stop()
        assert daemon.alive()
        assert [c["raw"] for c in outputs(subscriber, "a-gas", "corrected")] == [
            row["value"] for row in data
        ]

        def gauges_show(predicate: Callable[[dict[str, float]], bool]) -> dict[str, float]:
            found: dict[str, float] = {}

            def check() -> bool:
                found.update(daemon_gauges(daemon))
                return predicate(found)

            assert wait_until(check, 20, interval=0.2), found
            return found

        during = gauges_show(lambda g: g.get("zeroline_tsdb_spool_dropped", 0) > 0)
        assert during["zeroline_tsdb_spool_bytes"] <= self.MAX_BYTES
        assert re.search(
            r"over its bound of 65536 bytes; policy drop_oldest: dropped \d+", daemon.new_log()
        )

        victoria.start()
        after = gauges_show(
            lambda g: (
                g["zeroline_tsdb_points_written"] + g["zeroline_tsdb_spool_dropped"]
                == g["zeroline_tsdb_points_submitted"]
            )
        )
        written = int(after["zeroline_tsdb_points_written"])
        stored = wait_for_export(
            victoria,
            '{__name__="zeroline_reading_raw"}',
            lambda found: sample_count(found, "zeroline_reading_raw", "a-gas") > 0,
            timeout=20,
        )
        samples = stored[("zeroline_reading_raw", "a-gas", "")].samples
        published = {to_ms(row["time"]): row["value"] for row in data}
        times = [t for t, _ in samples]
        assert times == sorted(set(times))  # none twice
        assert all(published[t] == pytest.approx(v, rel=1e-11) for t, v in samples)
        newest = [to_ms(row["time"]) for row in data[-100:]]
        assert times[-100:] == newest  # drop_oldest kept the newest
        assert 100 < len(samples) < len(data)
        assert daemon.terminate() == 0
        print(
            f"\nspool full: {len(data)} readings, spool at most {largest} bytes when quiet "
            f"(bound {self.MAX_BYTES}), {peak} bytes at its peak during a flush, "
            f"{int(during['zeroline_tsdb_spool_dropped'])} points dropped while down, "
            f"{int(after['zeroline_tsdb_spool_dropped'])} in all, "
            f"{written} written after recovery, {len(samples)} readings stored"
        )


class TestToken:
    def test_token_env_names_the_variable(
        self, broker: Mosquitto, victoria: VictoriaMetrics, tmp_path: Path, daemons: list[Daemon]
    ) -> None:
        """`timeseries.token_env`: an unset variable stops the start with one line (exit 2);
        a set one is used and never logged (VictoriaMetrics ignores the token, so the check
        that it is sent belongs to the InfluxDB unit tests)."""
        config = write_config(tmp_path, broker, victoria.url)
        text = config.read_text().replace(
            "  bucket: sensors\n", "  bucket: sensors\n  token_env: ZL_TEST_TSDB_TOKEN\n"
        )
        config.write_text(text)
        environment = {k: v for k, v in os.environ.items() if k != "ZL_TEST_TSDB_TOKEN"}
        environment["PYTHONPATH"] = str(Path(__file__).resolve().parent.parent / "daemon")
        result = subprocess.run(
            [sys.executable, "-m", "zeroline.cli", "run", "-c", str(config)],
            capture_output=True,
            text=True,
            timeout=60,
            env=environment,
        )
        assert result.returncode == 2, result.stderr
        assert "Traceback" not in result.stderr
        [line] = [x for x in result.stderr.splitlines() if x.startswith("zeroline: error:")]
        assert "ZL_TEST_TSDB_TOKEN" in line and "not set" in line, line
        daemon = Daemon(config)
        daemons.append(daemon)
        daemon.start(env={"ZL_TEST_TSDB_TOKEN": "s3cret-tsdb-token"})
        subscriber = subscribe(broker, "zeroline/+/corrected")
        rows = readings(5, seed=51, start=recent_start(1.0), step=1.0)
        publish_lines(broker, "site/a/gas", [json.dumps(row) for row in rows])
        assert subscriber.wait_count("/a-gas/corrected", 5, 20)
        stored = wait_for_export(
            victoria,
            '{__name__="zeroline_reading_raw"}',
            lambda found: sample_count(found, "zeroline_reading_raw", "a-gas") >= 5,
            timeout=20,
        )
        assert sample_count(stored, "zeroline_reading_raw", "a-gas") == 5
        assert daemon.terminate() == 0
        assert "s3cret" not in daemon.log.read_text()
