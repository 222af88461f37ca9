"""The status listener of a running `zeroline run`, fed through a real Mosquitto.

Readings go in with `mosquitto_pub`; what the daemon publishes is read with
`mosquitto_sub`; the HTTP answers (`/health`, `/ready`, `/metrics`, `/api/channels`, `/`)
must agree with those MQTT outputs. `/metrics` is parsed with prometheus_client's own
parser (the reference for the text format), and the coefficients shown for a channel are
checked against `zeroline replay` on the same rows, an independent run of the pipeline.
Bad requests are sent over raw sockets; afterwards the daemon must still correct readings.
Data are invented demo readings (seeded), timed in the recent past.
"""

from __future__ import annotations

import csv
import json
import os
import signal
import socket
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

from conftest import ROOT
from support.broker import Mosquitto, publish_lines, wait_until
from test_daemon_integration import Daemon
from test_timeseries_daemon import (
    daemons,  # noqa: F401  (fixture)
    http_get,
    outputs,
    readings,
    recent_start,
    start_daemon,
    status_url,
    subscribe,
    write_config,
)

pytestmark = pytest.mark.service

TOLERANCE = 1e-9
HISTORY = 120  # recent samples kept per channel (zeroline.status.HISTORY_LENGTH)


@pytest.fixture()
def running(broker: Mosquitto, tmp_path: Path, daemons: list[Daemon]) -> tuple[Daemon, str]:  # noqa: F811
    """A daemon with a small drift limit and no time-series output, and its status URL."""
    daemon = start_daemon(daemons, write_config(tmp_path, broker, None, drift_limit=1.0))
    return daemon, status_url(daemon)


def get_json(url: str) -> tuple[int, Any]:
    status, body = http_get(url)
    return status, json.loads(body)


def samples(url: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """Every sample of /metrics by (name, sorted labels), via prometheus_client's parser."""
    status, body = http_get(url + "/metrics")
    assert status == 200
    return {
        (sample.name, tuple(sorted(sample.labels.items()))): sample.value
        for family in text_string_to_metric_families(body.decode())
        for sample in family.samples
    }


def publish_rows(broker: Mosquitto, site: str, rows: list[dict[str, float]]) -> None:
    publish_lines(broker, f"site/{site}/gas", [json.dumps(row) for row in rows])


def replay_coefficients(config: Path, rows: list[dict[str, float]], channel: str) -> list[float]:
    """The last coefficients of `zeroline replay --coefficients` on the same rows."""
    directory = config.parent
    data, out = directory / f"{channel}.csv", directory / f"{channel}-replay.csv"
    with open(data, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["time", "value"])
        for row in rows:
            writer.writerow([repr(row["time"]), repr(row["value"])])
    command = [sys.executable, "-m", "zeroline.cli", "replay", str(data), "-c", str(config)]
    command += ["--channel", channel, "-o", str(out), "--coefficients"]
    environment = {**os.environ, "PYTHONPATH": str(ROOT / "daemon")}
    subprocess.run(command, check=True, capture_output=True, env=environment, timeout=60)
    with open(out, newline="") as handle:
        last = list(csv.DictReader(handle))[-1]
    return [float(last[f"c{j}"]) for j in range(len(last) - 6)]


def address(url: str) -> tuple[str, int]:
    host, port = url.removeprefix("http://").split(":")
    return host, int(port)


def raw_request(url: str, data: bytes, *, read_timeout: float = 5.0) -> bytes:
    """Send `data` on a fresh connection and return whatever comes back before close."""
    with socket.create_connection(address(url), timeout=read_timeout) as connection:
        connection.sendall(data)
        connection.shutdown(socket.SHUT_WR)
        answer = b""
        while chunk := connection.recv(65536):
            answer += chunk
    return answer


def status_line(answer: bytes) -> int:
    first = answer.split(b"\r\n", 1)[0].split()
    assert first[:1] == [b"HTTP/1.0"], answer[:200]
    return int(first[1])


class TestProbes:
    def test_health_ready_follow_the_broker(
        self, broker: Mosquitto, running: tuple[Daemon, str]
    ) -> None:
        """/health is always 200; /ready is 200 while connected, 503 with the broker gone,
        200 again once the daemon reconnected by itself (and it corrects again); / is the
        page."""
        daemon, url = running
        status, health = get_json(url + "/health")
        assert status == 200 and health["status"] == "ok" and health["uptime_s"] >= 0
        assert get_json(url + "/ready") == (
            200,
            {"ready": True, "broker_connected": True, "state_loaded": True},
        )
        status, page = http_get(url + "/")
        assert status == 200 and b"<html" in page.lower() and b"api/channels" in page
        broker.stop()
        assert wait_until(lambda: get_json(url + "/ready")[0] == 503, 15)
        assert get_json(url + "/ready")[1]["ready"] is False
        assert get_json(url + "/health")[0] == 200  # alive, just not ready
        broker.start()
        assert wait_until(lambda: get_json(url + "/ready")[0] == 200, 30), daemon.new_log()
        subscriber = subscribe(broker, "zeroline/+/corrected")
        publish_rows(broker, "a", readings(5, seed=44, start=recent_start(1.0), step=1.0))
        assert subscriber.wait_count("/a-gas/corrected", 5, 20)  # and it works again
        assert daemon.terminate() == 0


class TestViews:
    def test_metrics_and_channels_equal_the_mqtt_outputs(
        self, broker: Mosquitto, running: tuple[Daemon, str]
    ) -> None:
        """300 + 200 readings: the counters equal what was published, the per-channel
        gauges and /api/channels/<name> equal the last corrected output over MQTT, the alert
        gauge is 1 for the raised drift alert, recent samples are the last 120 outputs, and
        the coefficients equal `zeroline replay` on the same rows."""
        daemon, url = running
        subscriber = subscribe(broker, "zeroline/+/corrected", "zeroline/+/alert")
        start = recent_start(24.0)
        rows = {
            "a": readings(300, seed=41, start=start, step=60.0),
            "b": readings(200, seed=42, start=start + 1.0, step=60.0),
        }
        for site, data in rows.items():
            publish_rows(broker, site, data)
        for site, data in rows.items():
            assert subscriber.wait_count(f"/{site}-gas/corrected", len(data), 30)
        metrics = samples(url)

        def value(name: str, **labels: str) -> float:
            return metrics[(name, tuple(sorted(labels.items())))]

        assert value("zeroline_received_total") == 500
        assert value("zeroline_processed_total") == 500
        _, index = get_json(url + "/api/channels")
        assert [c["name"] for c in index["channels"]] == ["a-gas", "b-gas"]
        assert "recent" not in index["channels"][0]  # only with ?recent=true
        for site, data in rows.items():
            channel = f"{site}-gas"
            corrected = outputs(subscriber, channel, "corrected")
            last = corrected[-1]
            assert value("zeroline_channel_baseline", channel=channel) == last["baseline"]
            assert value("zeroline_channel_uncertainty", channel=channel) == last["uncertainty"]
            assert ("zeroline_channel_drift", (("channel", channel),)) in metrics
            raised = [a for a in outputs(subscriber, channel, "alert") if a["state"] == "raised"]
            assert raised, "the small drift_limit raised no alert"
            assert value("zeroline_channel_alert_active", channel=channel, rule="drift_limit") == 1
            assert value("zeroline_channel_alert_active", channel=channel, rule="rate_limit") == 0

            status, view = get_json(f"{url}/api/channels/{channel}")
            assert status == 200
            assert view["quality"] == last["quality"] and view["last_time"] == last["time"]
            assert view["corrected"] == last["corrected"]
            assert [a["rule"] for a in view["active_alerts"]] == ["drift_limit"]
            assert view["active_alerts"][0] == raised[-1]
            fields = ("time", "raw", "corrected", "baseline", "uncertainty")
            assert view["recent"] == [{k: c[k] for k in fields} for c in corrected[-HISTORY:]]
            assert view["terms"] == ["constant", "t/1d"]  # the basis of write_config
            reference = replay_coefficients(daemon.config, data, channel)
            assert view["coefficients"] == pytest.approx(reference, rel=TOLERANCE, abs=TOLERANCE)
        status, missing = get_json(url + "/api/channels/no-such-channel")
        assert status == 404 and "no-such-channel" in missing["error"]
        assert daemon.terminate() == 0

    def test_a_channel_made_after_a_reload_has_its_view(
        self, broker: Mosquitto, running: tuple[Daemon, str]
    ) -> None:
        """SIGHUP gives the daemon a new channel table: the status page asks that one, so
        a channel first seen after the reload has its /api/channels/<name> view, as does
        one kept over it."""
        daemon, url = running
        subscriber = subscribe(broker, "zeroline/+/corrected")
        start = recent_start(2.0)
        publish_rows(broker, "a", readings(5, seed=43, start=start, step=60.0))
        assert subscriber.wait_count("/a-gas/corrected", 5, 30)
        assert daemon.process is not None
        daemon.process.send_signal(signal.SIGHUP)
        assert wait_until(lambda: "config reloaded" in daemon.new_log(), 10), daemon.new_log()
        publish_rows(broker, "c", readings(5, seed=44, start=start, step=60.0))
        assert subscriber.wait_count("/c-gas/corrected", 5, 30)
        for channel in ("a-gas", "c-gas"):
            status, view = get_json(f"{url}/api/channels/{channel}")
            assert (
                status == 200
                and view["last_time"] == outputs(subscriber, channel, "corrected")[-1]["time"]
            )
        assert daemon.terminate() == 0


class TestBadRequests:
    def test_bad_requests_never_disturb_the_daemon(
        self, broker: Mosquitto, running: tuple[Daemon, str]
    ) -> None:
        """Unknown path 404, huge headers 431, an endless request line 414, garbage 400, a
        POST 405, a bad query 400: each answered with a one-line JSON error and counted;
        the daemon keeps correcting readings and answering."""
        daemon, url = running
        subscriber = subscribe(broker, "zeroline/+/corrected")
        data = readings(40, seed=43, start=recent_start(6.0), step=30.0)
        publish_rows(broker, "a", data[:20])
        assert subscriber.wait_count("/a-gas/corrected", 20, 20)
        huge = b"GET /health HTTP/1.1\r\nHost: x\r\nX-Big: " + b"a" * 40_000 + b"\r\n\r\n"
        cases = [
            (b"GET /no/such/path HTTP/1.1\r\nHost: x\r\n\r\n", 404),
            (huge, 431),
            (b"GET /" + b"a" * 20_000 + b" HTTP/1.1\r\n\r\n", 414),
            (bytes(range(256)) * 4, 400),
            (b"\x16\x03\x01\x02\x00\x01\x00\x01\xfc\x03\x03" + b"\x00" * 64, 400),  # TLS hello
            (b"POST /api/channels HTTP/1.1\r\nContent-Length: 3\r\n\r\nabc", 405),
            (b"GET /api/channels?recent=maybe HTTP/1.1\r\n\r\n", 400),
            (b"GET /ready?x=1 HTTP/1.1\r\n\r\n", 400),
        ]
        counts: dict[int, int] = {}
        for request, expected in cases:
            answer = raw_request(url, request)
            assert status_line(answer) == expected, answer[:300]
            body = answer.split(b"\r\n\r\n", 1)[1]
            assert json.loads(body)["error"], body
            assert b"Traceback" not in answer
            counts[expected] = counts.get(expected, 0) + 1
        # A client that connects and sends nothing at all, and one that sends half a head.
        silent = socket.create_connection(address(url))
        half = socket.create_connection(address(url))
        try:
            half.sendall(b"GET /health HTTP/1.1\r\nHost: x\r\n")
            publish_rows(broker, "a", data[20:])
            assert subscriber.wait_count("/a-gas/corrected", len(data), 20)
            assert get_json(url + "/health")[0] == 200  # served beside the stalled clients
        finally:
            silent.close()
            half.close()
        metrics = samples(url)
        for code, count in counts.items():
            assert metrics[("zeroline_http_responses_total", (("code", str(code)),))] == count
        assert metrics[("zeroline_processed_total", ())] == len(data)
        assert daemon.alive()
        assert "Traceback" not in daemon.new_log()
        assert daemon.terminate() == 0
