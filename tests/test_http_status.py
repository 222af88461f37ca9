"""The HTTP listener: every endpoint, the token, and bad requests that must not hurt it.

Endpoints are checked against a scripted `FakeSource` (exact values) and against real
channels fed simulated readings (`demo_gateway`). /metrics is read back with
`prometheus_client`'s own parser, an implementation of the Prometheus text exposition
format independent of how the text was produced. Status codes follow RFC 9110 (404, 405,
414, 501, 505), RFC 6585 (431) and RFC 6750 (401 with `WWW-Authenticate: Bearer`).
"""

from __future__ import annotations

import http.client
import json
import logging
import math
import re
import socket
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

import zeroline
from support.fake_status import ChannelsSource, FakeSource, demo_gateway, make_status
from zeroline import http_status
from zeroline.errors import ConfigError
from zeroline.http_status import StatusServer, load_page, start_http_server
from zeroline.status import Metric

TOKEN = "s3cret-token-for-tests"
CSP = (
    "default-src 'self'; script-src 'self' 'unsafe-inline'; style-src 'unsafe-inline'; "
    "img-src data:"
)
ALERT = {
    "time": 1_800_000_000.0,
    "channel": "cell-b",
    "rule": "drift_limit",
    "state": "raised",
    "value": 6.2,
    "limit": 5.0,
    "severity": "warning",
    "message": "drift +6.2 is beyond the limit ±5",
}


class Reply:
    def __init__(self, response: http.client.HTTPResponse) -> None:
        self.status = response.status
        self.headers = response.headers
        self.body = response.read()

    def json(self) -> Any:
        def no_constants(name: str) -> None:
            raise AssertionError(f"{name} is not JSON")

        return json.loads(self.body, parse_constant=no_constants)


def request(
    server: StatusServer, path: str, method: str = "GET", headers: dict[str, str] | None = None
) -> Reply:
    connection = http.client.HTTPConnection(server.host, server.port, timeout=5)
    try:
        connection.request(method, path, headers=headers or {})
        return Reply(connection.getresponse())
    finally:
        connection.close()


def raw_exchange(server: StatusServer, data: bytes, timeout: float = 5.0) -> bytes:
    """Send bytes as they are and read until the server closes the connection."""
    with socket.create_connection((server.host, server.port), timeout=timeout) as sock:
        sock.sendall(data)
        chunks = []
        while chunk := sock.recv(65536):
            chunks.append(chunk)
    return b"".join(chunks)


def status_of(answer: bytes) -> int:
    match = re.match(rb"HTTP/1\.[01] (\d{3}) ", answer)
    assert match, answer[:200]
    return int(match.group(1))


def families(text: str) -> dict[str, Any]:
    return {family.name: family for family in text_string_to_metric_families(text)}


def sample_value(family: Any, **labels: str) -> float:
    values = [s.value for s in family.samples if s.labels == labels]
    assert len(values) == 1, (labels, family.samples)
    return float(values[0])


@pytest.fixture
def fake() -> FakeSource:
    return FakeSource(
        statuses={
            "cell-a": make_status("cell-a"),
            "cell-b": make_status("cell-b", baseline=6.2, active_alerts=(ALERT,)),
        },
        extra_metrics=[
            Metric("zeroline_readings_in_total", "Readings received.", "counter", 42),
            Metric("zeroline_queue_depth", "Readings waiting.", "gauge", 3),
            Metric(
                "zeroline_decode_errors_total",
                "Bad payloads.",
                "counter",
                2,
                {"reason": "not_json"},
            ),
            Metric(
                "zeroline_decode_errors_total",
                "Bad payloads.",
                "counter",
                5,
                {"reason": "no_value"},
            ),
        ],
    )


@pytest.fixture
def server(fake: FakeSource) -> Iterator[StatusServer]:
    handle = start_http_server(fake, "127.0.0.1:0")
    yield handle
    handle.stop()


@pytest.fixture
def token_server(fake: FakeSource, tmp_path: Path) -> Iterator[StatusServer]:
    token_file = tmp_path / "http.token"
    token_file.write_text(TOKEN + "\n")
    handle = start_http_server(fake, "127.0.0.1:0", token_file)
    yield handle
    handle.stop()


@pytest.fixture(scope="module")
def gateway() -> ChannelsSource:
    return demo_gateway()


@pytest.fixture
def gateway_server(gateway: ChannelsSource) -> Iterator[StatusServer]:
    handle = start_http_server(gateway, "127.0.0.1:0")
    yield handle
    handle.stop()


class TestEndpoints:
    """Each route against the scripted source."""

    def test_health_is_json_with_the_security_headers(self, server: StatusServer) -> None:
        """/health answers 200 with the source's details and the fixed response headers."""
        reply = request(server, "/health")
        assert reply.status == 200
        assert reply.json() == {"status": "ok", "uptime_s": 12.5}
        assert reply.headers["Content-Type"] == "application/json"
        assert reply.headers["Cache-Control"] == "no-store"
        assert reply.headers["Content-Security-Policy"] == CSP
        assert reply.headers["X-Content-Type-Options"] == "nosniff"

    def test_ready_follows_the_source(self, server: StatusServer, fake: FakeSource) -> None:
        """/ready is 200 when ready and 503 (so probes see it) while not."""
        assert (request(server, "/ready").status, request(server, "/ready").json()) == (
            200,
            {"ready": True, "broker": "connected"},
        )
        fake.ready = False
        reply = request(server, "/ready")
        assert reply.status == 503
        assert reply.json() == {"ready": False, "broker": "connecting"}

    def test_channels_lists_every_channel_without_samples(
        self, server: StatusServer, fake: FakeSource
    ) -> None:
        """/api/channels carries each channel's to_json(); recent samples only on request."""
        data = request(server, "/api/channels").json()
        expected = [s.to_json(with_recent=False) for s in fake.statuses.values()]
        assert data["channels"] == expected
        assert abs(data["time"] - time.time()) < 60
        with_recent = request(server, "/api/channels?recent=true").json()["channels"]
        assert [c["recent"] for c in with_recent] == [
            s.to_json()["recent"] for s in fake.statuses.values()
        ]

    def test_one_channel_by_name_including_escaped_names(
        self, server: StatusServer, fake: FakeSource
    ) -> None:
        """/api/channels/<name> is percent-decoded, so names with spaces or / work."""
        fake.statuses["pH río/2"] = make_status("pH río/2", quality="learning", quality_code=2)
        reply = request(server, "/api/channels/pH%20r%C3%ADo%2F2")
        assert reply.status == 200
        assert reply.json() == fake.statuses["pH río/2"].to_json()
        assert request(server, "/api/channels/cell-b?recent=false").json() == fake.statuses[
            "cell-b"
        ].to_json(with_recent=False)

    def test_unknown_channel_is_404_json(self, server: StatusServer) -> None:
        reply = request(server, "/api/channels/nope")
        assert reply.status == 404
        assert "no channel named 'nope'" in reply.json()["error"]

    def test_non_finite_numbers_become_null(self, server: StatusServer, fake: FakeSource) -> None:
        """JSON has no NaN: a NaN sample or limit is sent as null, never as `NaN`."""
        recent = (
            {
                "time": 1.0,
                "raw": math.nan,
                "corrected": None,
                "baseline": math.inf,
                "uncertainty": 0.1,
            },
        )
        fake.statuses["odd"] = make_status("odd", recent=recent, drift_limit=math.nan)
        data = request(server, "/api/channels/odd").json()
        assert data["recent"] == [
            {"time": 1.0, "raw": None, "corrected": None, "baseline": None, "uncertainty": 0.1}
        ]
        assert data["drift_limit"] is None

    def test_page_is_the_packaged_file_and_self_contained(self, server: StatusServer) -> None:
        """/ serves status_page.html; it loads nothing from elsewhere (gateways are offline)."""
        reply = request(server, "/")
        assert reply.status == 200
        assert reply.headers["Content-Type"] == "text/html; charset=utf-8"
        assert reply.body == load_page()
        page = reply.body.decode()
        assert (
            "Corrected values are advisory — not for safety alarms, interlocks or "
            "compliance reporting" in page
        )
        assert not re.search(r"<script[^>]+src=", page)
        assert not re.search(r"""(src|href)\s*=\s*["'](https?:)?//""", page)
        assert not re.search(r"@import|url\(\s*['\"]?(https?:)?//", page)
        assert re.findall(r"<link[^>]*>", page) == ['<link rel="icon" href="data:,">']

    def test_head_has_headers_and_no_body(self, server: StatusServer) -> None:
        reply = request(server, "/health", method="HEAD")
        assert reply.status == 200 and reply.body == b""
        assert int(reply.headers["Content-Length"]) == len(request(server, "/health").body)


class TestMetrics:
    """/metrics read back with prometheus_client's parser."""

    def test_counters_gauges_and_build_info(self, server: StatusServer) -> None:
        reply = request(server, "/metrics")
        assert reply.status == 200
        # Without an Accept header, the classic text format (Prometheus exposition 0.0.4).
        assert reply.headers["Content-Type"] == "text/plain; version=0.0.4; charset=utf-8"
        found = families(reply.body.decode())
        info = found["zeroline_build_info"]
        assert info.samples[0].labels["version"] == zeroline.__version__
        assert info.samples[0].value == 1
        assert found["zeroline_readings_in"].type == "counter"
        assert sample_value(found["zeroline_readings_in"]) == 42
        assert sample_value(found["zeroline_queue_depth"]) == 3
        decode = found["zeroline_decode_errors"]
        assert sample_value(decode, reason="not_json") == 2
        assert sample_value(decode, reason="no_value") == 5

    def test_per_channel_gauges_match_the_status(
        self, server: StatusServer, fake: FakeSource
    ) -> None:
        """Drift, uncertainty, rate, quality and one 0/1 gauge per contract alert rule."""
        found = families(request(server, "/metrics").body.decode())
        for name, status in fake.statuses.items():
            assert sample_value(found["zeroline_channel_drift"], channel=name) == status.drift
            assert sample_value(found["zeroline_channel_baseline"], channel=name) == status.baseline
            assert (
                sample_value(found["zeroline_channel_uncertainty"], channel=name)
                == status.uncertainty
            )
            assert sample_value(
                found["zeroline_channel_drift_rate"], channel=name
            ) == pytest.approx(status.drift_rate)
            assert sample_value(found["zeroline_channel_quality_code"], channel=name) == 1
        alert = found["zeroline_channel_alert_active"]
        assert sample_value(alert, channel="cell-b", rule="drift_limit") == 1
        assert sample_value(alert, channel="cell-a", rule="drift_limit") == 0
        assert len(alert.samples) == 2 * 7  # bounded: channels × contract rules

    def test_response_counter_counts_by_status_code(self, server: StatusServer) -> None:
        for _ in range(3):
            request(server, "/missing")
        found = families(request(server, "/metrics").body.decode())
        assert sample_value(found["zeroline_http_responses"], code="404") == 3

    def test_openmetrics_on_request(self, server: StatusServer) -> None:
        reply = request(server, "/metrics", headers={"Accept": "application/openmetrics-text"})
        assert reply.headers["Content-Type"].startswith("application/openmetrics-text")
        assert reply.body.rstrip().endswith(b"# EOF")

    def test_bad_samples_are_left_out_not_fatal(
        self, server: StatusServer, fake: FakeSource, caplog: pytest.LogCaptureFixture
    ) -> None:
        """An invalid name, kind or label, a kind clash or a duplicate drops that sample."""
        fake.extra_metrics += [
            Metric("bad name", "x", "gauge", 1),
            Metric("zeroline_weird", "x", "histogram", 1),
            Metric("zeroline_labelled", "x", "gauge", 1, {"bad-label": "v"}),
            Metric("zeroline_queue_depth", "clash", "counter", 9),
            Metric("zeroline_readings_in_total", "again", "counter", 99),
        ]
        with caplog.at_level(logging.WARNING, logger="zeroline.metrics"):
            reply = request(server, "/metrics")
        assert reply.status == 200
        found = families(reply.body.decode())
        assert "zeroline_weird" not in found and "zeroline_labelled" not in found
        assert sample_value(found["zeroline_queue_depth"]) == 3
        assert sample_value(found["zeroline_readings_in"]) == 42
        assert len([r for r in caplog.records if "left out" in r.getMessage()]) == 5


class TestRealChannels:
    """The endpoints over real channels fed simulated sensors (seeded, our own data)."""

    def test_api_matches_the_channels(
        self, gateway_server: StatusServer, gateway: ChannelsSource
    ) -> None:
        data = request(gateway_server, "/api/channels?recent=true").json()["channels"]
        assert [c["name"] for c in data] == ["silo-ref-cell", "north-no2", "river-ph"]
        for channel in data:
            status = gateway.channel_status(channel["name"])
            assert status is not None
            assert len(channel["coefficients"]) == len(channel["terms"]) > 0
            assert all(math.isfinite(c) for c in channel["coefficients"])
            assert channel["baseline"] == status.baseline
            assert len(channel["recent"]) == 120
            assert channel["recent"][-1]["time"] == channel["last_time"]
        by_name = {c["name"]: c for c in data}
        assert [a["rule"] for a in by_name["silo-ref-cell"]["active_alerts"]] == ["drift_limit"]
        assert by_name["north-no2"]["active_alerts"] == []
        assert by_name["river-ph"]["terms"][0].startswith("gain:")

    def test_metrics_match_the_counters(
        self, gateway_server: StatusServer, gateway: ChannelsSource
    ) -> None:
        found = families(request(gateway_server, "/metrics").body.decode())
        assert sample_value(found["zeroline_readings_in"]) == gateway.readings_in > 7000
        silo = gateway.channel_status("silo-ref-cell")
        assert silo is not None
        drift = found["zeroline_channel_drift"]
        assert silo.drift is not None
        assert sample_value(drift, channel="silo-ref-cell") == pytest.approx(silo.drift)
        alert = found["zeroline_channel_alert_active"]
        assert sample_value(alert, channel="silo-ref-cell", rule="drift_limit") == 1
        assert sample_value(alert, channel="north-no2", rule="drift_limit") == 0


class TestToken:
    """Bearer token from a file (RFC 6750): everything but /health and the static page."""

    def test_health_and_page_need_no_token(self, token_server: StatusServer) -> None:
        assert request(token_server, "/health").status == 200
        assert request(token_server, "/").status == 200

    @pytest.mark.parametrize(
        "path", ["/ready", "/metrics", "/api/channels", "/api/channels/x", "/nothing-here"]
    )
    def test_data_needs_the_token(self, token_server: StatusServer, path: str) -> None:
        missing = request(token_server, path)
        assert missing.status == 401
        assert missing.headers["WWW-Authenticate"] == 'Bearer realm="zeroline"'
        wrong = request(token_server, path, headers={"Authorization": "Bearer nope"})
        assert wrong.status == 401
        assert 'error="invalid_token"' in wrong.headers["WWW-Authenticate"]
        basic = request(token_server, path, headers={"Authorization": "Basic " + TOKEN})
        assert basic.status == 401

    def test_right_token_opens_every_route(self, token_server: StatusServer) -> None:
        auth = {"Authorization": "bearer " + TOKEN}  # the scheme is case-insensitive
        assert request(token_server, "/api/channels", headers=auth).status == 200
        assert request(token_server, "/metrics", headers=auth).status == 200
        assert request(token_server, "/nothing-here", headers=auth).status == 404

    def test_token_never_reaches_the_log(
        self, token_server: StatusServer, caplog: pytest.LogCaptureFixture
    ) -> None:
        with caplog.at_level(logging.DEBUG):
            request(token_server, "/api/channels", headers={"Authorization": "Bearer " + TOKEN})
            request(token_server, "/api/channels", headers={"Authorization": "Bearer " + TOKEN})
        assert caplog.records, "the request log should have lines"
        assert not any(TOKEN in r.getMessage() for r in caplog.records)


class TestStartErrors:
    """Bad settings are one-line ConfigErrors naming the key, before anything listens."""

    @pytest.mark.parametrize("listen", ["nohost", "127.0.0.1:http", ":8470", "1.2.3.4:99999"])
    def test_bad_address(self, fake: FakeSource, listen: str) -> None:
        with pytest.raises(ConfigError, match=r"^http\.listen: .*write host:port"):
            start_http_server(fake, listen)

    def test_beyond_loopback_needs_a_token(self, fake: FakeSource) -> None:
        with pytest.raises(ConfigError, match="needs a bearer token file"):
            start_http_server(fake, "0.0.0.0:0")

    def test_unreadable_or_empty_token_file(self, fake: FakeSource, tmp_path: Path) -> None:
        with pytest.raises(ConfigError, match="cannot read the token file"):
            start_http_server(fake, "127.0.0.1:0", tmp_path / "missing")
        (tmp_path / "empty").write_text("  \n")
        with pytest.raises(ConfigError, match="is empty"):
            start_http_server(fake, "127.0.0.1:0", tmp_path / "empty")

    def test_port_in_use(self, fake: FakeSource, server: StatusServer) -> None:
        with pytest.raises(ConfigError, match="cannot listen on"):
            start_http_server(fake, f"127.0.0.1:{server.port}")


class TestBadRequests:
    """Malformed, oversized and hostile requests get their status code; the server lives."""

    def test_unknown_path_and_methods(self, server: StatusServer) -> None:
        missing = request(server, "/etc/passwd")
        assert missing.status == 404 and "no such path" in missing.json()["error"]
        post = request(server, "/api/channels", method="POST")
        assert post.status == 405 and post.headers["Allow"] == "GET, HEAD"
        assert request(server, "/health", method="BREW").status == 501

    @pytest.mark.parametrize(
        ("query", "message"),
        [
            ("recent=maybe", "is not a flag"),
            ("limit=3", "unknown query parameter"),
            ("recent=1&recent=0", "given twice"),
        ],
    )
    def test_bad_query(self, server: StatusServer, query: str, message: str) -> None:
        reply = request(server, "/api/channels?" + query)
        assert reply.status == 400 and message in reply.json()["error"]

    def test_long_request_line_is_414(self, server: StatusServer) -> None:
        answer = raw_exchange(server, b"GET /" + b"a" * 9000 + b" HTTP/1.1\r\n\r\n")
        assert status_of(answer) == 414
        assert answer.endswith(b"\n") and b'"error"' in answer

    def test_huge_headers_are_431(self, server: StatusServer) -> None:
        one_huge = b"GET /health HTTP/1.1\r\nX-Big: " + b"x" * 20000 + b"\r\n\r\n"
        assert status_of(raw_exchange(server, one_huge)) == 431
        many = b"".join(b"X-H%d: v\r\n" % i for i in range(3000))
        assert status_of(raw_exchange(server, b"GET /health HTTP/1.1\r\n" + many + b"\r\n")) == 431
        too_many = b"".join(b"X-H%d: v\r\n" % i for i in range(150))  # small but > 100
        answer = raw_exchange(server, b"GET /health HTTP/1.1\r\n" + too_many + b"\r\n")
        assert status_of(answer) == 431

    def test_garbage_and_bad_versions(self, server: StatusServer) -> None:
        tls_hello = bytes.fromhex("160301020001") + bytes(range(256)) + b"\r\n\r\n"
        assert status_of(raw_exchange(server, tls_hello)) == 400
        assert status_of(raw_exchange(server, b"GET / HTTP/9.9\r\n\r\n")) == 505
        assert status_of(raw_exchange(server, b"GET\r\n\r\n")) == 400

    def test_handler_exception_is_500_logged_once_and_survived(
        self, server: StatusServer, fake: FakeSource, caplog: pytest.LogCaptureFixture
    ) -> None:
        """A bug behind a route: one-line JSON 500, one log line (rate-limited, no
        traceback), and the next request is answered normally."""
        http_status._throttle = http_status.Throttle()  # a fresh minute for this test
        fake.fail_channels = True
        with caplog.at_level(logging.ERROR, logger="zeroline.http_status"):
            replies = [request(server, "/api/channels") for _ in range(3)]
        assert [r.status for r in replies] == [500, 500, 500]
        assert replies[0].body.count(b"\n") == 1
        assert replies[0].json() == {"error": "internal error while answering: RuntimeError"}
        errors = [r for r in caplog.records if r.levelno == logging.ERROR]
        assert len(errors) == 1 and errors[0].exc_info is None
        assert "simulated bug" in errors[0].getMessage()
        fake.fail_channels = False
        assert request(server, "/api/channels").status == 200

    def test_slow_client_is_cut_off(
        self, fake: FakeSource, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """A client that opens a connection and says nothing is closed after the timeout."""
        monkeypatch.setattr(http_status._Handler, "timeout", 0.3)
        handle = start_http_server(fake, "127.0.0.1:0")
        try:
            with socket.create_connection((handle.host, handle.port), timeout=5) as sock:
                sock.sendall(b"GET /health HTTP/1.1\r\n")  # and then nothing
                started = time.monotonic()
                assert sock.recv(100) == b""
                waited = time.monotonic() - started
            assert 0.2 < waited < 2.0, waited
        finally:
            handle.stop()

    def test_connection_cap_answers_503_then_recovers(
        self, fake: FakeSource, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        monkeypatch.setattr(http_status, "MAX_CONNECTIONS", 4)
        handle = start_http_server(fake, "127.0.0.1:0")
        try:
            hogs = [socket.create_connection((handle.host, handle.port)) for _ in range(4)]
            for hog in hogs:
                hog.sendall(b"GET /he")
            time.sleep(0.2)  # let the server accept them
            assert status_of(raw_exchange(handle, b"GET /health HTTP/1.0\r\n\r\n")) == 503
            for hog in hogs:
                hog.close()
            deadline = time.monotonic() + 3
            while request(handle, "/health").status != 200:
                assert time.monotonic() < deadline, "slots were not given back"
                time.sleep(0.05)
        finally:
            handle.stop()

    def test_burst_of_bad_clients_leaves_the_server_answering(self, server: StatusServer) -> None:
        """Huge headers, garbage, half-open connections and abrupt resets, then a normal
        request is answered at once and /metrics counts what happened."""
        half_open = [socket.create_connection((server.host, server.port)) for _ in range(8)]
        for sock in half_open:
            sock.sendall(b"GET /health HTTP/1.1\r\nHost: x\r\n")  # never finished
        for _ in range(5):
            raw_exchange(server, b"GET /health HTTP/1.1\r\nX: " + b"y" * 40000 + b"\r\n\r\n")
            raw_exchange(server, bytes(range(256)) * 4)
            with socket.create_connection((server.host, server.port)) as reset:
                reset.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, b"\x01\x00\x00\x00" * 2)
                reset.sendall(b"GET /api/channels HTTP/1.1\r\n")
        started = time.monotonic()
        reply = request(server, "/api/channels")
        assert reply.status == 200 and len(reply.json()["channels"]) == 2
        assert time.monotonic() - started < 1.0
        for sock in half_open:
            sock.close()
        found = families(request(server, "/metrics").body.decode())
        assert sample_value(found["zeroline_http_responses"], code="431") == 5
        assert sample_value(found["zeroline_http_responses"], code="400") == 5


def test_history_keeps_the_last_readings_oldest_first_with_nan_for_none() -> None:
    from zeroline.channel import Corrected
    from zeroline.status import History

    history = History(length=3)
    assert history.rows().shape == (0, 5)
    for i in range(5):
        known = i != 3  # reading 3 could not be corrected
        history.add(
            Corrected(
                time=100.0 + i,
                raw=float(i),
                corrected=i - 0.5 if known else None,
                baseline=0.5 if known else None,
                uncertainty=0.1 if known else None,
                quality="ok",
                quality_code=1,
                flags=(),
                gain=None,
                drift_rate=None,
                learned=known,
            )
        )
    rows = history.rows()
    assert rows[:, 0].tolist() == [102.0, 103.0, 104.0]  # wrapped round, oldest first
    assert rows[0].tolist() == [102.0, 2.0, 1.5, 0.5, 0.1]
    assert math.isnan(rows[1, 2]) and math.isnan(rows[1, 3]) and math.isnan(rows[1, 4])
    assert history.as_dicts()[1] == {
        "time": 103.0,
        "raw": 3.0,
        "corrected": None,
        "baseline": None,
        "uncertainty": None,
    }
