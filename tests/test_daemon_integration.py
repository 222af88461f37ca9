"""`zeroline run` against a real Mosquitto, with mosquitto_pub/mosquitto_sub as the other side.

Each test starts its own broker on a free port and the daemon as a subprocess (`python -m
zeroline.cli run`), and stops both. Data are invented demo readings (a drifting gas signal
with a temperature field, seeded), timed in the recent past so the decoders' time window
accepts them. The reference for "corrected correctly" is `zeroline replay` on the same
rows: the daemon must agree with it to 1e-9 (absolute, values of order 1).
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from conftest import ROOT
from support.broker import Mosquitto, Subscriber, publish_lines, publish_one, wait_until
from zeroline.channel import unpack_channels
from zeroline.config import load_config
from zeroline.state import SNAPSHOT_NAME, StateStore

pytestmark = pytest.mark.service

TOLERANCE = 1e-9
N_ROWS = 300
BASIS = (
    "[constant, {polynomial: {of: t, degree: 1, scale: 1d}}, "
    "{polynomial: {of: temp, degree: 1, center: 20}}]"
)


@pytest.fixture()
def persistent_broker(mosquitto_bin: str) -> Iterator[Mosquitto]:
    """A broker that saves its sessions on every change, so it can be SIGKILLed and restarted
    without losing what it had queued (slow: only for the broker-kill test)."""
    server = Mosquitto(mosquitto_bin, persistent=True)
    server.start()
    yield server
    server.cleanup()


BROKER_SAVE_S = 0.5  # Mosquitto saves a change on its next loop turn, after the PUBACK


def rows(n: int = N_ROWS, seed: int = 11) -> list[dict[str, float]]:
    """Invented demo data: slow drift + temperature effect + noise, one reading a minute."""
    rng = np.random.default_rng(seed)
    start = float(int(time.time()) - 86400)
    out = []
    for i in range(n):
        t = start + 60.0 * i
        temp = 20.0 + 5.0 * np.sin(i / 40.0)
        value = 1.5 + 2e-5 * (t - start) + 0.03 * (temp - 20.0) + rng.normal(0.0, 0.05)
        out.append({"time": t, "value": float(value), "temp": float(temp)})
    return out


def write_config(directory: Path, broker: Mosquitto, extra_broker: str = "") -> Path:
    path = directory / "zeroline.yaml"
    path.write_text(f"""
broker:
  host: 127.0.0.1
  port: {broker.port}
  client_id: zl-test-{os.getpid()}-{directory.name}
  inflight: 50
{extra_broker}
state: {{dir: {directory / "state"}, snapshot_every: 1s}}
http: {{listen: "127.0.0.1:0"}}
limits: {{queue: 200, max_payload_bytes: 65536}}
logging: {{level: info}}
channels:
  - name: "{{1}}-gas"
    topic: site/+/gas
    basis: {BASIS}
    inputs: {{temp: {{field: temp}}}}
  - name: "{{1}}-senml"
    topic: site/+/senml
    payload: senml
    basis: [constant]
""")
    return path


class Daemon:
    """`zeroline run` as a subprocess with its log in a file."""

    def __init__(self, config: Path) -> None:
        self.config = config
        self.log = config.parent / "daemon.log"
        self.process: subprocess.Popen[bytes] | None = None

    def start(self, *, wait: bool = True, env: dict[str, str] | None = None) -> None:
        environment = {**os.environ, "PYTHONPATH": str(ROOT / "daemon"), **(env or {})}
        self._mark = self.log.stat().st_size if self.log.exists() else 0
        with open(self.log, "ab") as log:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "zeroline.cli", "run", "-c", str(self.config)],
                stdout=log,
                stderr=log,
                env=environment,
            )
        if wait:
            assert wait_until(lambda: "connected to the broker" in self.new_log(), 20), (
                self.new_log()
            )

    def new_log(self) -> str:
        return self.log.read_text()[self._mark :] if self.log.exists() else ""

    def alive(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def kill(self) -> None:
        assert self.process is not None
        self.process.send_signal(signal.SIGKILL)
        self.process.wait(10)

    def terminate(self) -> int:
        assert self.process is not None
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
        return self.process.wait(20)

    def wait_exit(self, timeout: float = 30) -> int:
        assert self.process is not None
        return self.process.wait(timeout)


@pytest.fixture()
def daemon_factory(tmp_path: Path) -> Iterator[Any]:
    started: list[Daemon] = []

    def make(config: Path) -> Daemon:
        daemon = Daemon(config)
        started.append(daemon)
        return daemon

    yield make
    for daemon in started:
        if daemon.alive():
            daemon.kill()


def payload_lines(data: list[dict[str, float]]) -> list[str]:
    return [json.dumps(row) for row in data]


def replay_reference(config: Path, data: list[dict[str, float]], channel: str) -> list[dict]:
    """`zeroline replay` on the same rows (with --coefficients)."""
    directory = config.parent
    csv_path, out = directory / "data.csv", directory / "replay.csv"
    with open(csv_path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["time", "value", "temp"])
        for row in data:
            writer.writerow([repr(row["time"]), repr(row["value"]), repr(row["temp"])])
    subprocess.run(
        [
            sys.executable,
            "-m",
            "zeroline.cli",
            "replay",
            str(csv_path),
            "-c",
            str(config),
            "--channel",
            channel,
            "-o",
            str(out),
            "--coefficients",
        ],
        check=True,
        capture_output=True,
        env={**os.environ, "PYTHONPATH": str(ROOT / "daemon")},
    )
    with open(out, newline="") as handle:
        return list(csv.DictReader(handle))


def corrected_by_time(subscriber: Subscriber, channel: str) -> dict[float, list[dict]]:
    seen: dict[float, list[dict]] = {}
    for _, payload in subscriber.messages(f"/{channel}/corrected"):
        body = json.loads(payload)
        seen.setdefault(body["time"], []).append(body)
    return seen


def assert_matches_replay(seen: dict[float, list[dict]], reference: list[dict]) -> None:
    assert sorted(seen) == [float(r["time"]) for r in reference]
    for row in reference:
        copies = seen[float(row["time"])]
        for body in copies:  # a redelivered reading is re-published with identical values
            assert body["corrected"] == pytest.approx(float(row["corrected"]), abs=TOLERANCE)
            assert body["baseline"] == pytest.approx(float(row["baseline"]), abs=TOLERANCE)


def final_coefficients(config: Path, channel: str) -> np.ndarray:
    """Coefficients of `channel` from the daemon's snapshot (written at SIGTERM)."""
    snapshot = StateStore(config.parent / "state").load_snapshot()
    assert snapshot is not None
    [group] = snapshot.groups
    models = unpack_channels(load_config(config).channels[0], group.names, group.packed)
    return next(m for m in models if m.name == channel).estimator.coefficients


class TestRoundTrip:
    def test_corrected_equals_replay(
        self, broker: Mosquitto, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """mosquitto_pub in, mosquitto_sub out: equal to `zeroline replay` within 1e-9."""
        config = write_config(tmp_path, broker)
        daemon = daemon_factory(config)
        daemon.start()
        subscriber = Subscriber(broker, "zeroline/#")
        time.sleep(0.2)  # let mosquitto_sub subscribe (it has no ready signal)
        data = rows()
        started = time.monotonic()
        publish_lines(broker, "site/a/gas", payload_lines(data))
        assert subscriber.wait_count("/a-gas/corrected", len(data), 30)
        elapsed = time.monotonic() - started
        seen = corrected_by_time(subscriber, "a-gas")
        assert all(len(copies) == 1 for copies in seen.values())
        reference = replay_reference(config, data, "a-gas")
        assert_matches_replay(seen, reference)
        status = [p for t, p in subscriber.messages("zeroline/status")]
        assert status[-1] == "online"
        assert daemon.terminate() == 0
        print(f"\nround trip: {len(data)} readings in {elapsed:.2f} s")


class TestRestarts:
    def test_broker_killed_mid_stream(
        self, persistent_broker: Mosquitto, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """SIGKILL of the broker right after a burst: the daemon reconnects by itself; every
        reading is corrected, each to the replay's value (identical copies only from QoS 1
        resends and redeliveries whose acknowledgement the broker lost).

        Mosquitto acknowledges a QoS 1 publish before it writes it to disk (even with a save
        per change), so a reading killed with the broker in the same instant is lost by the
        broker itself, whoever the subscriber: the kill waits BROKER_SAVE_S after the burst
        (see deploy/mosquitto-notes.md, "Broker crash")."""
        broker = persistent_broker
        config = write_config(tmp_path, broker)
        daemon = daemon_factory(config)
        daemon.start()
        before = Subscriber(broker, "zeroline/+/corrected", client_id="zl-collector")
        time.sleep(0.2)
        data = rows()
        publish_lines(broker, "site/a/gas", payload_lines(data[:150]))
        assert before.wait_count("/a-gas/corrected", 60, 20)
        time.sleep(BROKER_SAVE_S)
        broker.kill()
        killed = time.monotonic()
        before.stop()
        broker.start()
        assert wait_until(lambda: "reconnected to the broker" in daemon.new_log(), 30)
        reconnect_s = time.monotonic() - killed
        after = Subscriber(broker, "zeroline/+/corrected", client_id="zl-collector")
        time.sleep(0.2)
        publish_lines(broker, "site/a/gas", payload_lines(data[150:]))

        def seen() -> dict[float, list[dict]]:
            merged = corrected_by_time(before, "a-gas")
            for key, copies in corrected_by_time(after, "a-gas").items():
                merged.setdefault(key, []).extend(copies)
            return merged

        def missing() -> str:
            times = sorted(seen())
            gone = [i for i, row in enumerate(data) if row["time"] not in times]
            log = daemon.new_log()[-3000:]
            early = sorted(corrected_by_time(before, "a-gas"))
            late = sorted(corrected_by_time(after, "a-gas"))
            index = {row["time"]: i for i, row in enumerate(data)}
            log += f"\nlast rows before the kill {[index[t] for t in early][-5:]}"
            log += f", first after it {[index[t] for t in late][:8]}"
            return f"{len(times)} of {len(data)} seen; missing rows {gone}; daemon log:\n{log}"

        assert wait_until(lambda: len(seen()) >= len(data), 30), missing()
        assert daemon.alive()
        assert daemon.terminate() == 0
        assert_matches_replay(seen(), replay_reference(config, data, "a-gas"))
        duplicates = sum(len(c) - 1 for c in seen().values())
        print(
            f"\nbroker restart: reconnected {reconnect_s:.2f} s after the kill; "
            f"{duplicates} QoS 1 resends"
        )

    def test_daemon_killed_and_restarted(
        self, broker: Mosquitto, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """SIGKILL of the daemon mid-stream, readings published while it is down, restart:
        every reading corrected, values and final coefficients equal an uninterrupted
        replay within 1e-9 (the restored state continues bit for bit)."""
        config = write_config(tmp_path, broker)
        daemon = daemon_factory(config)
        daemon.start()
        subscriber = Subscriber(broker, "zeroline/+/corrected", client_id="zl-collector-2")
        time.sleep(0.2)
        data = rows()
        publish_lines(broker, "site/a/gas", payload_lines(data[:100]))
        snapshot = tmp_path / "state" / SNAPSHOT_NAME
        assert wait_until(snapshot.exists, 10)
        publish_lines(broker, "site/a/gas", payload_lines(data[100:200]))
        assert subscriber.wait_count("/a-gas/corrected", 130, 20)
        status = Subscriber(broker, "zeroline/status")

        def last_status() -> str:
            messages = status.messages("zeroline/status")
            return messages[-1][1] if messages else ""

        assert wait_until(lambda: last_status() == "online", 5)
        daemon.kill()  # mid-stream, after a snapshot: state = snapshot + journal
        assert wait_until(lambda: last_status() == "offline", 5)  # the last will
        publish_lines(broker, "site/a/gas", payload_lines(data[200:]))  # daemon down
        daemon.start()
        assert wait_until(lambda: last_status() == "online", 5)
        status.stop()
        assert wait_until(lambda: len(corrected_by_time(subscriber, "a-gas")) >= len(data), 30)
        assert daemon.terminate() == 0
        seen = corrected_by_time(subscriber, "a-gas")
        reference = replay_reference(config, data, "a-gas")
        assert_matches_replay(seen, reference)
        expected = np.array([float(reference[-1][f"c{j}"]) for j in range(3)])
        got = final_coefficients(config, "a-gas")
        np.testing.assert_allclose(got, expected, rtol=TOLERANCE, atol=TOLERANCE)
        assert "restored 1 channel(s) from the snapshot" in daemon.new_log()
        duplicates = sum(len(c) - 1 for c in seen.values())
        print(f"\ndaemon kill: {duplicates} readings re-published after the restart")


def bad_corpus(now: float) -> list[tuple[str, bytes, str]]:
    """(topic, payload, expected reason) for every kind of bad input the issue lists."""
    gas, senml = "site/a/gas", "site/a/senml"
    return [
        (gas, b'{"time": 1, "value"', "malformed_json"),
        (gas, f'{{"time": {now}, "value": NaN}}'.encode(), "non_finite"),
        (gas, f'{{"time": {now}, "value": -Infinity}}'.encode(), "non_finite"),
        (gas, f'{{"time": {now}, "value": "12.5"}}'.encode(), "value_not_number"),
        (gas, f'{{"time": {now}, "value": {{"v": 1}}}}'.encode(), "value_not_number"),
        (gas, b'[[{"time": 1}]]', "not_an_object"),
        (gas, b'{"time": 1, "value": ' + b"1" * (1 << 20) + b"}", "payload_too_large"),
        (gas, b'{"time": 1000000000, "value": 1.0}', "time_too_old"),
        (gas, f'{{"time": {now + 30 * 86400}, "value": 1.0}}'.encode(), "time_in_future"),
        (gas, b"\xff\xfe\x00", "not_utf8"),
        (senml, b'[{"n": "x", "v": "1"}]', "malformed_senml"),
        (senml, b'{"n": "x", "v": 1}', "malformed_senml"),
        (senml, b'[{"n": "x", "vs": "on"}]', "no_numeric_records"),
        ("zeroline/no-such-channel/control", b'{"event": "recalibrated"}', "unknown_channel"),
        ("zeroline/a-gas/control", b'{"event": "exploded"}', "bad_control"),
    ]


class TestBadInput:
    def test_bad_payload_corpus(
        self, broker: Mosquitto, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """Every bad payload gets an error message with its reason; good readings around
        them, duplicates and out-of-order ones included, are handled; the daemon stays up."""
        config = write_config(tmp_path, broker)
        daemon = daemon_factory(config)
        daemon.start()
        subscriber = Subscriber(broker, "zeroline/#")
        time.sleep(0.2)
        data = rows(40)
        corpus = bad_corpus(data[-1]["time"])
        expected_reasons = []
        good = 0
        for i, (topic, payload, reason) in enumerate(corpus):
            publish_one(broker, "site/a/gas", json.dumps(data[2 * i]))
            good += 1
            publish_one(broker, topic, payload)
            expected_reasons.append(reason)
        publish_one(broker, "site/a/gas", json.dumps(data[2 * len(corpus)]))  # good
        publish_one(broker, "site/a/gas", json.dumps(data[2 * len(corpus)]))  # duplicate
        publish_one(broker, "site/a/gas", json.dumps(data[0]))  # out of order
        good += 1
        expected_reasons += ["not_newer", "not_newer"]
        assert subscriber.wait_count("zeroline/error", len(expected_reasons), 20)
        assert subscriber.wait_count("/a-gas/corrected", good, 20)
        errors = [json.loads(p) for _, p in subscriber.messages("zeroline/error")]
        assert [e["reason"] for e in errors] == expected_reasons
        for error in errors:
            assert error["detail"] and error["topic"] and len(error["payload"]) <= 200
        # the duplicate of the last reading gets its output again (a broker that lost it in
        # a crash would redeliver the reading): identical bytes, not a new correction
        outputs = [p for _, p in subscriber.messages("/a-gas/corrected")]
        assert len(outputs) == good + 1
        assert outputs[-1] == outputs[-2]
        assert daemon.alive()
        assert daemon.terminate() == 0
        assert '"errors": 17' in daemon.new_log()


class TestSecurity:
    def tls_broker(self, mosquitto_bin: str) -> Mosquitto:
        server = Mosquitto(mosquitto_bin, tls=True, username="gw01", password="s3cret-Pw")
        server.start()
        return server

    def test_tls_and_password_connect(
        self, mosquitto_bin: str, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """Right CA and credentials (password from a file): the daemon connects and works."""
        server = self.tls_broker(mosquitto_bin)
        try:
            assert server.tls_files is not None
            (tmp_path / "pass").write_text("s3cret-Pw\n")
            config = write_config(
                tmp_path,
                server,
                extra_broker=(
                    f"  username: gw01\n  password_file: {tmp_path / 'pass'}\n"
                    f"  tls: {{ca_file: {server.tls_files.ca_cert}}}\n"
                ),
            )
            daemon = daemon_factory(config)
            daemon.start()
            subscriber = Subscriber(server, "zeroline/+/corrected")
            time.sleep(0.2)
            publish_lines(server, "site/a/gas", payload_lines(rows(5)))
            assert subscriber.wait_count("/a-gas/corrected", 5, 10)
            assert "s3cret" not in daemon.new_log()
            assert daemon.terminate() == 0
        finally:
            server.cleanup()

    @pytest.mark.parametrize("problem", ["wrong_ca", "wrong_password", "missing_env"])
    def test_refuses_to_start_with_one_clear_line(
        self, mosquitto_bin: str, tmp_path: Path, daemon_factory: Any, problem: str
    ) -> None:
        """Wrong CA, wrong password, unset password variable: exit 2, one line, no traceback."""
        server = self.tls_broker(mosquitto_bin)
        try:
            assert server.tls_files is not None
            ca = (
                server.tls_files.other_ca_cert
                if problem == "wrong_ca"
                else server.tls_files.ca_cert
            )
            config = write_config(
                tmp_path,
                server,
                extra_broker=(
                    "  username: gw01\n  password_env: ZL_TEST_PASSWORD\n"
                    f"  tls: {{ca_file: {ca}}}\n"
                ),
            )
            env = (
                {}
                if problem == "missing_env"
                else {"ZL_TEST_PASSWORD": "nope" if problem == "wrong_password" else "s3cret-Pw"}
            )
            environment = {k: v for k, v in os.environ.items() if k != "ZL_TEST_PASSWORD"}
            result = subprocess.run(
                [sys.executable, "-m", "zeroline.cli", "run", "-c", str(config)],
                capture_output=True,
                text=True,
                timeout=60,
                env={**environment, "PYTHONPATH": str(ROOT / "daemon"), **env},
            )
            assert result.returncode == 2, result.stderr
            lines = [line for line in result.stderr.splitlines() if "error" in line.lower()]
            assert len(lines) == 1 and lines[0].startswith("zeroline: error: "), result.stderr
            assert "Traceback" not in result.stderr
            word = {"wrong_ca": "TLS", "wrong_password": "refused", "missing_env": "not set"}
            assert word[problem] in lines[0]
            assert "nope" not in result.stderr
        finally:
            server.cleanup()


class TestOverload:
    def test_far_faster_than_processing_loses_nothing(
        self, broker: Mosquitto, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """3000 readings on 10 channels published at full speed: count in = count out, the
        backlog drains, nothing is dropped (QoS 1, manual acks, broker flow control)."""
        config = write_config(tmp_path, broker)
        daemon = daemon_factory(config)
        daemon.start()
        subscriber = Subscriber(broker, "zeroline/+/corrected")
        time.sleep(0.2)
        per_channel = 300
        data = rows(per_channel)
        started = time.monotonic()
        publishers = [
            subprocess.Popen(
                ["mosquitto_pub", *broker.client_args(), "-q", "1", "-t", f"site/s{k}/gas", "-l"],
                stdin=subprocess.PIPE,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
            )
            for k in range(10)
        ]
        lines = "".join(line + "\n" for line in payload_lines(data)).encode()
        for publisher in publishers:
            assert publisher.stdin is not None
            publisher.stdin.write(lines)
            publisher.stdin.close()
        for publisher in publishers:
            assert publisher.wait(60) == 0
        published_s = time.monotonic() - started
        total = 10 * per_channel
        assert subscriber.wait_count("/corrected", total, 60), len(subscriber.messages())
        drained_s = time.monotonic() - started
        assert len(subscriber.messages("/corrected")) == total
        for k in range(10):
            times = [json.loads(p)["time"] for _, p in subscriber.messages(f"/s{k}-gas/corrected")]
            assert times == [row["time"] for row in data]  # all, once, in order
        assert daemon.terminate() == 0
        counters = json.loads(daemon.new_log().split("stopped; counters: ")[1].splitlines()[0])
        assert counters["queue_full_waits"] > 0  # back-pressure engaged, and nothing lost
        assert counters["processed"] == counters["received"] == total
        print(
            f"\noverload: {total} published in {published_s:.2f} s "
            f"({total / published_s:,.0f}/s); all corrected after {drained_s:.2f} s "
            f"({total / drained_s:,.0f}/s through the daemon)"
        )


class TestProtocolAndReload:
    def test_mqtt_311_persistent_session(
        self, broker: Mosquitto, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """protocol 3.1.1: clean_session=False keeps readings published while it is down."""
        config = write_config(tmp_path, broker, extra_broker='  protocol: "3.1.1"\n')
        daemon = daemon_factory(config)
        daemon.start()
        assert "MQTT 3.1.1" in daemon.new_log()
        subscriber = Subscriber(broker, "zeroline/+/corrected")
        time.sleep(0.2)
        data = rows(40)
        publish_lines(broker, "site/a/gas", payload_lines(data[:20]))
        assert subscriber.wait_count("/a-gas/corrected", 20, 10)
        assert daemon.terminate() == 0
        publish_lines(broker, "site/a/gas", payload_lines(data[20:]))  # while down
        daemon.start()
        assert subscriber.wait_count("/a-gas/corrected", 40, 10)
        assert_matches_replay(
            corrected_by_time(subscriber, "a-gas"), replay_reference(config, data, "a-gas")
        )
        assert daemon.terminate() == 0

    def test_sighup_reloads_and_keeps_unchanged_models(
        self, broker: Mosquitto, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """SIGHUP with one template's basis changed: that channel starts fresh, the other
        keeps its state; a broken config is refused and the running one kept."""
        config = write_config(tmp_path, broker)
        daemon = daemon_factory(config)
        daemon.start()
        subscriber = Subscriber(broker, "zeroline/+/corrected")
        time.sleep(0.2)
        data = rows(10)
        publish_lines(broker, "site/a/gas", payload_lines(data))
        publish_one(broker, "site/a/senml", json.dumps([{"n": "x", "v": 1.0}]))
        assert subscriber.wait_count("/corrected", 11, 10)
        original = config.read_text()
        config.write_text(original.replace("channels:", "channels: [oops"))
        assert daemon.process is not None
        daemon.process.send_signal(signal.SIGHUP)
        assert wait_until(lambda: "keeping the running config" in daemon.new_log(), 10)
        changed = "    basis: [constant, {polynomial: {of: t, degree: 1, scale: 1d}}]\n"
        config.write_text(original.replace("    basis: [constant]\n", changed))
        daemon.process.send_signal(signal.SIGHUP)
        assert wait_until(lambda: "config reloaded" in daemon.new_log(), 10), daemon.new_log()
        assert "1 channel(s) kept their state, 1 start fresh, 0 dropped" in daemon.new_log()
        publish_one(broker, "site/a/gas", json.dumps(rows(11)[10]))
        assert subscriber.wait_count("/a-gas/corrected", 11, 10)
        assert daemon.alive()
        assert daemon.terminate() == 0


class TestStartup:
    def test_waits_for_an_absent_broker(
        self, mosquitto_bin: str, tmp_path: Path, daemon_factory: Any
    ) -> None:
        """A gateway often boots before its broker: the daemon retries, then connects."""
        server = Mosquitto(mosquitto_bin)
        try:
            daemon = daemon_factory(write_config(tmp_path, server))
            daemon.start(wait=False)
            assert wait_until(lambda: "not reachable" in daemon.new_log(), 10)
            assert daemon.alive()
            server.start()
            assert wait_until(lambda: "connected to the broker" in daemon.new_log(), 40)
            assert daemon.terminate() == 0
        finally:
            server.cleanup()


class TestClientCertificate:
    @pytest.mark.parametrize("with_cert", [True, False])
    def test_broker_requiring_a_client_certificate(
        self, mosquitto_bin: str, tmp_path: Path, daemon_factory: Any, with_cert: bool
    ) -> None:
        """require_certificate: with cert_file/key_file the daemon works; without, exit 2."""
        server = Mosquitto(mosquitto_bin, tls=True, require_client_cert=True)
        server.start()
        try:
            files = server.tls_files
            assert files is not None
            tls = f"ca_file: {files.ca_cert}"
            if with_cert:
                tls += f", cert_file: {files.client_cert}, key_file: {files.client_key}"
            config = write_config(tmp_path, server, extra_broker=f"  tls: {{{tls}}}\n")
            if with_cert:
                daemon = daemon_factory(config)
                daemon.start()
                assert daemon.terminate() == 0
                return
            started = time.monotonic()
            result = subprocess.run(
                [sys.executable, "-m", "zeroline.cli", "run", "-c", str(config)],
                capture_output=True,
                text=True,
                timeout=60,
                env={**os.environ, "PYTHONPATH": str(ROOT / "daemon")},
            )
            assert result.returncode == 2, result.stderr
            assert "Traceback" not in result.stderr
            [line] = [x for x in result.stderr.splitlines() if x.startswith("zeroline: error:")]
            assert "client certificate" in line or "TLS" in line, line
            assert time.monotonic() - started < 20
        finally:
            server.cleanup()
