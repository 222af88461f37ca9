"""The broker seam: what the daemon needs from MQTT, and the daemon's own MQTT client.

`BrokerLink` is the whole interface the service uses (connect, subscribe, unsubscribe,
publish, confirmed, ack, close), so unit tests drive the service with a fake broker and the
integration tests with a real Mosquitto through `SocketBroker`. `publish` only queues: the
worker calls `flush` once per batch, so a batch of outputs costs one wake-up of the network
thread and one `sendall`.

Why an own client. A corrected reading costs the model a few tens of microseconds; a
general-purpose client (paho-mqtt, measured here: ~74 µs of CPU per relayed message) costs
more than that per message, because it reads every packet with several system calls, wakes
its network thread for every publish and keeps Python objects per message. `SocketBroker`
speaks the packets of `zeroline.mqtt_wire` over one socket per connection: it reads up to
256 KB at a time and decodes every packet in it, and everything the worker queues between
two wake-ups of the network thread (outputs, acknowledgements) leaves in one `sendall`.

Delivery guarantees:

- Inbound QoS 1 with **acknowledgement on request**: a PUBLISH is not acknowledged on
  arrival; the service calls `ack(message.token)` only once the message's effect is durable
  (see `zeroline.service`). Unacknowledged messages are what the broker redelivers after a
  reconnect or a restart of the daemon, so nothing received is lost. A token from an
  earlier connection is never acknowledged (its packet id may now name another message).
- **Flow control**: under MQTT 5 the CONNECT carries `ReceiveMaximum = broker.inflight`
  for brokers that honour it (Mosquitto 2.0.11 does not, once acknowledgements flow; the
  service's bounded queue is what really pushes back: when it is full the input
  connection's thread stops reading the socket). A daemon that falls behind makes the
  broker queue for it (Mosquitto: `max_queued_messages` must be 0 or large, see
  deploy/mosquitto-notes.md) instead of dropping anything itself.
- **Persistent session** for the input connection: MQTT 5 `clean_start=False` with
  `SessionExpiryInterval = broker.session_expiry`; 3.1.1 `clean_session=False`. Readings
  published while the daemon is down wait in the broker. Subscriptions are renewed on
  every connect anyway.
- **Outbound QoS 1** for every output, at most `broker.inflight` unacknowledged (and never
  more than an MQTT 5 broker's Receive Maximum); the rest wait in order. `publish` returns
  a sequence number; `confirmed()` is the highest number up to which the broker has
  acknowledged every publish. Unacknowledged publishes are kept across reconnects and sent
  again (DUP set) before anything new, so the service may treat a published-but-unconfirmed
  output as "in transit", never as lost.
- Two connections, `client_id` for input and `client_id-out` for output (see
  `SocketBroker` for why).
- Last will: `<prefix>/status` = `offline`, retained, on the output connection; `online`
  (retained) on every connect of it.
- Keep-alive: a PINGREQ when nothing was sent for half of `broker.keepalive`; no answer
  from the broker for a whole keep-alive period drops the connection.
- Reconnect with exponential backoff (1 s doubling to 30 s) by each connection's thread.

Start-up refusals are `BrokerError` (a `UserError`: one line, exit 2): a TLS certificate the
CA does not vouch for, a refused user name or password, a missing password file. A broker
that is merely not there yet is retried with backoff: a gateway often boots before its
broker. The password is never logged or put in an error message.

Threads and locks: each connection has one network thread that reads it, reconnects it and
sends its own packets. Other threads append frames under the connection's lock; `flush`
then sends them once per batch: on plain TCP directly from the calling thread (under a send
lock shared with the network thread; writing while another thread reads is safe on a TCP
socket), on TLS by waking the network thread through a socket pair (an OpenSSL connection
must not be used by two threads at once). Callbacks (`on_message`, the connect handlers)
run on the network thread without a lock held.
"""

from __future__ import annotations

import contextlib
import logging
import os
import select
import socket
import ssl
import threading
import time
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

from zeroline import mqtt_wire as wire
from zeroline.errors import UserError
from zeroline.logs import RateLimitedLogger

_log = logging.getLogger(__name__)

CONNACK_TIMEOUT_S = 30.0
RECONNECT_MIN_S, RECONNECT_MAX_S = 1, 30
CLOSE_TIMEOUT_S = 3.0
READ_BYTES = 256 * 1024
QUICKACK: int | None = getattr(socket, "TCP_QUICKACK", None)  # Linux
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

    def flush(self) -> None:
        """Send what `publish` and `ack` queued (called once per batch of them)."""

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


def _tls_context(settings: BrokerSettings) -> ssl.SSLContext | None:
    """The TLS context for `broker.tls` (None: plain TCP); BrokerError if files are bad."""
    if not (settings.ca_file or settings.cert_file):
        return None
    try:
        context = ssl.create_default_context(cafile=settings.ca_file)
        if settings.cert_file:
            context.load_cert_chain(settings.cert_file, settings.key_file)
    except (OSError, ssl.SSLError, ValueError) as error:
        raise BrokerError(
            f"broker.tls: cannot load the CA/certificate/key files ({error}); give "
            "readable PEM files"
        ) from None
    return context


class _RefusedError(Exception):
    """The broker answered but did not accept the connection (reason in words)."""


class _Connection:
    """One MQTT connection: its socket, its network thread, reconnects with backoff.

    What the connection is for is its owner's business: `on_up` runs after every accepted
    CONNACK (on the connecting thread, before any packet is read) and returns the frames to
    send first; `on_packet` gets every PUBLISH and acknowledgement; `on_down` runs when
    the connection is lost.
    """

    def __init__(
        self,
        settings: BrokerSettings,
        role: str,
        client_id: str,
        *,
        subscriber: bool,
        on_up: Callable[[], list[bytes]],
        on_packet: Callable[[wire.Packet], None],
        on_down: Callable[[], None],
    ) -> None:
        self.settings = settings
        self.role = role
        self.client_id = client_id
        self.subscriber = subscriber
        self.v5 = settings.protocol == "5"
        self.connected = threading.Event()
        self.generation = 0  # counts accepted CONNACKs
        self.reconnects = 0
        self.last_connect_s: float | None = None  # time from connection loss to CONNACK
        self.receive_maximum = 65535  # MQTT 5 §3.2.2.3.3: absent means 65,535
        self._on_up, self._on_packet, self._on_down = on_up, on_packet, on_down
        self._tls = _tls_context(settings)
        self._lock = threading.Lock()
        self._frames: list[bytes] = []
        # Reads land here and only what arrived is copied out: `recv(READ_BYTES)` would
        # allocate 256 KB per read, which glibc maps and unmaps each time once the daemon
        # fixes its mmap threshold (zeroline.heap); the throughput rounds' CPU per reading
        # was 15-20 µs higher with it (a noisy figure: two runs).
        self._inbox = memoryview(bytearray(READ_BYTES))
        self._wake_read, self._wake_write = socket.socketpair()
        self._wake_read.setblocking(False)
        self._wake_write.setblocking(False)
        self._stopping = threading.Event()
        self._thread: threading.Thread | None = None
        self._send_lock = threading.Lock()  # one writer at a time on the socket
        self._direct: socket.socket | None = None  # while serving plain TCP: see wake()
        self._last_sent = 0.0
        self._lost_at: float | None = None
        self._reader = wire.PacketReader(v5=self.v5)
        self._problems = RateLimitedLogger(_log, interval_s=30.0)

    # --- any thread -----------------------------------------------------------------------

    def send(self, frame: bytes, generation: int | None = None, *, wake: bool = True) -> bool:
        """Queue a frame for the network thread; with `generation`, only if the connection
        is still that one (an acknowledgement must not reach a later connection). With
        `wake=False` it waits for the next `wake()` (or whatever else wakes the thread)."""
        with self._lock:
            if generation is not None and generation != self.generation:
                return False
            first = not self._frames
            self._frames.append(frame)
        if wake and first:
            self.wake()
        return True

    def wake(self) -> None:
        """Send what is queued: on a plain TCP connection from this thread (writing while
        the network thread reads is safe there, and it saves a thread hop per batch); on
        TLS by waking the network thread (OpenSSL allows one thread at a time)."""
        direct = self._direct
        if direct is None:
            with self._lock:
                if not self._frames:
                    return
            self._wake()
            return
        with self._send_lock:
            if self._direct is not direct:  # lost meanwhile: the network thread takes over
                self._wake()
                return
            self._send_queued(direct)

    def _send_queued(self, sock: socket.socket) -> None:
        """Send every queued frame (caller holds _send_lock). A failure shuts the socket
        so the network thread notices, drops the connection and reconnects: a publish
        is resent from the in-flight record then, an acknowledgement is void anyway."""
        with self._lock:
            frames, self._frames = self._frames, []
        if not frames:
            return
        try:
            sock.sendall(b"".join(frames))
        except OSError:
            if threading.current_thread() is self._thread:
                raise
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)
            return
        self._last_sent = time.monotonic()

    def _wake(self) -> None:
        with contextlib.suppress(OSError):  # a full pair already holds a wake-up
            self._wake_write.send(b"\0")

    def start(self) -> None:
        """Connect (retrying an absent broker), then serve on a network thread."""
        sock = self._first_connection()
        self._thread = threading.Thread(
            target=self._run, args=(sock,), name=f"zeroline-mqtt-{self.role}", daemon=True
        )
        self._thread.start()

    def stop(self) -> None:
        """Send what is queued plus DISCONNECT, close, and end the network thread."""
        self.send(wire.DISCONNECT_FRAME)
        self._stopping.set()
        self._wake()  # the network thread, whichever way frames are sent
        if self._thread is not None:
            self._thread.join(CLOSE_TIMEOUT_S)
        self._wake_read.close()
        self._wake_write.close()

    # --- connecting -----------------------------------------------------------------------

    def _first_connection(self) -> socket.socket:
        s = self.settings
        delay = float(RECONNECT_MIN_S)
        while True:
            try:
                sock = self._open()
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
        try:
            self._handshake(sock)
        except _RefusedError as refusal:
            sock.close()
            raise BrokerError(str(refusal)) from None
        if self.subscriber:
            _log.info("connected to the broker %s:%d (MQTT %s)", s.host, s.port, s.protocol)
        return sock

    def _open(self) -> socket.socket:
        s = self.settings
        sock = socket.create_connection((s.host, s.port), timeout=CONNACK_TIMEOUT_S)
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        if self._tls is None:
            return sock
        try:
            return self._tls.wrap_socket(sock, server_hostname=s.host)
        except BaseException:
            sock.close()
            raise

    def _handshake(self, sock: socket.socket) -> None:
        """CONNECT, wait for CONNACK; _RefusedError with the reason if not accepted."""
        s = self.settings
        will = None if self.subscriber else wire.Will(s.status_topic, b"offline")
        frame = wire.connect(
            self.client_id,
            v5=self.v5,
            keepalive=s.keepalive,
            # Only the subscribing connection needs a session the broker keeps for us.
            clean=not self.subscriber,
            username=s.username,
            password=s.password if s.username else None,
            will=will,
            session_expiry=s.session_expiry if self.v5 and self.subscriber else None,
            receive_maximum=s.inflight if self.v5 and self.subscriber else None,
        )
        closed = (
            f"broker {s.host}:{s.port} closed the connection before accepting it "
            "({}); if it requires a client certificate give broker.tls.cert_file and "
            "key_file, otherwise check the TLS settings and credentials"
        )
        reader = wire.PacketReader(v5=self.v5)
        try:
            sock.settimeout(CONNACK_TIMEOUT_S)
            sock.sendall(frame)
            packets: list[wire.Packet] = []
            while not packets:
                data = self._receive(sock)
                if not data:
                    raise _RefusedError(closed.format("end of stream"))
                packets = reader.feed(data)
        except TimeoutError:
            raise _RefusedError(
                f"broker {s.host}:{s.port} accepted the connection but sent no CONNACK "
                f"within {CONNACK_TIMEOUT_S:.0f} s; is it an MQTT broker (and is TLS needed)?"
            ) from None
        except (OSError, wire.ProtocolError) as error:
            raise _RefusedError(closed.format(_describe(error))) from None
        connack = packets[0]
        if connack.kind != wire.CONNACK:
            raise _RefusedError(
                f"broker {s.host}:{s.port} answered CONNECT with packet type "
                f"{connack.kind}, not CONNACK"
            )
        if connack.reason:
            reason = wire.reason_text(connack.reason, v5=self.v5, connack=True)
            raise _RefusedError(
                f"broker {s.host}:{s.port} refused the connection: {reason}; check "
                "broker.username and the password (password_file/password_env)"
            )
        if self.v5:
            self.receive_maximum = wire.receive_maximum(connack.properties) or 65535
        sock.settimeout(max(5.0, float(s.keepalive)))
        with self._lock:  # frames of an earlier connection are void (acks above all)
            self.generation += 1
            self._frames = []
        first = self._on_up()
        with self._lock:  # before anything the owner queued meanwhile
            self._frames[:0] = first
        self.connected.set()
        self._reader = reader
        for packet in packets[1:]:
            self._dispatch(packet)

    # --- the network thread ---------------------------------------------------------------

    def _run(self, sock: socket.socket) -> None:
        while True:
            try:
                self._serve(sock)
            except (OSError, wire.ProtocolError) as error:
                if not self._stopping.is_set():
                    self._lost(error)
            with contextlib.suppress(OSError):
                sock.close()
            if self._stopping.is_set():
                return
            reconnected = self._reconnect()
            if reconnected is None:
                return
            sock = reconnected

    def _serve(self, sock: socket.socket) -> None:
        self._last_sent = time.monotonic()
        if not isinstance(sock, ssl.SSLSocket):
            self._direct = sock
        try:
            self._serve_loop(sock)
        finally:
            with self._send_lock:
                self._direct = None

    def _serve_loop(self, sock: socket.socket) -> None:
        reader = self._reader
        keepalive = float(self.settings.keepalive)
        poller = select.poll()
        poller.register(sock, select.POLLIN)
        poller.register(self._wake_read, select.POLLIN)
        wake_fd = self._wake_read.fileno()
        last_heard = time.monotonic()
        while True:
            with self._send_lock:
                self._send_queued(sock)
            if self._stopping.is_set():
                with self._send_lock:  # what stop() queued last (DISCONNECT)
                    self._send_queued(sock)
                return
            if isinstance(sock, ssl.SSLSocket) and sock.pending():
                events = [(sock.fileno(), select.POLLIN)]
            else:
                wait = max(0.0, self._last_sent + keepalive / 2 - time.monotonic())
                events = poller.poll(1000 * wait)
            readable = False
            for fd, _ in events:
                if fd == wake_fd:
                    with contextlib.suppress(OSError):
                        self._wake_read.recv(4096)
                else:
                    readable = True
            now = time.monotonic()
            if readable:
                data = self._receive(sock)
                if not data:
                    raise ConnectionError("the broker closed the connection")
                if QUICKACK is not None:
                    # Acknowledge at the TCP level now, not after the delayed-ACK timer (40
                    # ms): a broker with Nagle on (Mosquitto's default) holds its next small
                    # packet until the last one is acknowledged. On the input connection our
                    # PUBACKs wait for the journal, so nothing carries the ACK back; on the
                    # output connection the last PUBACK of a burst waited 40 ms, and with it
                    # every snapshot (it needs all outputs confirmed). Linux clears the flag
                    # after a while, hence once per read.
                    sock.setsockopt(socket.IPPROTO_TCP, QUICKACK, 1)
                last_heard = now
                for packet in reader.feed(data):
                    self._dispatch(packet)
            elif now - self._last_sent >= keepalive / 2:
                self.send(wire.PINGREQ_FRAME, wake=False)  # sent at the top of the loop
            if now - last_heard > 2 * keepalive:
                raise TimeoutError(f"no packet from the broker for {now - last_heard:.0f} s")

    def _receive(self, sock: socket.socket) -> bytes:
        """What the socket has, up to READ_BYTES; b"" at the end of the stream."""
        count = sock.recv_into(self._inbox)
        return self._inbox[:count].tobytes()

    def _dispatch(self, packet: wire.Packet) -> None:
        if packet.kind == wire.PINGRESP:
            return
        if packet.kind == wire.DISCONNECT:
            reason = wire.reason_text(packet.reason, v5=True)
            raise ConnectionError(f"the broker ended the session: {reason}")
        if packet.kind == wire.CONNACK:
            raise wire.ProtocolError("a second CONNACK")
        self._on_packet(packet)

    def _lost(self, error: BaseException) -> None:
        self.connected.clear()
        self._lost_at = time.monotonic()
        self._problems.warning(
            "disconnect",
            f"lost the broker connection ({self.role}: {_describe(error)}); "
            "reconnecting with backoff",
        )
        self._on_down()

    def _reconnect(self) -> socket.socket | None:
        s = self.settings
        delay = float(RECONNECT_MIN_S)
        while not self._stopping.wait(delay):
            try:
                sock = self._open()
            except OSError as error:
                self._problems.warning(
                    "reconnect",
                    f"broker {s.host}:{s.port} not reachable ({_describe(error)}); retrying",
                )
                delay = min(delay * 2, RECONNECT_MAX_S)
                continue
            try:
                self._handshake(sock)
            except _RefusedError as refusal:
                sock.close()
                self._problems.warning("refused", f"{refusal}; retrying")
                delay = min(delay * 2, RECONNECT_MAX_S)
                continue
            self.reconnects += 1
            if self._lost_at is not None:
                self.last_connect_s = time.monotonic() - self._lost_at
            _log.info(
                "reconnected to the broker (%s) after %.2f s",
                self.role,
                self.last_connect_s or 0.0,
            )
            return sock
        return None


def _describe(error: BaseException) -> str:
    if isinstance(error, ssl.SSLError):
        return f"TLS: {error.reason or error}"
    if isinstance(error, OSError) and error.strerror:
        return error.strerror
    return str(error) or type(error).__name__


class SocketBroker:
    """`BrokerLink` over `zeroline.mqtt_wire` (MQTT 5 or 3.1.1, TLS, password, persistent
    session).

    Two connections: `client_id` subscribes (persistent session, acknowledgements on
    request) and `client_id-out` publishes (outputs, status, last will). Why: when the
    daemon falls behind, the subscribing connection stops reading (the queue is full), and
    the broker's PUBACKs for our outputs would sit in the same socket behind thousands of
    unread readings; outputs then confirm slowly, commits wait, and the whole pipeline
    crawls (measured with the earlier paho-based link, 20,000 readings on 10 channels
    published at once, loopback, 2 cores: one connection drained them at 460-520
    readings/s, two connections at 970-1,040/s). A broker ACL must allow both client ids.
    """

    def __init__(self, settings: BrokerSettings) -> None:
        self.settings = settings
        self.v5 = settings.protocol == "5"
        self._on_message: MessageHandler = lambda message: None
        self._on_connect: ConnectHandler = lambda: None
        # Outbound bookkeeping, all under _lock: sequence numbers in publish order and
        # which are acknowledged; frames in flight by packet id (in sending order); what
        # waits for the window or the connection.
        self._lock = threading.Lock()
        self._sequence = 0
        self._unconfirmed: deque[int] = deque()
        self._acknowledged: set[int] = set()
        self._inflight: dict[int, tuple[int, bytes]] = {}
        self._waiting: deque[tuple[int, bytes, bytes, bool]] = deque()
        self._output_up = False
        self._packet_id = 0
        self._subscribe_id = 0
        self._subscriptions: dict[int, list[str]] = {}
        self._input = _Connection(
            settings,
            "input",
            settings.client_id,
            subscriber=True,
            on_up=self._input_up,
            on_packet=self._input_packet,
            on_down=lambda: None,
        )
        self._output = _Connection(
            settings,
            "output",
            f"{settings.client_id}-out",
            subscriber=False,
            on_up=self._output_up_frames,
            on_packet=self._output_packet,
            on_down=self._output_down,
        )

    @property
    def connected(self) -> threading.Event:
        return self._input.connected

    @property
    def reconnects(self) -> int:
        return self._input.reconnects

    # --- BrokerLink -----------------------------------------------------------------------

    def connect(self, on_message: MessageHandler, on_connect: ConnectHandler) -> None:
        self._on_message, self._on_connect = on_message, on_connect
        self._output.start()
        try:
            self._input.start()
        except BrokerError:
            self._output.stop()
            raise

    def subscribe(self, topics: Sequence[str]) -> None:
        if topics:
            self._input.send(self._subscription_frame(sorted(topics), wire.subscribe))

    def unsubscribe(self, topics: Sequence[str]) -> None:
        if topics:
            self._input.send(self._subscription_frame(list(topics), wire.unsubscribe))

    def publish(self, topic: str, payload: bytes, *, retain: bool = False) -> int:
        with self._lock:
            self._sequence += 1
            sequence = self._sequence
            self._unconfirmed.append(sequence)
            self._waiting.append((sequence, topic.encode(), payload, retain))
            frames = self._admit()
            if frames:  # sent at the next flush(): one wake-up per batch, not per output
                self._output.send(b"".join(frames), wake=False)
        return sequence

    def flush(self) -> None:
        self._output.wake()
        self._input.wake()

    def confirmed(self) -> int:
        with self._lock:
            unconfirmed, acknowledged = self._unconfirmed, self._acknowledged
            while unconfirmed and unconfirmed[0] in acknowledged:
                acknowledged.discard(unconfirmed.popleft())
            return unconfirmed[0] - 1 if unconfirmed else self._sequence

    def ack(self, token: Any) -> None:
        generation, packet_id, qos = token
        # A message received on an earlier connection will be (or was) redelivered with the
        # same packet id; acking the old delivery now could ack an unrelated later message.
        if qos > 0:  # sent at the next flush(), with the rest of the batch
            self._input.send(wire.puback(packet_id), generation, wake=False)

    def close(self) -> None:
        self._input.stop()
        if self._output.connected.is_set():
            sequence = self.publish(self.settings.status_topic, b"offline", retain=True)
            self.flush()
            deadline = time.monotonic() + CLOSE_TIMEOUT_S
            while self.confirmed() < sequence and time.monotonic() < deadline:
                time.sleep(0.005)
        # not connected any more: the last will says offline instead
        self._output.stop()

    # --- outbound window (callers hold _lock) ---------------------------------------------

    def _window(self) -> int:
        return max(1, min(self.settings.inflight, self._output.receive_maximum))

    def _admit(self) -> list[bytes]:
        """Move waiting publishes into flight while the window allows; their frames."""
        frames: list[bytes] = []
        if not self._output_up:
            return frames
        window, waiting, inflight = self._window(), self._waiting, self._inflight
        while waiting and len(inflight) < window:
            sequence, topic, payload, retain = waiting.popleft()
            packet_id = self._next_packet_id()
            frame = wire.publish(topic, payload, packet_id=packet_id, v5=self.v5, retain=retain)
            inflight[packet_id] = (sequence, frame)
            frames.append(frame)
        return frames

    def _next_packet_id(self) -> int:
        while True:
            self._packet_id = self._packet_id % 65535 + 1
            if self._packet_id not in self._inflight:
                return self._packet_id

    # --- callbacks from the connections' network threads ---------------------------------

    def _output_up_frames(self) -> list[bytes]:
        with self._lock:
            # Everything in flight on the old connection goes again, first and in order.
            frames = [wire.set_dup(frame) for _, frame in self._inflight.values()]
            self._sequence += 1  # the online status is tracked like any output
            self._unconfirmed.append(self._sequence)
            self._waiting.appendleft(
                (self._sequence, self.settings.status_topic.encode(), b"online", True)
            )
            self._output_up = True
            frames += self._admit()
        self._check_receive_maximum()
        return frames

    def _output_down(self) -> None:
        with self._lock:
            self._output_up = False

    def _output_packet(self, packet: wire.Packet) -> None:
        if packet.kind != wire.PUBACK:
            raise wire.ProtocolError(f"unexpected packet of type {packet.kind} on the output")
        if packet.reason >= 0x80:
            _log.warning("broker refused a publish: %s", wire.reason_text(packet.reason, v5=True))
        with self._lock:
            entry = self._inflight.pop(packet.packet_id, None)
            if entry is None:
                return  # a PUBACK for a resent duplicate
            self._acknowledged.add(entry[0])
            frames = self._admit()
            if frames:
                self._output.send(b"".join(frames))

    def _input_up(self) -> list[bytes]:
        self._on_connect()  # the service subscribes (through `subscribe`, queued here)
        return []

    def _input_packet(self, packet: wire.Packet) -> None:
        if packet.kind == wire.PUBLISH:
            qos = (packet.flags >> 1) & 3
            token = (self._input.generation, packet.packet_id, qos)
            self._on_message(Message(packet.topic, packet.payload, time.time(), token))
        elif packet.kind in (wire.SUBACK, wire.UNSUBACK):
            with self._lock:
                topics = self._subscriptions.pop(packet.packet_id, [])
            for topic, code in zip(topics, packet.codes, strict=False):
                if code >= 0x80:
                    reason = wire.reason_text(code, v5=self.v5) if self.v5 else "refused"
                    _log.warning("broker refused the subscription to %s: %s", topic, reason)

    def _subscription_frame(self, topics: list[str], encode: Callable[..., bytes]) -> bytes:
        with self._lock:
            self._subscribe_id = self._subscribe_id % 65535 + 1
            self._subscriptions[self._subscribe_id] = topics if encode is wire.subscribe else []
            return encode(self._subscribe_id, topics, v5=self.v5)

    def _check_receive_maximum(self) -> None:
        """Warn when the broker allows fewer of our publishes in flight than we use."""
        limit = self._output.receive_maximum
        if self.v5 and limit < self.settings.inflight:
            _log.warning(
                "the broker accepts at most %d QoS 1 messages in flight from us but "
                "broker.inflight is %d; using %d (raise the broker's limit, Mosquitto: "
                "max_inflight_messages, or lower broker.inflight)",
                limit,
                self.settings.inflight,
                limit,
            )
