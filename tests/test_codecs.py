"""Tests for zeroline.codecs: payload bytes to readings, or one DecodeError with a stable reason."""

from __future__ import annotations

import datetime as dt
import json
import random
import re
from typing import ClassVar

import pytest

import zeroline.codecs as codecs
from zeroline.codecs import REASONS, DecodeLimits, Reading, make_decoder, parse_rfc3339
from zeroline.errors import ConfigError, DecodeError

#: A fixed arrival time for the tests: 2026-05-01T12:00:00Z.
ARRIVAL = 1777636800.0


def decode(
    kind: str, payload: bytes | str, arrival: float = ARRIVAL, **options: object
) -> list[Reading]:
    """Decode `payload` with a fresh decoder of `kind` (options passed to make_decoder)."""
    data = payload.encode() if isinstance(payload, str) else payload
    return make_decoder(kind, **options).decode(data, arrival)  # type: ignore[arg-type]


def reason_of(kind: str, payload: bytes | str, arrival: float = ARRIVAL, **options: object) -> str:
    """The DecodeError reason `payload` gets; fails the test if it decodes."""
    with pytest.raises(DecodeError) as caught:
        decode(kind, payload, arrival, **options)
    return caught.value.reason


class TestMakeDecoder:
    """make_decoder validates its configuration once, with ConfigError."""

    def test_unknown_kind_names_the_three_kinds(self) -> None:
        """An unknown kind is a ConfigError that lists json, senml and number."""
        with pytest.raises(ConfigError, match="json, senml, number"):
            make_decoder("xml")

    def test_unknown_time_unit(self) -> None:
        """time_unit must be auto, s or ms."""
        with pytest.raises(ConfigError, match="auto, s, ms"):
            make_decoder("json", time_unit="us")

    @pytest.mark.parametrize("kind", ["senml", "number"])
    @pytest.mark.parametrize(
        "option", [{"time_field": "ts"}, {"value_field": "v"}, {"time_unit": "ms"}]
    )
    def test_json_options_rejected_for_other_kinds(self, kind: str, option: dict[str, str]) -> None:
        """json-only options on senml/number are an error, not silently ignored."""
        with pytest.raises(ConfigError, match="only applies to payload 'json'"):
            make_decoder(kind, **option)  # type: ignore[arg-type]

    def test_same_time_and_value_field(self) -> None:
        """time_field and value_field must differ."""
        with pytest.raises(ConfigError, match="different fields"):
            make_decoder("json", time_field="x", value_field="x")

    @pytest.mark.parametrize(
        "limits",
        [
            DecodeLimits(max_bytes=0),
            DecodeLimits(max_records=0),
            DecodeLimits(max_past_s=0),
            DecodeLimits(max_future_s=-1),
        ],
    )
    def test_bad_limits(self, limits: DecodeLimits) -> None:
        """Limits that would reject everything are a ConfigError."""
        with pytest.raises(ConfigError, match="limits"):
            make_decoder("json", limits=limits)

    def test_decoders_satisfy_the_protocol(self) -> None:
        """Every kind builds an object with a decode(payload, arrival) method."""
        for kind in codecs.KINDS:
            assert callable(make_decoder(kind).decode)
            assert kind in repr(make_decoder(kind))


class TestJsonObject:
    """A single {"time": ..., "value": ...} object."""

    def test_value_and_fields(self) -> None:
        """The value is the main value; other finite numbers become fields."""
        [reading] = decode(
            "json",
            '{"time": 1777636800, "value": 12.5, "check_value": 0.0, "temp": 21, '
            '"site": "north", "ok": true, "spare": null, "probe": {"x": 1}, "bad": NaN}',
        )
        assert reading == Reading(1777636800.0, 12.5, {"check_value": 0.0, "temp": 21.0})
        assert type(reading.fields["temp"]) is float
        assert reading.name is None and reading.unit is None

    def test_fields_are_read_only(self) -> None:
        """A Reading's fields cannot be changed after decoding."""
        [reading] = decode("json", '{"value": 1, "temp": 2}')
        with pytest.raises(TypeError):
            reading.fields["temp"] = 3.0  # type: ignore[index]

    def test_missing_time_is_arrival(self) -> None:
        """Without a time field the arrival time is used."""
        [reading] = decode("json", '{"value": -3}', arrival=ARRIVAL + 0.5)
        assert reading.time == ARRIVAL + 0.5
        assert reading.value == -3.0

    def test_configurable_field_names(self) -> None:
        """time_field/value_field name the fields, and the time field never becomes a field."""
        [reading] = decode(
            "json", '{"ts": 1777636800, "no2": 7, "time": 5}', time_field="ts", value_field="no2"
        )
        assert (reading.time, reading.value, dict(reading.fields)) == (ARRIVAL, 7.0, {"time": 5.0})

    def test_only_fields_gives_value_none(self) -> None:
        """A zero-check payload that only carries check_value decodes with value None."""
        [reading] = decode("json", '{"time": 1777636800, "check_value": 0.25}')
        assert reading.value is None
        assert dict(reading.fields) == {"check_value": 0.25}

    def test_null_value_reads_as_absent(self) -> None:
        """ "value": null with a numeric field is value None; alone it is missing_value."""
        [reading] = decode("json", '{"value": null, "check_value": 1}')
        assert reading.value is None
        assert reason_of("json", '{"value": null}') == "missing_value"

    @pytest.mark.parametrize("value", ['"21.5"', "true", "false", "[1]", '{"v": 1}'])
    def test_value_must_be_a_number(self, value: str) -> None:
        """Strings, booleans, arrays and objects are not values."""
        assert reason_of("json", '{"value": ' + value + "}") == "value_not_number"

    @pytest.mark.parametrize("value", ["NaN", "Infinity", "-Infinity", "1e999", "9" * 400])
    def test_value_must_be_finite(self, value: str) -> None:
        """NaN, infinities and numbers beyond float range are non_finite."""
        assert reason_of("json", '{"value": ' + value + "}") == "non_finite"

    def test_big_integer_field_is_ignored(self) -> None:
        """A field too large for a float is dropped like any other non-finite field."""
        [reading] = decode("json", '{"value": 1, "big": ' + ("9" * 400) + "}")
        assert dict(reading.fields) == {}


class TestJsonTime:
    """Epoch seconds, epoch milliseconds and RFC 3339 text."""

    @pytest.mark.parametrize(
        ("raw", "expected"),
        [
            ("1777636800", ARRIVAL),
            ("1777636800.25", ARRIVAL + 0.25),
            ("1777636800250", ARRIVAL + 0.25),
            ("1.77763680025e12", ARRIVAL + 0.25),
            ('"2026-05-01T12:00:00Z"', ARRIVAL),
            ('"2026-05-01T14:00:00.250+02:00"', ARRIVAL + 0.25),
        ],
    )
    def test_auto_unit(self, raw: str, expected: float) -> None:
        """auto: numbers above 1e11 are milliseconds, strings are RFC 3339."""
        [reading] = decode("json", '{"time": ' + raw + ', "value": 1}')
        assert reading.time == pytest.approx(expected, abs=1e-6)

    def test_auto_threshold(self) -> None:
        """1e11 itself is seconds (year 5138), the next number up is milliseconds."""
        assert codecs._time_auto(1e11) == 1e11
        assert codecs._time_auto(100000000001) == pytest.approx(100000000.001)

    def test_explicit_milliseconds(self) -> None:
        """time_unit ms divides every number by 1000, even small ones."""
        [reading] = decode("json", '{"time": 1777636800000, "value": 1}', time_unit="ms")
        assert reading.time == ARRIVAL
        assert codecs._time_milliseconds(5000) == 5.0

    def test_explicit_seconds_hints_at_milliseconds(self) -> None:
        """time_unit s takes ms timestamps as seconds, far in the future, and says so."""
        with pytest.raises(DecodeError, match="looks like milliseconds") as caught:
            decode("json", '{"time": 1777636800000, "value": 1}', time_unit="s")
        assert caught.value.reason == "time_in_future"

    def test_strings_are_rfc3339_in_every_unit(self) -> None:
        """An RFC 3339 string is absolute whatever the numeric time unit is."""
        for unit in codecs.TIME_UNITS:
            [reading] = decode(
                "json", '{"time": "2026-05-01T12:00:00Z", "value": 1}', time_unit=unit
            )
            assert reading.time == ARRIVAL

    @pytest.mark.parametrize("raw", ['"1777636800"', "true", "null", "[]", "{}", "1e999"])
    def test_bad_time(self, raw: str) -> None:
        """Numeric strings, booleans, null, containers and infinity are bad_time."""
        assert reason_of("json", '{"time": ' + raw + ', "value": 1}') == "bad_time"

    def test_time_window(self) -> None:
        """More than a day ahead or ten years behind arrival is rejected; the edges are fine."""
        day, ten_years = 86400.0, 10 * 365.25 * 86400
        assert decode("json", at(ARRIVAL + day))[0].time == ARRIVAL + day
        assert reason_of("json", at(ARRIVAL + day + 1)) == "time_in_future"
        assert decode("json", at(ARRIVAL - ten_years))[0].time == ARRIVAL - ten_years
        assert reason_of("json", at(ARRIVAL - ten_years - 1)) == "time_too_old"

    def test_custom_time_window(self) -> None:
        """DecodeLimits sets the window."""
        limits = DecodeLimits(max_future_s=10, max_past_s=60)
        assert reason_of("json", at(ARRIVAL + 11), limits=limits) == "time_in_future"
        assert reason_of("json", at(ARRIVAL - 61), limits=limits) == "time_too_old"


def at(time: float) -> str:
    """A json payload with value 1 at epoch seconds `time`."""
    return json.dumps({"time": time, "value": 1})


class TestRfc3339:
    """parse_rfc3339 against RFC 3339 §5.6 and Python's datetime as independent reference."""

    @pytest.mark.parametrize(
        ("text", "expected"),
        [
            ("2026-05-01T12:00:00Z", ARRIVAL),
            ("2026-05-01t12:00:00z", ARRIVAL),  # RFC 3339 §5.6: T and Z may be lower case
            ("2026-05-01 12:00:00Z", ARRIVAL),  # §5.6 note: a space may separate date and time
            ("2026-05-01T12:00:00.5Z", ARRIVAL + 0.5),
            ("2026-05-01T12:00:00.123456789Z", ARRIVAL + 0.123456789),
            ("2026-05-01T14:00:00+02:00", ARRIVAL),
            ("2026-05-01T06:30:00-05:30", ARRIVAL),
            ("2026-05-01T12:00:00-00:00", ARRIVAL),  # §4.3: unknown local offset, same instant
            ("2026-04-30T23:59:60Z", ARRIVAL - 43200),  # leap second: POSIX time repeats it
            ("1970-01-01T00:00:00Z", 0.0),
        ],
    )
    def test_variants(self, text: str, expected: float) -> None:
        """Upper/lower case, space separator, fractions, offsets and a leap second."""
        assert parse_rfc3339(text) == pytest.approx(expected, abs=1e-9)

    @pytest.mark.parametrize(
        "text",
        [
            "2026-05-01T12:00:00",  # no offset: local time is ambiguous
            "2026-05-01",
            "2026-05-01T12:00Z",
            "2026-02-29T00:00:00Z",  # 2026 is no leap year
            "2026-13-01T00:00:00Z",
            "2026-05-01T24:00:00Z",
            "2026-05-01T12:60:00Z",
            "2026-05-01T12:00:61Z",
            "2026-05-01T12:00:00+24:00",
            "2026-05-01T12:00:00+02:60",
            "0000-01-01T00:00:00Z",
            "2026-05-01T12:00:00.Z",
            "２０２６-05-01T12:00:00Z",  # full-width digits are not RFC 3339 DIGITs
            " 2026-05-01T12:00:00Z",
        ],
    )
    def test_rejects(self, text: str) -> None:
        """Anything outside RFC 3339 date-time is bad_time."""
        with pytest.raises(DecodeError) as caught:
            parse_rfc3339(text)
        assert caught.value.reason == "bad_time"

    def test_matches_datetime_on_random_instants(self) -> None:
        """Random instants 1900–2200 with random offsets agree with datetime (seeded)."""
        rng = random.Random(8428)
        for _ in range(2000):
            offset = dt.timedelta(minutes=rng.randrange(-23 * 60 - 59, 23 * 60 + 60))
            moment = dt.datetime(1900, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(
                microseconds=rng.randrange(300 * 365 * 86400 * 10**6)
            )
            text = moment.astimezone(dt.timezone(offset)).isoformat()
            assert parse_rfc3339(text) == pytest.approx(moment.timestamp(), abs=1e-6), text


class TestJsonBatch:
    """A JSON array of objects is a batch, decoded all or nothing."""

    def test_batch_in_order(self) -> None:
        """Every record becomes a reading, in payload order, with its own time."""
        readings = decode(
            "json",
            json.dumps(
                [
                    {"time": ARRIVAL - 2, "value": 1},
                    {"time": "2026-05-01T11:59:59Z", "value": 2, "temp": 20},
                    {"value": 3},
                ]
            ),
        )
        assert [(r.time, r.value) for r in readings] == [
            (ARRIVAL - 2, 1.0),
            (ARRIVAL - 1, 2.0),
            (ARRIVAL, 3.0),
        ]
        assert dict(readings[1].fields) == {"temp": 20.0}

    def test_bad_record_rejects_the_batch_and_names_it(self) -> None:
        """One bad record fails the whole message; the detail says which record."""
        with pytest.raises(DecodeError, match="batch record 1") as caught:
            decode("json", '[{"value": 1}, {"value": "x"}]')
        assert caught.value.reason == "value_not_number"

    def test_non_object_record(self) -> None:
        """A batch holds objects only."""
        assert reason_of("json", '[{"value": 1}, 2]') == "not_an_object"

    def test_record_limit(self) -> None:
        """max_records bounds a batch; exactly the limit is fine."""
        limits = DecodeLimits(max_records=3)
        assert len(decode("json", '[{"value": 1}, {"value": 2}, {"value": 3}]', limits=limits)) == 3
        assert (
            reason_of("json", json.dumps([{"value": 1}] * 4), limits=limits) == "too_many_records"
        )


class TestNumber:
    """A bare number as ASCII text."""

    @pytest.mark.parametrize(
        ("payload", "expected"),
        [
            (b"21.5", 21.5),
            (b" 3e-2\n", 0.03),
            (b"-7", -7.0),
            (b"+.5", 0.5),
            (b"5.", 5.0),
            (b"\t1E3\r\n", 1000.0),
            (b"0", 0.0),
        ],
    )
    def test_accepts(self, payload: bytes, expected: float) -> None:
        """Decimal and exponent notation, signs and surrounding whitespace."""
        [reading] = decode("number", payload, arrival=ARRIVAL + 1)
        assert reading == Reading(ARRIVAL + 1, expected, {})

    @pytest.mark.parametrize(
        ("payload", "reason"),
        [
            (b"", "not_a_number"),
            (b"1_000", "not_a_number"),
            (b"0x10", "not_a_number"),
            (b"21,5", "not_a_number"),
            (b'"21.5"', "not_a_number"),
            (b"1 2", "not_a_number"),
            ("٣".encode(), "not_a_number"),
            (b"nan", "non_finite"),
            (b"-Infinity", "non_finite"),
            (b"1e999", "non_finite"),
            (b"\xff1", "not_utf8"),
        ],
    )
    def test_rejects(self, payload: bytes, reason: str) -> None:
        """Anything but a plain finite decimal number is rejected with its reason."""
        assert reason_of("number", payload) == reason


class TestSenmlRfcExamples:
    """The JSON examples of RFC 8428 §5.1, retyped from memory ("RFC 8428 §5.1.x, from memory")."""

    def test_5_1_1_single_datapoint(self) -> None:
        """RFC 8428 §5.1.1, from memory: one temperature with name, unit and no time (now)."""
        payload = '[{"n":"urn:dev:ow:10e2073a01080063","u":"Cel","v":23.1}]'
        assert decode("senml", payload) == [
            Reading(ARRIVAL, 23.1, {}, "urn:dev:ow:10e2073a01080063", "Cel")
        ]

    def test_5_1_2_multiple_datapoints_now(self) -> None:
        """RFC 8428 §5.1.2, from memory: voltage and current "now", the base name shared."""
        payload = """[
          {"bn":"urn:dev:ow:10e2073a01080063:","n":"voltage","u":"V","v":120.1},
          {"n":"current","u":"A","v":1.2}
        ]"""
        assert decode("senml", payload) == [
            Reading(ARRIVAL, 120.1, {}, "urn:dev:ow:10e2073a01080063:voltage", "V"),
            Reading(ARRIVAL, 1.2, {}, "urn:dev:ow:10e2073a01080063:current", "A"),
        ]

    def test_5_1_2_multiple_datapoints_with_base_time(self) -> None:
        """RFC 8428 §5.1.2, from memory: current each second before bt (2010-06-08T18:01:16.001Z).

        Base unit A applies to the current records, the voltage record overrides it with V;
        bver 5 is an older version and understood. (The base name's device id is one digit
        shorter than in §5.1.1, as we remember the RFC printing it.)
        """
        payload = """[
          {"bn":"urn:dev:ow:10e2073a0108006:","bt":1.276020076001e+09,
           "bu":"A","bver":5,
           "n":"voltage","u":"V","v":120.1},
          {"n":"current","t":-5,"v":1.2},
          {"n":"current","t":-4,"v":1.3},
          {"n":"current","t":-3,"v":1.4},
          {"n":"current","t":-2,"v":1.5},
          {"n":"current","t":-1,"v":1.6},
          {"n":"current","v":1.7}
        ]"""
        bt = dt.datetime(2010, 6, 8, 18, 1, 16, 1000, tzinfo=dt.timezone.utc).timestamp()
        readings = decode("senml", payload, arrival=bt + 2)
        assert [(r.name, r.unit, r.value) for r in readings] == [
            ("urn:dev:ow:10e2073a0108006:voltage", "V", 120.1),
            *[
                ("urn:dev:ow:10e2073a0108006:current", "A", v)
                for v in (1.2, 1.3, 1.4, 1.5, 1.6, 1.7)
            ],
        ]
        assert [r.time for r in readings] == pytest.approx(
            [bt, bt - 5, bt - 4, bt - 3, bt - 2, bt - 1, bt], abs=1e-6
        )

    # RFC 8428 §5.1.3 (from memory): humidity from a mobile device with position entries,
    # starting Mon Oct 31 13:24:24 UTC 2011, with a battery report at t=150.
    EXAMPLE_5_1_3: ClassVar[str] = """[
      {"bn":"urn:dev:ow:10e2073a01080063","bt":1.320067464e+09,
       "bu":"%RH","v":20},
      {"u":"lon","v":24.30621},
      {"u":"lat","v":60.07965},
      {"t":60,"v":20.3},
      {"u":"lon","t":60,"v":24.30622},
      {"u":"lat","t":60,"v":60.07965},
      {"t":120,"v":20.7},
      {"u":"lon","t":120,"v":24.30623},
      {"u":"lat","t":120,"v":60.07966},
      {"u":"%EL","t":150,"v":98},
      {"t":180,"v":21.2},
      {"u":"lon","t":180,"v":24.30628},
      {"u":"lat","t":180,"v":60.07967}
    ]"""

    # RFC 8428 §5.1.4 (from memory): the same pack in resolved form.
    RESOLVED_5_1_4: ClassVar[list[tuple[str, float, float]]] = [
        ("%RH", 1.320067464e09, 20),
        ("lon", 1.320067464e09, 24.30621),
        ("lat", 1.320067464e09, 60.07965),
        ("%RH", 1.320067524e09, 20.3),
        ("lon", 1.320067524e09, 24.30622),
        ("lat", 1.320067524e09, 60.07965),
        ("%RH", 1.320067584e09, 20.7),
        ("lon", 1.320067584e09, 24.30623),
        ("lat", 1.320067584e09, 60.07966),
        ("%EL", 1.320067614e09, 98),
        ("%RH", 1.320067644e09, 21.2),
        ("lon", 1.320067644e09, 24.30628),
        ("lat", 1.320067644e09, 60.07967),
    ]

    def test_5_1_3_multiple_measurements_resolve_to_5_1_4(self) -> None:
        """RFC 8428 §5.1.3 resolves to the records of §5.1.4 (both from memory)."""
        arrival = dt.datetime(2011, 10, 31, 13, 30, tzinfo=dt.timezone.utc).timestamp()
        readings = decode("senml", self.EXAMPLE_5_1_3, arrival=arrival)
        name = "urn:dev:ow:10e2073a01080063"
        assert readings == [Reading(t, float(v), {}, name, u) for u, t, v in self.RESOLVED_5_1_4]

    def test_5_1_4_resolved_form_decodes_to_itself(self) -> None:
        """RFC 8428 §5.1.4, from memory: a resolved pack (no base fields) decodes unchanged."""
        name = "urn:dev:ow:10e2073a01080063"
        pack = [{"n": name, "u": u, "t": t, "v": v} for u, t, v in self.RESOLVED_5_1_4]
        arrival = 1.320067644e09 + 60
        readings = decode("senml", json.dumps(pack), arrival=arrival)
        assert readings == [Reading(t, float(v), {}, name, u) for u, t, v in self.RESOLVED_5_1_4]
        assert readings == decode("senml", self.EXAMPLE_5_1_3, arrival=arrival)


class TestSenmlResolution:
    """Base fields, relative time, skipped records and validation (RFC 8428 §4)."""

    def test_base_value_is_added_and_persists(self) -> None:
        """bv applies to its own record and later ones until replaced (RFC 8428 §4.1)."""
        readings = decode(
            "senml",
            '[{"bn":"m.","bv":100,"n":"a","v":1},{"n":"b","v":2},'
            '{"bv":10,"n":"c","v":3},{"n":"d","v":4}]',
        )
        assert [(r.name, r.value) for r in readings] == [
            ("m.a", 101.0),
            ("m.b", 102.0),
            ("m.c", 13.0),
            ("m.d", 14.0),
        ]

    def test_base_name_and_unit_replaced(self) -> None:
        """A later bn/bu replaces the earlier one; u overrides bu for its record only."""
        readings = decode(
            "senml",
            '[{"bn":"x:","bu":"Cel","n":"a","v":1},{"n":"b","u":"K","v":2},'
            '{"n":"c","v":3},{"bn":"y:","bu":"V","n":"a","v":4}]',
        )
        assert [(r.name, r.unit) for r in readings] == [
            ("x:a", "Cel"),
            ("x:b", "K"),
            ("x:c", "Cel"),
            ("y:a", "V"),
        ]

    def test_relative_times(self) -> None:
        """Resolved times below 2**28 are relative to arrival (RFC 8428 §4.5.3)."""
        readings = decode(
            "senml", '[{"n":"a","t":-5,"v":1},{"bt":-60,"n":"a","t":30,"v":2},{"n":"a","v":3}]'
        )
        assert [r.time for r in readings] == [ARRIVAL - 5, ARRIVAL - 30, ARRIVAL - 60]

    def test_absolute_time_at_the_boundary(self) -> None:
        """2**28 itself is absolute (1978, too old in 2026); one second less is relative."""
        assert reason_of("senml", '[{"n":"a","t":268435456,"v":1}]') == "time_too_old"
        [reading] = decode(
            "senml", '[{"n":"a","t":268435455,"v":1}]', limits=DecodeLimits(max_future_s=3e8)
        )
        assert reading.time == ARRIVAL + 268435455

    def test_non_numeric_records_are_skipped(self) -> None:
        """vs, vb, vd and sum-only records are skipped; their base fields still apply."""
        readings = decode(
            "senml",
            '[{"bn":"d:","bv":5,"n":"state","vs":"on"},'
            '{"n":"door","vb":true},{"n":"blob","vd":"aGk"},'
            '{"n":"energy","s":12},{"n":"temp","v":1}]',
        )
        assert readings == [Reading(ARRIVAL, 6.0, {}, "d:temp", None)]

    def test_base_value_alone_is_no_reading(self) -> None:
        """A record with bv but no v sets the base only; it is not a sample of its own."""
        readings = decode("senml", '[{"bn":"d:","bv":5},{"n":"temp","v":1}]')
        assert [(r.name, r.value) for r in readings] == [("d:temp", 6.0)]

    def test_no_name_is_none(self) -> None:
        """A pack without names decodes with name None (the topic names the channel)."""
        [reading] = decode("senml", '[{"v":1,"u":""}]')
        assert (reading.name, reading.unit) == (None, None)

    def test_unknown_fields_ignored_unless_must_understand(self) -> None:
        """Unknown fields are ignored; one ending in '_' must be understood (RFC 8428 §4.4)."""
        assert decode("senml", '[{"n":"a","v":1,"foo":"x"}]')[0].value == 1.0
        assert reason_of("senml", '[{"n":"a","v":1,"foo_":"x"}]') == "malformed_senml"

    @pytest.mark.parametrize("bver", ["1", "5", "10", "10.0"])
    def test_known_versions(self, bver: str) -> None:
        """bver 1..10 (whole numbers) is understood."""
        assert decode("senml", '[{"bver":' + bver + ',"n":"a","v":1}]')

    @pytest.mark.parametrize("bver", ["11", "0", "10.5", '"10"', "true", "1e999"])
    def test_unknown_versions(self, bver: str) -> None:
        """bver above 10, not whole or not a number is malformed_senml."""
        assert reason_of("senml", '[{"bver":' + bver + ',"n":"a","v":1}]') == "malformed_senml"

    @pytest.mark.parametrize(
        "record",
        [
            '{"n":5,"v":1}',
            '{"n":"a","v":"1"}',
            '{"n":"a","v":true}',
            '{"n":"a","vb":1}',
            '{"n":"a","t":"now","v":1}',
            '{"bt":null,"n":"a","v":1}',
            '{"n":"a","v":1,"vs":"x"}',
            '{"n":"a","u":7,"v":1}',
        ],
    )
    def test_malformed_records(self, record: str) -> None:
        """Wrong field types and two value fields in one record are malformed_senml."""
        assert reason_of("senml", "[" + record + "]") == "malformed_senml"

    @pytest.mark.parametrize("name", ["-a", "_a", "a b", "a,b", "temp°", "a\\u0000", "é"])
    def test_bad_names(self, name: str) -> None:
        """Names break RFC 8428 §4.5.1 with a bad first character or any other character."""
        assert reason_of("senml", '[{"n":"' + name + '","v":1}]') == "bad_senml_name"

    @pytest.mark.parametrize("name", ["a", "0", "urn:dev:mac:0024befffe804ff1", "a-b.c/d_e:f"])
    def test_good_names(self, name: str) -> None:
        """All of A-Z a-z 0-9 - : . / _ are allowed after an alphanumeric first character."""
        assert decode("senml", '[{"n":"' + name + '","v":1}]')[0].name == name

    def test_bad_name_in_skipped_record(self) -> None:
        """Names are checked on every record, also those without a numeric value."""
        assert reason_of("senml", '[{"n":" x","vs":"on"},{"n":"a","v":1}]') == "bad_senml_name"

    def test_error_names_the_record(self) -> None:
        """The detail says which record is wrong."""
        with pytest.raises(DecodeError, match="record 2"):
            decode("senml", '[{"n":"a","v":1},{"n":"a","v":2},{"n":"a","v":"3"}]')

    def test_resolved_value_overflow(self) -> None:
        """bv + v beyond float range is non_finite."""
        assert reason_of("senml", '[{"bv":1.7e308,"n":"a","v":1.7e308}]') == "non_finite"

    def test_record_limit(self) -> None:
        """max_records bounds a pack."""
        limits = DecodeLimits(max_records=2)
        assert reason_of("senml", '[{"v":1},{"v":2},{"v":3}]', limits=limits) == "too_many_records"


#: One payload per reason: (kind, payload, reason). Together they cover every reason key.
ONE_PER_REASON = [
    ("json", b" " * 65537, "payload_too_large"),
    ("senml", b"[" + b" " * 65536 + b"]", "payload_too_large"),
    ("number", b"1" * 65537, "payload_too_large"),
    ("json", b'{"value": "\xe9"}', "not_utf8"),
    ("senml", b"\xfe\xff[]", "not_utf8"),
    ("number", b"\x80", "not_utf8"),
    ("json", b'{"value": 1', "malformed_json"),
    ("json", b"[" * 5000, "malformed_json"),
    ("senml", b"[{v:1}]", "malformed_json"),
    ("json", b"21.5", "not_an_object"),
    ("json", b'{"time": 1777636800}', "missing_value"),
    ("json", b'{"value": "21.5"}', "value_not_number"),
    ("json", b'{"value": NaN}', "non_finite"),
    ("senml", b'[{"n":"a","v":Infinity}]', "non_finite"),
    ("number", b"inf", "non_finite"),
    ("json", b'{"time": "yesterday", "value": 1}', "bad_time"),
    ("senml", b'[{"n":"a","t":NaN,"v":1}]', "bad_time"),
    ("json", b'{"time": "2026-05-03T12:00:00Z", "value": 1}', "time_in_future"),
    ("senml", b'[{"n":"a","t":1777900000,"v":1}]', "time_in_future"),
    ("json", b'{"time": "2006-05-01T12:00:00Z", "value": 1}', "time_too_old"),
    ("json", json.dumps([{"value": 1}] * 1001).encode(), "too_many_records"),
    ("senml", json.dumps([{"v": 1}] * 1001).encode(), "too_many_records"),
    ("senml", b'{"n":"a","v":1}', "malformed_senml"),
    ("senml", b'[{"n":"a","v":1}, 3]', "malformed_senml"),
    ("senml", b'[{"n":"a b","v":1}]', "bad_senml_name"),
    ("senml", b'[{"n":"a","vs":"on"}]', "no_numeric_records"),
    ("senml", b"[]", "no_numeric_records"),
    ("number", b"twenty", "not_a_number"),
]


class TestReasons:
    """Every reason key is reachable, documented, and its detail is short and helpful."""

    @pytest.mark.parametrize(("kind", "payload", "reason"), ONE_PER_REASON)
    def test_reason(self, kind: str, payload: bytes, reason: str) -> None:
        """Each payload fails with exactly its reason and a one-line detail."""
        with pytest.raises(DecodeError) as caught:
            make_decoder(kind).decode(payload, ARRIVAL)
        error = caught.value
        assert error.reason == reason
        assert str(error) == f"{reason}: {error.detail}"
        assert "\n" not in error.detail and len(error.detail) < 400

    def test_every_reason_is_covered(self) -> None:
        """The table above reaches every documented reason and nothing else."""
        assert {reason for _, _, reason in ONE_PER_REASON} == set(REASONS)

    def test_docstring_table_matches_reasons(self) -> None:
        """The module docstring's reason table lists exactly the REASONS keys, in order."""
        doc = codecs.__doc__ or ""
        table = re.findall(r"^([a-z0-9_]+) {2,}\S", doc, flags=re.MULTILINE)
        assert table[1:] == list(REASONS)  # the first row is the header "reason meaning"

    def test_details_quote_at_most_sixty_characters(self) -> None:
        """A long offending string is cut to ~60 characters in the detail."""
        long_text = "x" * 500
        for kind, payload in [
            ("json", '{"value": "' + long_text + '"}'),
            ("json", '{"time": "' + long_text + '", "value": 1}'),
            ("senml", '[{"n":"-' + long_text + '","v":1}]'),
            ("number", long_text),
            ("json", '{"value": ' + long_text),
        ]:
            with pytest.raises(DecodeError) as caught:
                decode(kind, payload)
            assert "x" * 61 not in caught.value.detail, (kind, caught.value.detail)
            assert "x" * 20 in caught.value.detail  # the offending text is still quoted
