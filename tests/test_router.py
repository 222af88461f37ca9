"""Topic patterns, placeholders, channel creation within a bound and input routing."""

from __future__ import annotations

from typing import Any

import pytest

from zeroline.channel import Channel, Sample, pack_channels
from zeroline.config import parse_config
from zeroline.router import (
    ChannelTable,
    ControlMatch,
    InputMatch,
    ReadingMatch,
    Routes,
    TopicPattern,
    fill,
)

CONFIG = """
channels:
  - name: "{1}-{2}-no2"
    topic: site/+/dev/+/no2
    basis: [constant, {polynomial: {of: temp, degree: 1, center: 20}}]
    inputs:
      temp: {topic: "site/{1}/met/temp", max_age: 1h}
  - name: ph
    topic: lab/ph
    payload: number
    basis: [constant]
"""


@pytest.fixture()
def routes() -> Routes:
    return Routes(parse_config(CONFIG))


class TestTopicPattern:
    def test_plus_matches_exactly_one_non_empty_level(self) -> None:
        """`+` captures one level; other levels must be equal; lengths must agree."""
        pattern = TopicPattern.parse("a/+/c/+")
        assert pattern.match("a/x/c/y") == ("x", "y")
        assert pattern.match("a/x/c") is None
        assert pattern.match("a/x/c/y/z") is None
        assert pattern.match("a/x/d/y") is None
        assert pattern.match("a//c/y") is None

    def test_fill_replaces_numbered_placeholders(self) -> None:
        """{n} is the n-th matched level, in any order and repeated."""
        assert fill("{2}.{1}.{2}", ("a", "b")) == "b.a.b"


class TestRoutes:
    def test_reading_topic_names_the_channel(self, routes: Routes) -> None:
        """site/+/dev/+/no2 with name {1}-{2}-no2 → north-d7-no2."""
        [match] = routes.match("site/north/dev/d7/no2")
        assert isinstance(match, ReadingMatch)
        assert (match.name, match.wildcards) == ("north-d7-no2", ("north", "d7"))

    def test_input_topic_template_matches_its_concrete_topics(self, routes: Routes) -> None:
        """site/{1}/met/temp matches site/north/met/temp as input temp of the template."""
        [match] = routes.match("site/north/met/temp")
        assert isinstance(match, InputMatch)
        assert (match.template, match.input_name) == ("{1}-{2}-no2", "temp")
        assert routes.match("site/north/met/temp/extra") == ()

    def test_control_and_unknown_topics(self, routes: Routes) -> None:
        """<prefix>/<channel>/control is a control match; anything else matches nothing."""
        assert routes.match("zeroline/ph/control") == (ControlMatch("ph"),)
        assert routes.match("lab/other") == ()

    def test_subscriptions_cover_readings_inputs_and_control(self, routes: Routes) -> None:
        """Placeholder levels of input templates are subscribed as `+`."""
        assert routes.subscriptions() == {
            "site/+/dev/+/no2",
            "site/+/met/temp",
            "lab/ph",
            "zeroline/+/control",
        }

    def test_repeated_placeholder_must_repeat_the_level(self) -> None:
        """An input template using {1} twice only matches topics where both levels agree."""
        config = parse_config("""
channels:
  - name: "{1}-x"
    topic: s/+/x
    basis: [constant, {polynomial: {of: t2, degree: 1}}]
    inputs: {t2: {topic: "m/{1}/{1}"}}
""")
        routes = Routes(config)
        assert len(routes.match("m/a/a")) == 1
        assert routes.match("m/a/b") == ()


class TestChannelTable:
    def test_channels_are_created_once_up_to_the_bound(self, routes: Routes) -> None:
        """The same wildcards give the same channel; beyond max_channels, None."""
        table = ChannelTable(routes, max_channels=2)
        first = table.create("{1}-{2}-no2", ("n", "1"))
        assert first is not None and first.name == "n-1-no2"
        assert table.create("{1}-{2}-no2", ("n", "1")) is first
        assert table.create("{1}-{2}-no2", ("n", "2")) is not None
        assert table.create("{1}-{2}-no2", ("n", "3")) is None
        assert sorted(table.names()) == ["n-1-no2", "n-2-no2"]

    def test_input_before_channel_is_applied_on_creation(self, routes: Routes) -> None:
        """A site temperature seen before any channel reaches every channel created later."""
        table = ChannelTable(routes, max_channels=10)
        assert table.deliver_input("site/n/met/temp", 100.0, 25.0) == []
        one = table.create("{1}-{2}-no2", ("n", "1"))
        two = table.create("{1}-{2}-no2", ("n", "2"))
        other = table.create("{1}-{2}-no2", ("s", "1"))
        assert one is not None and two is not None and other is not None
        assert sorted(table.deliver_input("site/n/met/temp", 200.0, 26.0)) == [
            "n-1-no2",
            "n-2-no2",
        ]
        for channel in (one, two):
            state = channel.to_state()["inputs"]
            assert state["temp"] == [200.0, 26.0]
        assert other.to_state()["inputs"] == {}

    def test_latest_inputs_are_bounded(self, routes: Routes) -> None:
        """At most 4 × max_channels input topics are remembered; the oldest go first."""
        table = ChannelTable(routes, max_channels=1)
        for i in range(6):
            table.deliver_input(f"site/s{i}/met/temp", float(i), 1.0)
        remembered = table.latest_inputs()
        assert sorted(remembered) == [f"site/s{i}/met/temp" for i in range(2, 6)]
        assert table.inputs_forgotten == 2

    def test_older_input_value_does_not_replace_a_newer_one(self, routes: Routes) -> None:
        """Redelivered or reordered input values never move an input back in time."""
        table = ChannelTable(routes, max_channels=1)
        table.deliver_input("site/n/met/temp", 200.0, 26.0)
        table.deliver_input("site/n/met/temp", 100.0, 99.0)
        assert table.latest_inputs()["site/n/met/temp"] == [200.0, 26.0]
        channel = table.create("{1}-{2}-no2", ("n", "1"))
        assert channel is not None
        assert channel.to_state()["inputs"]["temp"] == [200.0, 26.0]

    def test_origins_are_read_back_from_names_and_kept_where_they_cannot_be(
        self, routes: Routes
    ) -> None:
        """Wildcard levels are kept only for names that do not parse back to them:
        `{1}-{2}-no2` from `a` and `b-c` reads back as `a-b` and `c`."""
        table = ChannelTable(routes, max_channels=10)
        assert table.create("{1}-{2}-no2", ("n", "1")) is not None
        assert table.create("{1}-{2}-no2", ("a", "b-c")) is not None
        assert table.create("ph", ()) is not None
        assert table._odd_wildcards == {"a-b-c-no2": ("a", "b-c")}
        assert table.origin_of("n-1-no2") == ("{1}-{2}-no2", ("n", "1"))
        assert table.origin_of("a-b-c-no2") == ("{1}-{2}-no2", ("a", "b-c"))
        assert table.origin_of("ph") == ("ph", ())
        assert table.template_of("nothing") is None
        with pytest.raises(KeyError):
            table.wildcards_of("nothing")

    def test_an_unparsable_name_gets_its_inputs_from_its_own_topic_after_parking(
        self, routes: Routes
    ) -> None:
        """A parked channel whose levels are kept (not parsed) still takes the latest value
        of its own input topic when it is unpacked: site/a/met/temp, not site/a-b/…"""
        table = ChannelTable(routes, max_channels=10, max_resident=1)
        odd = table.create("{1}-{2}-no2", ("a", "b-c"))
        assert odd is not None
        assert table.create("{1}-{2}-no2", ("n", "1")) is not None  # parks a-b-c-no2
        assert "a-b-c-no2" in table.parked
        table.deliver_input("site/a-b/met/temp", 300.0, 99.0)  # another site's temperature
        table._remember("site/a/met/temp", 200.0, 21.5)  # its own, seen while it was parked
        channel = table.get("a-b-c-no2")
        assert channel is not None
        assert channel.to_state()["inputs"]["temp"] == [200.0, 21.5]

    def test_a_name_that_leaves_a_level_out_keeps_its_levels(self) -> None:
        table = ChannelTable(
            Routes(
                parse_config("""
channels:
  - {name: "{2}-v", topic: x/+/+/v, basis: [constant]}
""")
            ),
            max_channels=10,
        )
        assert table.create("{2}-v", ("p", "q")) is not None
        assert table.origin_of("q-v") == ("{2}-v", ("p", "q"))
        assert table._odd_wildcards == {"q-v": ("p", "q")}

    def test_a_name_parked_twice_keeps_its_first_state(
        self, routes: Routes, caplog: pytest.LogCaptureFixture
    ) -> None:
        """A snapshot that lists a channel twice (damaged, hand-made, or two templates
        making one name) parks its first state only, with a warning; a name already in
        the table keeps what it has. Two rows for one channel would both go into every
        later snapshot."""
        config = routes.templates["{1}-{2}-no2"]
        first, second = Channel(config, "n-1-no2"), Channel(config, "n-1-no2")
        first.process(Sample(100.0, 1.0, {"temp": 20.0}))
        table = ChannelTable(routes, max_channels=10)
        packed = pack_channels([first, second])
        table.park("{1}-{2}-no2", ["n-1-no2", "n-1-no2"], [("n", "1"), ("n", "1")], packed)
        assert "1 saved channel state(s)" in caplog.text
        assert len(table.parked) == 1 and len(table) == 1
        [(_, names, rows)] = table.parked_blocks()
        assert names == ["n-1-no2"] and rows.rows.tobytes() == packed.rows[:1].tobytes()
        again = pack_channels([second])
        table.park("{1}-{2}-no2", ["n-1-no2"], [("n", "1")], again)
        [(_, names, rows)] = table.parked_blocks()
        assert names == ["n-1-no2"] and rows.rows.tobytes() == packed.rows[:1].tobytes()

    def test_a_channel_name_is_one_string_object_in_every_table(self, routes: Routes) -> None:
        """However often a name is made anew (each topic match the match memory forgot
        fills it again), the table keys and the channel hold one string object for it,
        through parking and unparking."""
        table = ChannelTable(routes, max_channels=10, max_resident=1)
        first = table.create("{1}-{2}-no2", ("n", "1"), "".join(["n-1", "-no2"]))
        assert first is not None
        name = first.name
        again = "".join(["n-1-", "no2"])
        assert again == name and again is not name
        assert table.create("{1}-{2}-no2", ("n", "2")) is not None  # parks n-1-no2

        def key(table_of: Any) -> str:
            return next(k for k in table_of if k == name)

        assert key(table.parked) is name and key(table._template_of) is name
        unparked = table.get(again)
        assert unparked is not None and unparked.name is name and key(table.channels) is name


def test_remembered_matches_are_the_same_and_bounded() -> None:
    """A topic is matched once; a flood of distinct topics cannot grow the memory."""
    config = parse_config(
        "broker: {host: h}\nlimits: {max_channels: 3}\n"
        "channels: [{name: '{1}', topic: 'm/+', basis: [constant]}]\n"
    )
    routes = Routes(config)
    first = routes.match("m/a")
    assert routes.match("m/a") is first
    for index in range(100):
        routes.match(f"m/x{index}")
        assert len(routes._matched) <= 2 * 3
    assert routes.match("m/a") == first  # forgotten and matched again: the same answer
