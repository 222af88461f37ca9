"""The broker seam: what the daemon needs from MQTT, and the paho-mqtt 2.x adapter.

`BrokerLink` is the whole interface the service uses (connect, subscribe, unsubscribe,
publish, confirmed, ack, close), so unit tests drive the service with a fake broker and the
integration tests with a real Mosquitto through `PahoBroker`.

Delivery guarantees, and how paho is set up for them:

- Inbound QoS 1 with **manual acknowledgement** (`manual_ack=True`): paho does not PUBACK a
  message on arrival; the service calls `ack(message.token)` only once the message's effect
  is durable (see `zeroline.service`). Unacknowledged messages are what the broker
  redelivers after a reconnect or a restart of the daemon, so nothing received is lost.
- **Flow control**: under MQTT 5 the CONNECT carries `ReceiveMaximum = broker.inflight`
  for brokers that honour it (Mosquitto 2.0.11 does not, once acknowledgements flow; the
  service's bounded queue is what really pushes back, see `zeroline.service`). A daemon
  that falls behind makes the broker queue for it (Mosquitto: `max_queued_messages` must be
  0 or large, see deploy/mosquitto-notes.md) instead of dropping anything itself.
- **Persistent session**: MQTT 5 `clean_start=False` with `SessionExpiryInterval =
  broker.session_expiry`; 3.1.1 `clean_session=False`. Readings published while the daemon
  is down wait in the broker. Subscriptions are renewed on every connect anyway.
- **Outbound QoS 1** for every output. `publish` returns a sequence number; `confirmed()`
  is the highest number up to which the broker has acknowledged every publish. paho keeps
  unacknowledged publishes across reconnects and resends them, so the service may treat a
  published-but-unconfirmed output as "in transit", never as lost.
- Two connections, `client_id` for input and `client_id-out` for output (see
  `PahoBroker` for why and what it bought).
- Last will: `<prefix>/status` = `offline`, retained, on the output connection; `online`
  (retained) on every connect of it.
- Reconnect with exponential backoff (1 s doubling to 30 s) by paho's network thread.

Start-up refusals are `BrokerError` (a `UserError`: one line, exit 2): a TLS certificate the
CA does not vouch for, a refused user name or password, a missing password file. A broker
that is merely not there yet is retried with backoff: a gateway often boots before its
broker. The password is never logged or put in an error message.

Locking: `publish` is called by the worker, `on_publish` by paho's network thread while it
holds paho's own message mutex. The adapter's lock is therefore never held while calling
into paho, or the two threads could deadlock.
"""

from __future__ import annotations

import contextlib
import heapq
import logging
import os
import ssl
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from zeroline.errors import UserError
from zeroline.logs import RateLimitedLogger

_log = logging.getLogger(__name__)

CONNACK_TIMEOUT_S = 30.0
RECONNECT_MIN_S, RECONNECT_MAX_S = 1, 30
QOS = 1


class BrokerError(UserError):
    """The broker cannot be used with this configuration (TLS, credentials, address)."""


@dataclass(frozen=True)
class Message:
    """One inbound message; `token` is what `BrokerLink.ack` needs (None: QoS 0, no ack)."""

    topic: str
    payload: bytes
    arrival: float
    token: Any = None


MessageHandler = Callable[[Message], None]
ConnectHandler = Callable[[], None]


class BrokerLink(Protocol):
    """The daemon's view of an MQTT broker."""

    def connect(self, on_message: MessageHandler, on_connect: ConnectHandler) -> None:
        """Connect (retrying an absent broker) and start delivering; BrokerError if refused."""

    def subscribe(self, topics: Sequence[str]) -> None:
        """Subscribe at QoS 1 (also renewed on every reconnect by the caller's on_connect)."""

    def unsubscribe(self, topics: Sequence[str]) -> None: ...

    def publish(self, topic: str, payload: bytes, *, retain: bool = False) -> int:
        """Queue a QoS 1 publish; returns its sequence number (1, 2, …)."""

    def confirmed(self) -> int:
        """Highest sequence number up to which every publish is acknowledged by the broker."""

    def ack(self, token: Any) -> None:
        """Acknowledge an inbound message (its effect is durable)."""

    def close(self) -> None:
        """Publish the offline status, disconnect and stop the network thread."""


@dataclass(frozen=True)
class BrokerSettings:
    """Everything `PahoBroker` needs, read from the config's `broker` section."""

    host: str
    port: int
    protocol: str
    client_id: str
    username: str | None
    password: str | None
    ca_file: str | None
    cert_file: str | None
    key_file: str | None
    keepalive: int
    session_expiry: int
    inflight: int
    status_topic: str

    def __repr__(self) -> str:  # never show the password
        return f"BrokerSettings({self.host}:{self.port}, client_id={self.client_id!r})"

    @staticmethod
    def from_config(broker: Any, prefix: str, queue_bound: int) -> BrokerSettings:
        tls = broker.get("tls") or {}
        return BrokerSettings(
            host=str(broker["host"]),
            port=int(broker["port"]),
            protocol=str(broker["protocol"]),
            client_id=str(broker["client_id"]),
            username=broker.get("username"),
            password=read_password(broker),
            ca_file=tls.get("ca_file"),
            cert_file=tls.get("cert_file"),
            key_file=tls.get("key_file"),
            keepalive=max(5, int(broker["keepalive"])),
            session_expiry=int(broker["session_expiry"]),
            # never let the broker have more unacknowledged messages out to us than fit
            # in the queue: then the network thread never has to wait for the worker
            inflight=max(1, min(int(broker["inflight"]), queue_bound // 2)),
            status_topic=f"{prefix}/status",
        )


def read_password(broker: Any) -> str | None:
    """The broker password from `password_file` or `password_env`; None if neither."""
    path, variable = broker.get("password_file"), broker.get("password_env")
    if path:
        try:
            with open(path, encoding="utf-8") as handle:
                return handle.read().rstrip("\r\n")
        except OSError as error:
            raise BrokerError(
                f"broker.password_file {path!r} cannot be read ({error.strerror}); "
                "give a file readable by the daemon holding the password"
            ) from None
    if variable:
        value = os.environ.get(variable)
        if value is None:
            raise BrokerError(
                f"broker.password_env names {variable!r}, which is not set; export it "
                "(e.g. in the service's environment file)"
            )
        return value
    return None


class _PublishTracker:
    """Turns paho's per-mid PUBACK callbacks into one 'confirmed up to' number."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._next = 0
        self._by_mid: dict[int, int] = {}
        self._early: set[int] = set()  # PUBACK seen before publish() returned the mid
        self._open: list[int] = []  # heap of unconfirmed sequence numbers
        self._done: set[int] = set()

    def issue(self) -> int:
        with self._lock:
            self._next += 1
            return self._next

    def record(self, sequence: int, mid: int) -> None:
        with self._lock:
            if mid in self._early:
                self._early.discard(mid)
                return
            self._by_mid[mid] = sequence
            heapq.heappush(self._open, sequence)

    def on_puback(self, mid: int) -> None:
        with self._lock:
            sequence = self._by_mid.pop(mid, None)
            if sequence is None:
                self._early.add(mid)
            else:
                self._done.add(sequence)

    def confirmed(self) -> int:
        with self._lock:
            while self._open and self._open[0] in self._done:
                self._done.discard(heapq.heappop(self._open))
            # issue() and record() run back to back on the worker thread, which is also
            # the only caller of confirmed(): no number is ever issued but unrecorded here.
            return self._open[0] - 1 if self._open else self._next

    def outstanding(self) -> int:
        with self._lock:
            return len(self._open) - len(self._done)


class _Link:
    """One paho connection: build, connect (with start-up refusals as BrokerError),
    reconnect with backoff, and log its state changes."""

    def __init__(
        self,
        settings: BrokerSettings,
        role: str,
        client_id: str,
        *,
        subscriber: bool,
        on_connected: Callable[[paho.Client, Any], None],
    ) -> None:
        self.settings = settings
        self.role = role
        self.subscriber = subscriber
        self.connected = threading.Event()
        self.generation = 0  # counts successful CONNACKs
        self.reconnects = 0
        self.last_connect_s: float | None = None  # time from connection loss to CONNACK
        self._on_connected = on_connected
        self._connack: tuple[bool, str] | None = None
        self._connack_event = threading.Event()
        self._lost_at: float | None = None
        self._problems = RateLimitedLogger(_log, interval_s=30.0)
        self.client = self._build(client_id)

    def _build(self, client_id: str) -> paho.Client:
        s = self.settings
        v5 = s.protocol == "5"
        client = paho.Client(
            callback_api_version=CallbackAPIVersion.VERSION2,
            client_id=client_id,
            protocol=paho.MQTTv5 if v5 else paho.MQTTv311,
            # Only the subscribing connection needs a session the broker keeps for us.
            clean_session=None if v5 else not self.subscriber,
            manual_ack=self.subscriber,
        )
        if s.username:
            client.username_pw_set(s.username, s.password)
        if s.ca_file or s.cert_file:
            try:
                client.tls_set(ca_certs=s.ca_file, certfile=s.cert_file, keyfile=s.key_file)
            except (OSError, ssl.SSLError, ValueError) as error:
                raise BrokerError(
                    f"broker.tls: cannot load the CA/certificate/key files ({error}); give "
                    "readable PEM files"
                ) from None
        if not self.subscriber:
            client.will_set(s.status_topic, b"offline", qos=QOS, retain=True)
        client.reconnect_delay_set(RECONNECT_MIN_S, RECONNECT_MAX_S)
        # More of our publishes in flight than the broker's Receive Maximum is a protocol
        # error under MQTT 5 (checked in `_check_receive_maximum`); paho cannot change the
        # limit once connected.
        client.max_inflight_messages_set(s.inflight)
        client.max_queued_messages_set(0)  # unlimited: the service bounds what it publishes
        client.on_connect = self._handle_connect
        client.on_disconnect = self._handle_disconnect
        return client

    def _connect_properties(self) -> Properties | None:
        if self.settings.protocol != "5":
            return None
        properties = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]  # paho is untyped here
        if self.subscriber:
            properties.SessionExpiryInterval = self.settings.session_expiry
            properties.ReceiveMaximum = self.settings.inflight
        return properties

    def connect(self) -> None:
        """Connect, retrying an absent broker; BrokerError for TLS or credential refusals."""
        s = self.settings
        delay = float(RECONNECT_MIN_S)
        while True:
            try:
                if s.protocol == "5":
                    self.client.connect(
                        s.host,
                        s.port,
                        s.keepalive,
                        clean_start=not self.subscriber,
                        properties=self._connect_properties(),
                    )
                else:
                    self.client.connect(s.host, s.port, s.keepalive)
                break
            except ssl.SSLError as error:
                raise BrokerError(
                    f"TLS to the broker {s.host}:{s.port} failed ({error.reason or error}); "
                    "check broker.tls.ca_file is the CA that signed the broker's certificate "
                    "and that the host name matches it"
                ) from None
            except OSError as error:
                self._problems.warning(
                    "connect",
                    f"broker {s.host}:{s.port} not reachable ({error.strerror or error}); "
                    f"retrying every {delay:.0f} s at most",
                )
                time.sleep(delay)
                delay = min(delay * 2, RECONNECT_MAX_S)
        self.client.loop_start()
        if not self._connack_event.wait(CONNACK_TIMEOUT_S):
            self.client.loop_stop()
            raise BrokerError(
                f"broker {s.host}:{s.port} accepted the connection but sent no CONNACK "
                f"within {CONNACK_TIMEOUT_S:.0f} s; is it an MQTT broker (and is TLS needed)?"
            )
        assert self._connack is not None
        ok, reason = self._connack
        if not ok:
            self.stop()
            raise BrokerError(reason)

    def stop(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()

    # --- paho callbacks (this connection's network thread) ------------------------------

    def _handle_connect(
        self, client: paho.Client, userdata: Any, flags: Any, reason: Any, properties: Any
    ) -> None:
        s = self.settings
        ok = not reason.is_failure
        self._connack = (
            ok,
            f"broker {s.host}:{s.port} refused the connection: {reason}; check "
            "broker.username and the password (password_file/password_env)",
        )
        if ok:
            self.generation += 1
            if self._lost_at is not None:
                self.last_connect_s = time.monotonic() - self._lost_at
                self.reconnects += 1
                _log.info(
                    "reconnected to the broker (%s) after %.2f s (session present: %s)",
                    self.role,
                    self.last_connect_s,
                    getattr(flags, "session_present", "?"),
                )
                self._lost_at = None
            elif self.subscriber:
                _log.info("connected to the broker %s:%d (MQTT %s)", s.host, s.port, s.protocol)
            self._check_receive_maximum(properties)
            self.connected.set()
            self._on_connected(client, flags)
        else:
            self._problems.warning("connack", f"broker refused the connection: {reason}")
        self._connack_event.set()

    def _check_receive_maximum(self, properties: Any) -> None:
        """Warn when the broker allows fewer of our publishes in flight than we use."""
        if self.settings.protocol != "5" or self.subscriber:
            return
        # MQTT 5 §3.2.2.3.3: absent means 65,535.
        limit = int(getattr(properties, "ReceiveMaximum", None) or 65535)
        if limit < self.settings.inflight:
            self._problems.warning(
                "receive_maximum",
                f"the broker accepts at most {limit} QoS 1 messages in flight from us but "
                f"broker.inflight is {self.settings.inflight}; raise the broker's limit "
                f"(Mosquitto: max_inflight_messages {self.settings.inflight}) or lower "
                "broker.inflight",
            )

    def _handle_disconnect(
        self, client: paho.Client, userdata: Any, flags: Any, reason: Any, properties: Any
    ) -> None:
        if not self._connack_event.is_set():  # closed before any CONNACK: fail fast
            s = self.settings
            self._connack = (
                False,
                f"broker {s.host}:{s.port} closed the connection before accepting it "
                f"({reason}); if it requires a client certificate give broker.tls.cert_file "
                "and key_file, otherwise check the TLS settings and credentials",
            )
            self._connack_event.set()
            return
        if self.connected.is_set():
            self._lost_at = time.monotonic()
            self._problems.warning(
                "disconnect",
                f"lost the broker connection ({self.role}: {reason}); reconnecting with backoff",
            )
        self.connected.clear()


class PahoBroker:
    """`BrokerLink` over paho-mqtt 2.x (MQTT 5 or 3.1.1, TLS, password, persistent session).

    Two connections: `client_id` subscribes (persistent session, manual acks) and
    `client_id-out` publishes (outputs, status, last will). Why: when the daemon falls
    behind, the subscribing connection stops reading (the queue is full), and the broker's
    PUBACKs for our outputs would sit in the same socket behind thousands of unread
    readings; outputs then confirm slowly, commits wait, and the whole pipeline crawls
    (measured, 20,000 readings on 10 channels published at once, loopback, 2 cores: one
    connection drained them at 460-520 readings/s, two connections at 970-1,040/s). A
    broker ACL must allow both client ids.
    """

    def __init__(self, settings: BrokerSettings) -> None:
        self.settings = settings
        self._tracker = _PublishTracker()
        self._on_message: MessageHandler = lambda message: None
        self._on_connect: ConnectHandler = lambda: None
        self._input = _Link(
            settings, "input", settings.client_id, subscriber=True, on_connected=self._subscribed
        )
        self._output = _Link(
            settings,
            "output",
            f"{settings.client_id}-out",
            subscriber=False,
            on_connected=self._publishing,
        )
        self._input.client.on_message = self._handle_message
        self._output.client.on_publish = self._handle_publish

    @property
    def connected(self) -> threading.Event:
        return self._input.connected

    @property
    def reconnects(self) -> int:
        return self._input.reconnects

    # --- BrokerLink -----------------------------------------------------------------------

    def connect(self, on_message: MessageHandler, on_connect: ConnectHandler) -> None:
        self._on_message, self._on_connect = on_message, on_connect
        self._output.connect()
        try:
            self._input.connect()
        except BrokerError:
            self._output.stop()
            raise

    def subscribe(self, topics: Sequence[str]) -> None:
        if topics:
            self._input.client.subscribe([(topic, QOS) for topic in sorted(topics)])

    def unsubscribe(self, topics: Sequence[str]) -> None:
        if topics:
            self._input.client.unsubscribe(list(topics))

    def publish(self, topic: str, payload: bytes, *, retain: bool = False) -> int:
        sequence = self._tracker.issue()
        info = self._output.client.publish(topic, payload, qos=QOS, retain=retain)
        if info.rc not in (paho.MQTT_ERR_SUCCESS, paho.MQTT_ERR_NO_CONN):
            # Not queued at all (cannot happen with an unlimited queue): never wait for it.
            _log.warning("publish to %s not queued (rc %s)", topic, info.rc)
            self._tracker.record(sequence, -sequence)
            self._tracker.on_puback(-sequence)
            return sequence
        self._tracker.record(sequence, info.mid)
        return sequence

    def confirmed(self) -> int:
        return self._tracker.confirmed()

    def ack(self, token: Any) -> None:
        generation, mid, qos = token
        # A message received on an earlier connection will be (or was) redelivered with the
        # same mid; acking the old delivery now could ack an unrelated later message.
        if generation == self._input.generation and qos > 0:
            self._input.client.ack(mid, qos)

    def close(self) -> None:
        self._input.stop()
        client = self._output.client
        info = client.publish(self.settings.status_topic, b"offline", qos=QOS, retain=True)
        if self._output.connected.is_set():
            # not connected any more: the last will says offline instead
            with contextlib.suppress(RuntimeError, ValueError):
                info.wait_for_publish(timeout=3.0)
        self._output.stop()

    # --- paho callbacks (network threads) ------------------------------------------------

    def _subscribed(self, client: paho.Client, flags: Any) -> None:
        self._on_connect()

    def _publishing(self, client: paho.Client, flags: Any) -> None:
        client.publish(self.settings.status_topic, b"online", qos=QOS, retain=True)

    def _handle_message(self, client: paho.Client, userdata: Any, message: Any) -> None:
        token = (self._input.generation, message.mid, message.qos)
        try:
            topic = message.topic
        except UnicodeDecodeError:
            topic = message._topic.decode("utf-8", "replace")
        self._on_message(Message(topic, bytes(message.payload), time.time(), token))

    def _handle_publish(
        self, client: paho.Client, userdata: Any, mid: int, reason: Any, properties: Any
    ) -> None:
        if getattr(reason, "is_failure", False):
            _log.warning("broker refused a publish: %s", reason)
        self._tracker.on_puback(mid)
