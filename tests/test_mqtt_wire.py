"""The MQTT packet codec against the OASIS specifications' own byte layouts.

Sources: OASIS MQTT Version 3.1.1 (2014) §1.5.3 (strings), §2.2.3 and Table 2.4 (the
variable-length integer and its bounds), §3.1 (CONNECT, incl. the example variable header of
Figure 3.7), §3.3 (PUBLISH), §3.8 (SUBSCRIBE); MQTT Version 5.0 (2019) §2.2.2 (properties),
§3.2.2.3 (CONNACK properties).
"""

from __future__ import annotations

import itertools
import struct

import pytest
from hypothesis import given
from hypothesis import strategies as st

from zeroline import mqtt_wire as wire


@pytest.mark.parametrize(
    ("value", "encoded"),
    # Table 2.4 of MQTT 3.1.1: the first and last value of each length
    [
        (0, "00"),
        (127, "7f"),
        (128, "8001"),
        (16_383, "ff7f"),
        (16_384, "808001"),
        (2_097_151, "ffff7f"),
        (2_097_152, "80808001"),
        (268_435_455, "ffffff7f"),
    ],
)
def test_variable_length_integer_matches_the_table(value: int, encoded: str) -> None:
    assert wire._varint(value).hex() == encoded
    assert wire._remaining_length(bytes.fromhex(encoded), 0, len(encoded) // 2) == (
        value,
        len(encoded) // 2,
    )


def test_a_fifth_length_byte_is_a_protocol_error() -> None:
    with pytest.raises(wire.ProtocolError, match="longer than four bytes"):
        wire.PacketReader(v5=False).feed(bytes.fromhex("30ffffffff01"))


def test_connect_variable_header_is_the_specification_example() -> None:
    """Figure 3.7 of MQTT 3.1.1: 'MQTT', level 4, flags 0xCE (user name, password, will
    QoS 1, will flag, clean session), keep alive 10."""
    frame = wire.connect(
        "c",
        v5=False,
        keepalive=10,
        clean=True,
        username="u",
        password="p",
        will=wire.Will("w", b"x", retain=False),
    )
    assert frame[0] == 0x10
    header = frame[2:12]
    assert header.hex() == "00044d51545404ce000a"
    payload = frame[12:]
    assert payload == b"\x00\x01c" + b"\x00\x01w" + b"\x00\x01x" + b"\x00\x01u" + b"\x00\x01p"


def test_connect_v5_carries_session_expiry_and_receive_maximum() -> None:
    frame = wire.connect(
        "id", v5=True, keepalive=60, clean=False, session_expiry=604_800, receive_maximum=50
    )
    assert frame[2:10] == b"\x00\x04MQTT\x05\x00"  # level 5, no flags: a persistent session
    properties = frame[12:]
    length = properties[0]
    block = properties[1 : 1 + length]
    assert block == b"\x11" + struct.pack("!I", 604_800) + b"\x21" + struct.pack("!H", 50)
    assert properties[1 + length :] == b"\x00\x02id"


def test_publish_layout_and_flags() -> None:
    frame = wire.publish("a/b", b"hello", packet_id=10, v5=True, retain=True)
    # QoS 1 (bits 1-2), retain (bit 0); topic, packet id, empty properties, payload
    assert frame[0] == 0x33
    assert frame[2:] == b"\x00\x03a/b" + b"\x00\x0a" + b"\x00" + b"hello"
    assert frame[1] == len(frame) - 2
    assert wire.set_dup(frame)[0] == 0x3B
    assert wire.set_dup(frame)[1:] == frame[1:]


def test_subscribe_is_qos1_per_filter() -> None:
    frame = wire.subscribe(3, ["a/+", "b/#"], v5=False)
    assert frame[0] == 0x82  # reserved flags 0010 (§3.8.1)
    assert frame[2:] == b"\x00\x03" + b"\x00\x03a/+\x01" + b"\x00\x03b/#\x01"


def _publish_v5_with_properties(topic: bytes, payload: bytes, packet_id: int) -> bytes:
    # message expiry interval (0x02, four bytes) and a user property (0x26, two strings)
    properties = b"\x02\x00\x00\x00\x3c" + b"\x26\x00\x01k\x00\x02vv"
    body = (
        struct.pack("!H", len(topic))
        + topic
        + struct.pack("!H", packet_id)
        + bytes((len(properties),))
        + properties
        + payload
    )
    return bytes((0x32,)) + wire._varint(len(body)) + body


def test_reader_skips_publish_properties() -> None:
    frame = _publish_v5_with_properties(b"x/y", b"42", 9)
    [packet] = wire.PacketReader(v5=True).feed(frame)
    assert (packet.topic, packet.packet_id, packet.payload) == ("x/y", 9, b"42")


def test_reader_rejects_qos2_and_unknown_types() -> None:
    qos2 = bytes((0x34,)) + b"\x05\x00\x01a\x00\x01"
    with pytest.raises(wire.ProtocolError, match="QoS 2"):
        wire.PacketReader(v5=False).feed(qos2)
    with pytest.raises(wire.ProtocolError, match="unexpected packet of type 1"):
        wire.PacketReader(v5=False).feed(b"\x10\x00")


def test_connack_receive_maximum_after_other_properties() -> None:
    # reason string (0x1F), then receive maximum (0x21) = 20
    properties = b"\x1f\x00\x02ok" + b"\x21\x00\x14"
    frame = b"\x20" + bytes((3 + len(properties),)) + b"\x01\x00" + bytes((len(properties),))
    [packet] = wire.PacketReader(v5=True).feed(frame + properties)
    assert packet.kind == wire.CONNACK and packet.session_present and packet.reason == 0
    assert wire.receive_maximum(packet.properties) == 20


def test_puback_reason_codes() -> None:
    reader = wire.PacketReader(v5=True)
    [ok, refused] = reader.feed(wire.puback(5) + b"\x40\x03\x00\x06\x87")
    assert (ok.packet_id, ok.reason) == (5, 0)
    assert (refused.packet_id, refused.reason) == (6, 0x87)
    assert wire.reason_text(0x87, v5=True) == "not authorized"
    assert wire.reason_text(4, v5=False, connack=True) == "bad user name or password"


@given(
    messages=st.lists(
        st.tuples(
            st.text(min_size=1, max_size=30).filter(lambda t: "\x00" not in t),
            st.binary(max_size=300),
            st.integers(1, 65535),
        ),
        min_size=1,
        max_size=20,
    ),
    cuts=st.lists(st.integers(0, 10_000), max_size=10),
    v5=st.booleans(),
)
def test_any_split_of_the_stream_gives_the_same_packets(
    messages: list[tuple[str, bytes, int]], cuts: list[int], v5: bool
) -> None:
    stream = b"".join(wire.publish(t, p, packet_id=i, v5=v5) for t, p, i in messages)
    points = sorted({c % (len(stream) + 1) for c in cuts} | {0, len(stream)})
    reader = wire.PacketReader(v5=v5)
    packets = []
    for start, end in itertools.pairwise(points):
        packets += reader.feed(stream[start:end])
    assert [(p.topic, p.payload, p.packet_id) for p in packets] == messages
