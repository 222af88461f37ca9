"""The daemon's own MQTT client (`SocketBroker`) against a real Mosquitto and a scripted one.

The real broker is the reference for the protocol (Eclipse Mosquitto, the tests' own
instance); paho-mqtt, an independent client, publishes and subscribes on the other side.
The scripted broker below plays exactly the failures a real one is hard to make on cue:
a connection dropped with a publish unacknowledged, and a refused CONNECT.
"""

from __future__ import annotations

import socket
import threading
import time
from typing import Any

import paho.mqtt.client as paho
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from support.broker import Mosquitto, wait_until
from zeroline import mqtt_wire as wire
from zeroline.mqtt import BrokerError, BrokerSettings, Message, SocketBroker


def settings(port: int, protocol: str = "5", **changes: Any) -> BrokerSettings:
    values: dict[str, Any] = {
        "host": "127.0.0.1",
        "port": port,
        "protocol": protocol,
        "client_id": f"zl-link-{time.monotonic_ns()}",
        "username": None,
        "password": None,
        "ca_file": None,
        "cert_file": None,
        "key_file": None,
        "keepalive": 60,
        "session_expiry": 3600,
        "inflight": 10,
        "status_topic": "zl/status",
    }
    values.update(changes)
    return BrokerSettings(**values)


class PahoSide:
    """An independent client on the other side of the broker."""

    def __init__(self, port: int, topic: str | None = None) -> None:
        self.received: list[tuple[str, bytes, bool]] = []
        self.client = paho.Client(CallbackAPIVersion.VERSION2)
        self.client.on_message = lambda c, u, m: self.received.append(
            (m.topic, bytes(m.payload), bool(m.retain))
        )
        subscribed = threading.Event()
        self.client.on_subscribe = lambda *a: subscribed.set()
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        if topic is not None:
            self.client.subscribe(topic, qos=1)
            assert subscribed.wait(5)

    def publish(self, topic: str, payload: bytes) -> None:
        self.client.publish(topic, payload, qos=1).wait_for_publish(5)

    def stop(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_outputs_arrive_in_order_and_are_confirmed(broker: Mosquitto, protocol: str) -> None:
    other = PahoSide(broker.port, "out/#")
    link = SocketBroker(settings(broker.port, protocol))
    link.connect(lambda message: None, lambda: None)
    try:
        sequences = [link.publish(f"out/{i % 7}", str(i).encode()) for i in range(500)]
        link.flush()
        assert len(link._inflight) <= 10  # the window (broker.inflight) is never exceeded
        assert wait_until(lambda: link.confirmed() >= sequences[-1], 10)
        assert wait_until(lambda: len(other.received) >= 500, 10)
        payloads = [int(p) for _, p, _ in other.received if _ != "zl/status"]
        assert payloads == list(range(500))
    finally:
        link.close()
        other.stop()


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_status_online_then_offline_retained(broker: Mosquitto, protocol: str) -> None:
    link = SocketBroker(settings(broker.port, protocol, status_topic="zl/p/status"))
    link.connect(lambda message: None, lambda: None)
    seen = PahoSide(broker.port, "zl/p/status")
    assert wait_until(lambda: ("zl/p/status", b"online", True) in seen.received, 5)
    link.close()
    assert wait_until(lambda: seen.received[-1][1] == b"offline", 5)
    seen.stop()


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_unacknowledged_readings_come_back_acknowledged_do_not(
    broker: Mosquitto, protocol: str
) -> None:
    """Persistent session + acknowledgement on request: what was not acked is redelivered."""
    config = settings(broker.port, protocol)
    received: list[Message] = []
    link = SocketBroker(config)
    link.connect(received.append, lambda: link.subscribe(["in/#"]))
    assert wait_until(lambda: not link._subscriptions, 5)  # SUBACK: the filter is in place
    other = PahoSide(broker.port)
    for i in range(6):
        other.publish(f"in/{i}", str(i).encode())
    assert wait_until(lambda: len(received) == 6, 5)
    for message in received[:3]:
        link.ack(message.token)
    link.flush()
    time.sleep(0.3)
    link.close()
    again: list[Message] = []
    relinked = SocketBroker(config)
    relinked.connect(again.append, lambda: relinked.subscribe(["in/#"]))
    try:
        assert wait_until(lambda: len(again) >= 3, 5)
        time.sleep(0.3)
        assert sorted(m.payload for m in again) == [b"3", b"4", b"5"]
    finally:
        relinked.close()
        other.stop()


def test_reconnects_after_a_broker_restart_and_sends_what_waited(mosquitto_bin: str) -> None:
    server = Mosquitto(mosquitto_bin, persistent=True)
    server.start()
    received: list[Message] = []
    link = SocketBroker(settings(server.port, "5"))
    link.connect(received.append, lambda: link.subscribe(["in/#"]))
    try:
        assert wait_until(lambda: not link._subscriptions, 5)  # SUBACK
        other = PahoSide(server.port)
        other.publish("in/a", b"1")
        assert wait_until(lambda: len(received) == 1, 5)
        other.stop()
        old_token = received[0].token
        server.stop()
        waiting = link.publish("out/x", b"while away")
        link.flush()
        assert link.confirmed() < waiting
        server.start()
        assert wait_until(lambda: link.reconnects == 1, 15)
        assert wait_until(lambda: link.confirmed() >= waiting, 10)
        # an acknowledgement from the earlier connection is never sent on this one
        assert not link._input.send(wire.puback(old_token[1]), old_token[0])
        assert wait_until(lambda: len(received) == 2, 5)  # the unacked reading, again
        assert received[1].payload == b"1"
    finally:
        link.close()
        server.cleanup()


def test_publish_waits_for_flush() -> None:
    """Outputs leave in one wake-up per batch: nothing is sent before flush()."""
    sent: list[bytes] = []

    def script(connection: socket.socket, index: int) -> None:
        connection.sendall(b"\x20\x02\x00\x00")
        connection.settimeout(5)
        while True:
            data = connection.recv(65536)
            if not data:
                return
            sent.append(data)

    scripted = ScriptedBroker(script)
    link = SocketBroker(settings(scripted.port, "3.1.1"))
    link.connect(lambda message: None, lambda: None)
    try:
        assert wait_until(lambda: any(b"online" in d for d in sent), 5)
        before = b"".join(sent)
        link.publish("o", b"first")
        link.publish("o", b"second")
        time.sleep(0.3)
        assert b"".join(sent) == before
        link.flush()
        assert wait_until(lambda: b"second" in b"".join(sent), 5)
        assert b"".join(sent).index(b"first") < b"".join(sent).index(b"second")
    finally:
        link.close()
        scripted.close()


def test_wrong_password_is_a_one_line_refusal(mosquitto_bin: str) -> None:
    server = Mosquitto(mosquitto_bin, username="zl", password="right")
    server.start()
    try:
        for protocol in ("5", "3.1.1"):
            link = SocketBroker(settings(server.port, protocol, username="zl", password="wrong"))
            with pytest.raises(BrokerError, match="refused the connection") as caught:
                link.connect(lambda message: None, lambda: None)
            assert "wrong" not in str(caught.value)  # never the password
            assert "\n" not in str(caught.value)
    finally:
        server.cleanup()


class ScriptedBroker:
    """Accepts connections on a free port. Each output connection (client id ending in
    `-out`) runs `script(connection, index)`, index counting them; an input connection
    just gets its CONNACK and is left open."""

    def __init__(self, script: Any) -> None:
        self.server = socket.create_server(("127.0.0.1", 0))
        self.port = self.server.getsockname()[1]
        self.script = script
        self.outputs = 0
        self.errors: list[BaseException] = []
        threading.Thread(target=self._serve, daemon=True).start()

    def _serve(self) -> None:
        while True:
            try:
                connection, _ = self.server.accept()
            except OSError:
                return
            threading.Thread(target=self._handle, args=(connection,), daemon=True).start()

    def _handle(self, connection: socket.socket) -> None:
        try:
            connection.settimeout(5)
            connect = connection.recv(65536)
            if b"-out" not in connect:
                connection.sendall(b"\x20\x02\x00\x00")
                while connection.recv(65536):
                    pass
                return
            index, self.outputs = self.outputs, self.outputs + 1
            self.script(connection, index)
        except BaseException as error:  # reported by the test
            self.errors.append(error)

    def close(self) -> None:
        self.server.close()


def test_a_publish_lost_with_the_connection_is_sent_again_marked_dup() -> None:
    seen: list[tuple[int, int, bytes, bool]] = []

    def script(connection: socket.socket, index: int) -> None:
        connection.sendall(b"\x20\x02\x00\x00")  # CONNACK accepted
        connection.settimeout(5)
        data = b""
        while True:  # the online status and the output, raw, to see the DUP bit
            data += connection.recv(65536)
            packets = wire.PacketReader(v5=False).feed(data)
            outputs = [p for p in packets if p.kind == wire.PUBLISH and p.topic == "o"]
            if outputs:
                break
        for packet in outputs:
            seen.append((index, packet.packet_id, packet.payload, bool(packet.flags & 0x08)))
        if index == 0:
            connection.close()  # dropped before any PUBACK
            return
        for packet in wire.PacketReader(v5=False).feed(data):
            if packet.kind == wire.PUBLISH:
                connection.sendall(wire.puback(packet.packet_id))
        time.sleep(2)
        connection.close()

    scripted = ScriptedBroker(script)
    link = SocketBroker(settings(scripted.port, "3.1.1"))
    link.connect(lambda message: None, lambda: None)
    try:
        sequence = link.publish("o", b"reading")
        link.flush()
        assert wait_until(lambda: link.confirmed() >= sequence, 10), scripted.errors
        first, second = seen[0], seen[1]
        assert first[0] == 0 and not first[3]
        assert second[0] == 1 and second[3]  # DUP on the redelivery
        assert first[1:3] == second[1:3]  # same packet id, same payload
    finally:
        link.close()
        scripted.close()


def test_no_connack_is_a_clear_error(monkeypatch: pytest.MonkeyPatch) -> None:
    import zeroline.mqtt as module

    monkeypatch.setattr(module, "CONNACK_TIMEOUT_S", 0.5)
    scripted = ScriptedBroker(lambda connection, index: time.sleep(2))
    try:
        link = SocketBroker(settings(scripted.port, "5"))
        with pytest.raises(BrokerError, match="sent no CONNACK within"):
            link.connect(lambda message: None, lambda: None)
    finally:
        scripted.close()
