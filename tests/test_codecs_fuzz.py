"""Fuzz tests for zeroline.codecs: whatever the bytes, a decoder returns sound readings or
raises DecodeError with a documented reason, and never anything else.

Hypothesis runs derandomized (a fixed seed) with a bounded number of examples, so this file
is reproducible and takes a few seconds.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import operator
import re
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from zeroline.codecs import REASONS, DecodeLimits, Decoder, Reading, make_decoder
from zeroline.errors import DecodeError

ARRIVAL = 1777636800.0  # 2026-05-01T12:00:00Z
LIMITS = DecodeLimits()
SENML_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9:./_-]*")

FUZZ = settings(
    max_examples=300,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)
#: For the structured strategies, whose generation (not decoding) costs ~5 ms an example.
FUZZ_STRUCTURED = settings(FUZZ, max_examples=200)

DECODERS: dict[str, Decoder] = {
    "json": make_decoder("json"),
    "json_ms": make_decoder("json", time_unit="ms", time_field="ts", value_field="v"),
    "senml": make_decoder("senml"),
    "number": make_decoder("number"),
}


def outcome(decoder: Decoder, payload: bytes, arrival: float = ARRIVAL) -> list[Reading] | None:
    """Decode `payload` and check every promise the decoder makes, whichever way it ends.

    Returns the readings, or None when the payload was rejected (with a DecodeError whose
    reason is documented and whose detail is one short line).
    """
    try:
        readings = decoder.decode(payload, arrival)
    except DecodeError as error:
        assert error.reason in REASONS
        assert error.detail and "\n" not in error.detail and len(error.detail) < 500
        return None
    assert isinstance(readings, list) and readings
    for reading in readings:
        assert isinstance(reading, Reading)
        assert math.isfinite(reading.time)
        assert -LIMITS.max_past_s <= reading.time - arrival <= LIMITS.max_future_s
        assert reading.value is None or (
            type(reading.value) is float and math.isfinite(reading.value)
        )
        assert all(type(v) is float and math.isfinite(v) for v in reading.fields.values())
        assert reading.value is not None or reading.fields
        assert reading.name is None or SENML_NAME.fullmatch(reading.name)
        assert reading.unit is None or (isinstance(reading.unit, str) and reading.unit)
    return readings


# ----------------------------------------------------------------------------- strategies

scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(),
    st.floats(),
    st.text(max_size=12),
)
json_values = st.recursive(
    scalars,
    lambda children: st.one_of(
        st.lists(children, max_size=4),
        st.dictionaries(st.text(max_size=6), children, max_size=4),
    ),
    max_leaves=16,
)


def _rfc3339(moment: dt.datetime, offset_minutes: int) -> str:
    zone = dt.timezone(dt.timedelta(minutes=offset_minutes))
    return moment.replace(tzinfo=zone).isoformat()


rfc3339_texts = st.builds(
    _rfc3339,
    st.datetimes(min_value=dt.datetime(1, 1, 2), max_value=dt.datetime(9999, 12, 30)),
    st.integers(min_value=-1439, max_value=1439),
)
times = st.one_of(
    st.floats(min_value=ARRIVAL - 4e8, max_value=ARRIVAL + 2e5),  # seconds, in and out of window
    st.floats(min_value=(ARRIVAL - 4e8) * 1e3, max_value=(ARRIVAL + 2e5) * 1e3),  # milliseconds
    st.integers(min_value=-(2**70), max_value=2**70),
    rfc3339_texts,
    scalars,
)
json_objects = st.dictionaries(
    st.one_of(
        st.sampled_from(["time", "value", "ts", "v", "check_value", "temp"]), st.text(max_size=6)
    ),
    st.one_of(times, json_values),
    max_size=6,
)

_ALNUM = "abcXYZ019"
valid_senml_names = st.builds(
    operator.add, st.sampled_from(_ALNUM), st.text(alphabet=_ALNUM + "-:./_", max_size=8)
)
numbers = st.one_of(st.integers(), st.floats())


def _typed_fields(
    names: st.SearchStrategy[str], versions: st.SearchStrategy[int], units: st.SearchStrategy[str]
) -> st.SearchStrategy[dict[str, Any]]:
    """Optional SenML labels, each with its right JSON type but any content drawn from the
    given names, versions and units (plus huge and non-finite numbers for the numbers)."""
    return st.fixed_dictionaries(
        {},
        optional={
            "bn": names,
            "bt": st.one_of(
                st.floats(min_value=ARRIVAL - 1e6, max_value=ARRIVAL + 1e5),
                st.floats(min_value=-1e6, max_value=1e6),
                numbers,
            ),
            "bu": units,
            "bv": numbers,
            "bver": versions,
            "n": names,
            "u": units,
            "t": st.one_of(st.floats(min_value=-1e5, max_value=1e5), numbers),
            "ut": numbers,
            "extra": json_values,
        },
    )


_value_fields = st.one_of(
    st.fixed_dictionaries({"v": numbers}),
    st.fixed_dictionaries({"v": st.floats(min_value=-1e6, max_value=1e6)}),
    st.fixed_dictionaries({"vs": st.text(max_size=5)}),
    st.fixed_dictionaries({"vb": st.booleans()}),
    st.fixed_dictionaries({"vd": st.text(max_size=5)}),
    st.fixed_dictionaries({"s": numbers}),
    st.just({}),
)
#: Records with the right JSON type for every label and at most one value field: either
#: valid names, versions and units (so whole packs decode), or any of them.
plausible_records = st.builds(
    lambda fields, value: {**fields, **value},
    _typed_fields(
        valid_senml_names,
        st.integers(min_value=1, max_value=10),
        st.sampled_from(["Cel", "V", "%RH", "lon", ""]),
    ),
    _value_fields,
)
well_typed_records = st.builds(
    lambda fields, value: {**fields, **value},
    _typed_fields(
        st.text(max_size=8),
        st.integers(min_value=-2, max_value=12),
        st.sampled_from(["Cel", "", "\ud800"]),
    ),
    _value_fields,
)
#: Records where any label may hold any JSON value, "must understand" labels included.
any_typed_records = st.fixed_dictionaries(
    {},
    optional={
        label: st.one_of(numbers, scalars, json_values)
        for label in (
            "bn",
            "bt",
            "bu",
            "bv",
            "bs",
            "bver",
            "n",
            "u",
            "v",
            "vs",
            "vb",
            "vd",
            "s",
            "t",
            "ut",
            "x_",
        )
    },
)
senml_records = st.one_of(plausible_records, well_typed_records, any_typed_records)
senml_packs = st.one_of(
    st.lists(plausible_records, min_size=1, max_size=6),
    st.lists(senml_records, max_size=6),
)  # (a record not wrapped in a pack, and any other JSON, is in test_arbitrary_json)


def encode(value: Any) -> bytes:
    """JSON text as a logger would send it (NaN/Infinity allowed, as Python writes them)."""
    return json.dumps(value).encode("utf-8")


# ----------------------------------------------------------------------------- fuzz


class TestNeverRaisesAnythingElse:
    """No input makes a decoder raise anything but DecodeError, or return unsound readings."""

    @FUZZ
    @given(payload=st.binary(max_size=200))
    def test_arbitrary_bytes(self, payload: bytes) -> None:
        """Arbitrary bytes, through every decoder."""
        for decoder in DECODERS.values():
            outcome(decoder, payload)

    @FUZZ_STRUCTURED
    @given(value=json_values)
    def test_arbitrary_json(self, value: Any) -> None:
        """Any JSON value, through every decoder."""
        for decoder in DECODERS.values():
            outcome(decoder, encode(value))

    @FUZZ_STRUCTURED
    @given(
        batch=st.one_of(json_objects, st.lists(json_objects, max_size=5)),
        arrival=st.sampled_from([ARRIVAL, 0.0, 1e10]),
    )
    def test_object_shaped_json(self, batch: Any, arrival: float) -> None:
        """Objects and batches with plausible and implausible times, values and fields."""
        outcome(DECODERS["json"], encode(batch), arrival)
        outcome(DECODERS["json_ms"], encode(batch), arrival)

    @FUZZ_STRUCTURED
    @given(pack=senml_packs)
    def test_senml_shaped_records(self, pack: Any) -> None:
        """SenML-shaped packs with every label, right and wrong types mixed."""
        outcome(DECODERS["senml"], encode(pack))

    @FUZZ
    @given(text=st.text(alphabet="0123456789+-.eE \t\n_xnaifINF", max_size=20))
    def test_number_like_text(self, text: str) -> None:
        """Text made of number-ish characters, through the number decoder."""
        outcome(DECODERS["number"], text.encode())

    @FUZZ_STRUCTURED
    @given(payload=json_values.map(encode), cut=st.integers(min_value=0, max_value=200))
    def test_truncated_json(self, payload: bytes, cut: int) -> None:
        """JSON cut off anywhere, as a broken link would deliver it."""
        for kind in ("json", "senml"):
            outcome(DECODERS[kind], payload[:cut])


# ----------------------------------------------------------------------------- round trips


class TestRoundTrips:
    """Well-formed payloads decode to exactly what was sent."""

    @FUZZ
    @given(
        value=st.floats(allow_nan=False, allow_infinity=False),
        offset=st.floats(min_value=-3e8, max_value=8e4, allow_nan=False),
        temp=st.floats(allow_nan=False, allow_infinity=False),
    )
    def test_json_object(self, value: float, offset: float, temp: float) -> None:
        """A finite value, a time in the window and a field come back unchanged."""
        time = ARRIVAL + offset
        [reading] = DECODERS["json"].decode(
            encode({"time": time, "value": value, "t": temp}), ARRIVAL
        )
        assert reading == Reading(time, value, {"t": temp})

    @FUZZ
    @given(value=st.floats(allow_nan=False, allow_infinity=False))
    def test_number(self, value: float) -> None:
        """repr of any finite float decodes to the same float."""
        [reading] = DECODERS["number"].decode(repr(value).encode(), ARRIVAL)
        assert reading.value == value and reading.time == ARRIVAL

    @FUZZ
    @given(
        prefix=valid_senml_names.map(lambda name: name + ":"),
        records=st.lists(
            st.tuples(
                st.text(alphabet="abc019_", min_size=1, max_size=6),
                st.integers(min_value=-86400, max_value=86400),
                st.integers(min_value=-(10**9), max_value=10**9),
            ),
            min_size=1,
            max_size=8,
        ),
        base_time=st.integers(min_value=-86400, max_value=86400),
        base_value=st.integers(min_value=-1000, max_value=1000),
    )
    def test_senml_base_fields_are_transparent(
        self, prefix: str, records: list[tuple[str, int, int]], base_time: int, base_value: int
    ) -> None:
        """Moving a common name prefix, time and value into bn/bt/bv resolves to the same readings.

        A metamorphic check of RFC 8428 §4.1 and §4.6 resolution (integers keep it exact).
        """
        start = int(ARRIVAL)
        resolved = [
            {"n": prefix + name, "t": start + t, "v": v, "u": "Cel"} for name, t, v in records
        ]
        with_bases: list[dict[str, Any]] = [
            {"n": name, "t": start + t - base_time, "v": v - base_value} for name, t, v in records
        ]
        with_bases[0].update(bn=prefix, bt=base_time, bv=base_value, bu="Cel")
        expected = DECODERS["senml"].decode(encode(resolved), ARRIVAL)
        assert DECODERS["senml"].decode(encode(with_bases), ARRIVAL) == expected
        assert [(r.name, r.time, r.value) for r in expected] == [
            (prefix + name, float(start + t), float(v)) for name, t, v in records
        ]


# --- the fast parser against the json module ---------------------------------------------

json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.integers(-(2**63), 2**63 - 1)
    | st.text(),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(), inner, max_size=4),
    max_leaves=12,
)
number_texts = st.from_regex(
    r"-?(0|[1-9][0-9]{0,24})(\.[0-9]{1,25})?([eE][-+]?[0-9]{1,3})?", fullmatch=True
)


@FUZZ
@given(value=json_values)
def test_fast_parse_equals_json_module_on_documents(value: Any) -> None:
    """orjson (the fast path of `_parse_json`) and the json module (the reference, and the
    fallback) read the same document from the same text, number types included."""
    from zeroline.codecs import _parse_json

    text = json.dumps(value)
    assert repr(_parse_json(text.encode(), 10**6)) == repr(json.loads(text))


@FUZZ
@given(number=number_texts)
def test_fast_parse_equals_json_module_on_numbers(number: str) -> None:
    """Every JSON number text: the same float or int, or, beyond a double, the same error
    path (orjson refuses it, the json module reads inf and the decoder calls it non-finite)."""
    from zeroline.codecs import _parse_json

    expected = json.loads(number)
    if isinstance(expected, int) and not -(2**63) <= expected < 2**64:
        expected = float(expected)  # documented: beyond 64 bits orjson gives a float
    assert repr(_parse_json(number.encode(), 10**6)) == repr(expected)
