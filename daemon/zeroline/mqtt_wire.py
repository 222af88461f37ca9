"""MQTT 3.1.1 and 5 control packets as bytes: what the daemon's own broker link sends and reads.

Only the packets a QoS 1 client needs: CONNECT/CONNACK, PUBLISH/PUBACK,
SUBSCRIBE/SUBACK, UNSUBSCRIBE/UNSUBACK, PINGREQ/PINGRESP and DISCONNECT (OASIS MQTT
Version 3.1.1, 2014, §2–3; MQTT Version 5.0, 2019, §2–3). Encoding is a few `bytes`
concatenations per packet and decoding works on a buffer holding many packets at once:
that is where the daemon gains over a general-purpose client, which reads each packet
with several system calls and keeps per-message Python objects (see `zeroline.mqtt`).

>>> frame = publish("a/b", b"1", packet_id=7, v5=False)
>>> frame.hex()
'32080003612f62000731'
>>> reader = PacketReader(v5=False)
>>> [(p.kind, p.topic, p.packet_id, p.payload) for p in reader.feed(frame)]
[(3, 'a/b', 7, b'1')]
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

CONNECT, CONNACK, PUBLISH, PUBACK = 1, 2, 3, 4
SUBSCRIBE, SUBACK, UNSUBSCRIBE, UNSUBACK = 8, 9, 10, 11
PINGREQ, PINGRESP, DISCONNECT = 12, 13, 14

# MQTT 5 property identifiers used here (§2.2.2.2)
SESSION_EXPIRY_INTERVAL = 0x11
RECEIVE_MAXIMUM = 0x21
REASON_STRING = 0x1F

MAX_REMAINING_LENGTH = 268_435_455  # four bytes of variable-length integer (§1.5.5)

CONNACK_REASONS_311 = {
    1: "unacceptable protocol version",
    2: "client identifier rejected",
    3: "server unavailable",
    4: "bad user name or password",
    5: "not authorized",
}
REASONS_V5 = {
    0x80: "unspecified error",
    0x81: "malformed packet",
    0x82: "protocol error",
    0x83: "implementation specific error",
    0x84: "unsupported protocol version",
    0x85: "client identifier not valid",
    0x86: "bad user name or password",
    0x87: "not authorized",
    0x88: "server unavailable",
    0x89: "server busy",
    0x8A: "banned",
    0x8B: "server shutting down",
    0x8C: "bad authentication method",
    0x8D: "keep alive timeout",
    0x8E: "session taken over",
    0x8F: "topic filter invalid",
    0x90: "topic name invalid",
    0x93: "receive maximum exceeded",
    0x95: "packet too large",
    0x97: "quota exceeded",
    0x99: "payload format invalid",
    0x9A: "retain not supported",
    0x9B: "QoS not supported",
    0x9C: "use another server",
    0x9D: "server moved",
    0x9F: "connection rate exceeded",
}
PINGREQ_FRAME = b"\xc0\x00"
DISCONNECT_FRAME = b"\xe0\x00"


class ProtocolError(Exception):
    """The broker sent something that is not valid MQTT: the connection must be dropped."""


def reason_text(code: int, *, v5: bool, connack: bool = False) -> str:
    """A reason or return code in words (`connack` picks the 3.1.1 CONNACK table)."""
    if not v5 and connack:
        return CONNACK_REASONS_311.get(code, f"return code {code}")
    return REASONS_V5.get(code, f"reason code 0x{code:02X}")


def _varint(value: int) -> bytes:
    if value < 128:
        return bytes((value,))
    out = bytearray()
    while True:
        byte, value = value & 0x7F, value >> 7
        out.append(byte | 0x80 if value else byte)
        if not value:
            return bytes(out)


def _string(text: str | bytes) -> bytes:
    data = text.encode() if isinstance(text, str) else text
    return struct.pack("!H", len(data)) + data


def _frame(first_byte: int, body: bytes) -> bytes:
    if len(body) > MAX_REMAINING_LENGTH:
        raise ValueError(f"an MQTT packet of {len(body)} bytes is too large")
    return bytes((first_byte,)) + _varint(len(body)) + body


@dataclass(frozen=True)
class Will:
    topic: str
    payload: bytes
    retain: bool = True


def connect(
    client_id: str,
    *,
    v5: bool,
    keepalive: int,
    clean: bool,
    username: str | None = None,
    password: str | None = None,
    will: Will | None = None,
    session_expiry: int | None = None,
    receive_maximum: int | None = None,
) -> bytes:
    """CONNECT (§3.1). The will is always QoS 1. `clean` is clean session (3.1.1) or
    clean start (5); `session_expiry` and `receive_maximum` are MQTT 5 properties."""
    flags = 0x02 if clean else 0
    if will is not None:
        flags |= 0x04 | (1 << 3) | (0x20 if will.retain else 0)
    if password is not None:
        flags |= 0x40
    if username is not None:
        flags |= 0x80
    body = _string("MQTT") + bytes((5 if v5 else 4, flags)) + struct.pack("!H", keepalive)
    if v5:
        properties = b""
        if session_expiry is not None:
            properties += bytes((SESSION_EXPIRY_INTERVAL,)) + struct.pack("!I", session_expiry)
        if receive_maximum is not None:
            properties += bytes((RECEIVE_MAXIMUM,)) + struct.pack("!H", receive_maximum)
        body += _varint(len(properties)) + properties
    body += _string(client_id)
    if will is not None:
        body += (b"\x00" if v5 else b"") + _string(will.topic) + _string(will.payload)
    if username is not None:
        body += _string(username)
    if password is not None:
        body += _string(password)
    return _frame(CONNECT << 4, body)


def publish(
    topic: str | bytes,
    payload: bytes,
    *,
    packet_id: int,
    v5: bool,
    retain: bool = False,
    dup: bool = False,
) -> bytes:
    """A QoS 1 PUBLISH (§3.3) with no properties."""
    topic_bytes = topic.encode() if isinstance(topic, str) else topic
    body = struct.pack("!H", len(topic_bytes)) + topic_bytes + struct.pack("!H", packet_id)
    if v5:
        body += b"\x00"
    body += payload
    first = 0x32 | (0x08 if dup else 0) | (0x01 if retain else 0)
    return _frame(first, body)


def set_dup(frame: bytes) -> bytes:
    """The same PUBLISH marked as a redelivery (DUP flag, §3.3.1.1)."""
    return bytes((frame[0] | 0x08,)) + frame[1:]


def puback(packet_id: int) -> bytes:
    """PUBACK (§3.4): success, so MQTT 5 may omit the reason code."""
    return b"\x40\x02" + struct.pack("!H", packet_id)


def subscribe(packet_id: int, topics: list[str], *, v5: bool) -> bytes:
    """SUBSCRIBE at QoS 1 for every filter (§3.8)."""
    body = struct.pack("!H", packet_id) + (b"\x00" if v5 else b"")
    for topic in topics:
        body += _string(topic) + b"\x01"
    return _frame(0x82, body)


def unsubscribe(packet_id: int, topics: list[str], *, v5: bool) -> bytes:
    """UNSUBSCRIBE (§3.10)."""
    body = struct.pack("!H", packet_id) + (b"\x00" if v5 else b"")
    for topic in topics:
        body += _string(topic)
    return _frame(0xA2, body)


class Packet:
    """One decoded packet from the broker; fields not used by its kind are left empty.

    A plain class with slots, not a frozen dataclass: one is made per message received,
    and a frozen dataclass's __init__ costs several times more."""

    __slots__ = (
        "codes",
        "flags",
        "kind",
        "packet_id",
        "payload",
        "properties",
        "reason",
        "session_present",
        "topic",
    )

    def __init__(
        self,
        kind: int,
        flags: int = 0,
        packet_id: int = 0,
        topic: str = "",
        payload: bytes = b"",
        reason: int = 0,
        session_present: bool = False,
        codes: bytes = b"",
        properties: bytes = b"",
    ) -> None:
        self.kind = kind
        self.flags = flags
        self.packet_id = packet_id
        self.topic = topic
        self.payload = payload
        self.reason = reason
        self.session_present = session_present
        self.codes = codes
        self.properties = properties

    def __repr__(self) -> str:
        return f"Packet(kind={self.kind}, packet_id={self.packet_id}, topic={self.topic!r})"


class PacketReader:
    """Splits a byte stream into packets; `feed` returns the complete ones so far."""

    def __init__(self, *, v5: bool, max_packet: int = MAX_REMAINING_LENGTH) -> None:
        self.v5 = v5
        self.max_packet = max_packet
        self._buffer = b""

    def feed(self, data: bytes) -> list[Packet]:
        buffer = self._buffer + data if self._buffer else data
        packets: list[Packet] = []
        start, end = 0, len(buffer)
        while end - start >= 2:
            length = buffer[start + 1]
            if length < 128:  # the common case, inline: a packet under 128 bytes
                header = 1
            else:
                length, header = _remaining_length(buffer, start + 1, end)
                if length < 0:
                    break  # the length itself is not complete yet
            if length > self.max_packet:
                raise ProtocolError(f"packet of {length} bytes exceeds {self.max_packet}")
            body_start = start + 1 + header
            if end - body_start < length:
                break
            packets.append(self._decode(buffer[start], buffer[body_start : body_start + length]))
            start = body_start + length
        self._buffer = buffer[start:]
        return packets

    def _decode(self, first: int, body: bytes) -> Packet:
        kind, flags = first >> 4, first & 0x0F
        try:
            if kind == PUBLISH:
                return self._publish(flags, body)
            if kind in (PUBACK, UNSUBACK, SUBACK):
                return self._acknowledgement(kind, body)
            if kind == CONNACK:
                properties = body[2:] if self.v5 else b""
                return Packet(
                    CONNACK,
                    reason=body[1],
                    session_present=bool(body[0] & 1),
                    properties=_property_block(properties) if properties else b"",
                )
            if kind == DISCONNECT:
                return Packet(DISCONNECT, reason=body[0] if body else 0)
            if kind == PINGRESP:
                return Packet(PINGRESP)
        except (IndexError, struct.error) as error:
            raise ProtocolError(f"malformed packet of type {kind} ({error})") from None
        raise ProtocolError(f"unexpected packet of type {kind} from the broker")

    def _publish(self, flags: int, body: bytes) -> Packet:
        (topic_length,) = struct.unpack_from("!H", body)
        raw_topic = body[2 : 2 + topic_length]
        position = 2 + topic_length
        qos = (flags >> 1) & 3
        packet_id = 0
        if qos:
            (packet_id,) = struct.unpack_from("!H", body, position)
            position += 2
        if qos > 1:
            raise ProtocolError("QoS 2 delivery on a QoS 1 subscription")
        if self.v5:
            length, size = _remaining_length(body, position, len(body))
            if length < 0:
                raise ProtocolError("PUBLISH properties cut short")
            position += size + length
        if position > len(body):
            raise ProtocolError("PUBLISH shorter than its header")
        try:
            topic = raw_topic.decode()
        except UnicodeDecodeError:
            topic = raw_topic.decode("utf-8", "replace")
        return Packet(PUBLISH, flags, packet_id, topic, body[position:])

    def _acknowledgement(self, kind: int, body: bytes) -> Packet:
        (packet_id,) = struct.unpack_from("!H", body)
        if kind == PUBACK:
            reason = body[2] if self.v5 and len(body) > 2 else 0
            return Packet(PUBACK, packet_id=packet_id, reason=reason)
        rest = body[2:]
        if self.v5:
            length, size = _remaining_length(rest, 0, len(rest))
            rest = rest[size + length :]
        return Packet(kind, packet_id=packet_id, codes=rest)


def _remaining_length(buffer: bytes, position: int, end: int) -> tuple[int, int]:
    """(value, bytes used) of the variable-length integer at `position`; (-1, 0) if cut."""
    value, shift, used = 0, 0, 0
    while position + used < end:
        byte = buffer[position + used]
        value |= (byte & 0x7F) << shift
        used += 1
        if not byte & 0x80:
            return value, used
        shift += 7
        if used == 4:
            raise ProtocolError("variable-length integer longer than four bytes")
    return -1, 0


def _property_block(data: bytes) -> bytes:
    length, size = _remaining_length(data, 0, len(data))
    return data[size : size + length] if length >= 0 else b""


def receive_maximum(properties: bytes) -> int | None:
    """The Receive Maximum in a CONNACK's properties (None: absent, meaning 65,535)."""
    position = 0
    while position < len(properties):
        identifier = properties[position]
        position += 1
        if identifier == RECEIVE_MAXIMUM:
            return int(struct.unpack_from("!H", properties, position)[0])
        position += _property_size(identifier, properties, position)
    return None


def _property_size(identifier: int, data: bytes, position: int) -> int:
    """Bytes taken by the value of property `identifier` at `position` (MQTT 5 §2.2.2.2)."""
    if identifier in (0x01, 0x17, 0x19, 0x24, 0x25, 0x28, 0x29, 0x2A):
        return 1
    if identifier in (0x13, 0x21, 0x22, 0x23):
        return 2
    if identifier in (0x02, 0x11, 0x18, 0x27):
        return 4
    if identifier == 0x0B:
        return _remaining_length(data, position, len(data))[1]
    if identifier == 0x26:  # user property: two strings
        first = 2 + int(struct.unpack_from("!H", data, position)[0])
        return first + 2 + int(struct.unpack_from("!H", data, position + first)[0])
    if identifier in (0x03, 0x08, 0x09, 0x12, 0x15, 0x16, 0x1A, 0x1C, 0x1F):
        return 2 + int(struct.unpack_from("!H", data, position)[0])
    raise ProtocolError(f"unknown MQTT 5 property 0x{identifier:02X}")
