"""From an MQTT topic to the channel (or input, or control) it is about.

Two halves, for two threads:

- `Routes` is built once per config and never changes, so the network thread may use it
  without locks: `Routes.match(topic)` says what a topic is (a reading of a channel
  template, an input of one, a control message) and carries the decoder to use. A channel
  template's topic may hold `+` wildcards; the levels they match fill `{1}`, `{2}`… in the
  channel's name and in its input topics (`site/+/no2/raw` with name `{1}-no2` makes
  `a-no2` from `site/a/no2/raw`). An input topic template such as `site/{1}/met/temp` is
  subscribed as `site/+/met/temp`.
- `ChannelTable` is the worker thread's: it creates a channel the first time its topic is
  seen, up to `limits.max_channels` (beyond it the reading is refused with reason
  `channel_limit`, logged once per minute), and delivers input values. The latest value of
  every concrete input topic is kept (bounded, oldest forgotten first) so an input that
  arrives before its channel exists, or one shared by channels created later, is applied
  when the channel is created; `Channel`'s own input cache ignores values older than what
  it has, so re-applying one is harmless.

>>> from zeroline.config import parse_config
>>> config = parse_config('''
... channels:
...   - {name: "{1}-no2", topic: site/+/no2/raw, basis: [constant],
...      inputs: {temp: {topic: "site/{1}/met/temp"}}}
... ''')
>>> routes = Routes(config)
>>> [type(m).__name__ for m in routes.match("site/a/no2/raw")]
['ReadingMatch']
>>> routes.match("site/a/no2/raw")[0].wildcards
('a',)
>>> sorted(routes.subscriptions())
['site/+/met/temp', 'site/+/no2/raw', 'zeroline/+/control']
"""

from __future__ import annotations

import heapq
import logging
import re
from collections import OrderedDict
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from zeroline.channel import Channel, blank_packed, pack_channels, unpack_channels
from zeroline.codecs import DecodeLimits, Decoder, make_decoder
from zeroline.config import ChannelConfig, Config, InputConfig
from zeroline.errors import InputError
from zeroline.logs import RateLimitedLogger
from zeroline.parked import ParkedRows
from zeroline.state_layout import PackedChannels

_log = logging.getLogger(__name__)

PLACEHOLDER = re.compile(r"\{(\d+)\}")
INPUTS_PER_CHANNEL_BOUND = 4  # latest input values kept: this many per allowed channel
#: What unpacking a saved row can raise when the row is not a state of the config's model.
_UNREADABLE = (KeyError, TypeError, ValueError, IndexError, InputError)
#: Topics whose matches are remembered, per resident channel (limits.resident_channels):
#: ~300 bytes each, so a site of 10,000 channels does not pay 3 MB for topics it sees
#: once a minute; a topic not remembered costs one match, a few µs.
MATCHES_REMEMBERED_PER_CHANNEL = 2


def fill(template: str, wildcards: tuple[str, ...]) -> str:
    """`template` with {1}, {2}… replaced by the matched wildcard levels (a new string:
    `ChannelTable` keeps one string object per channel name, see `ChannelTable.create`).

    >>> fill("{1}-no2", ("a",))
    'a-no2'
    """
    return PLACEHOLDER.sub(lambda m: wildcards[int(m.group(1)) - 1], template)


@dataclass(frozen=True)
class TopicPattern:
    """A subscription topic with `+` levels; `match` returns the levels they matched."""

    levels: tuple[str, ...]

    @staticmethod
    def parse(topic: str) -> TopicPattern:
        return TopicPattern(tuple(topic.split("/")))

    @property
    def text(self) -> str:
        return "/".join(self.levels)

    def match(self, topic: str) -> tuple[str, ...] | None:
        parts = topic.split("/")
        if len(parts) != len(self.levels):
            return None
        captured = []
        for want, got in zip(self.levels, parts, strict=True):
            if want == "+":
                if not got:
                    return None  # an empty level would make an empty name part
                captured.append(got)
            elif want != got:
                return None
        return tuple(captured)


def _template_regex(template: str) -> re.Pattern[str]:
    """A regex matching what a template with {1}, {2}… placeholders fills into (an input
    topic, a channel name): each placeholder is a group `p1`, `p2`… of one topic level."""
    seen: set[str] = set()
    pattern = ""
    position = 0
    for found in PLACEHOLDER.finditer(template):
        pattern += re.escape(template[position : found.start()])
        group = f"p{found.group(1)}"
        pattern += f"(?P={group})" if group in seen else f"(?P<{group}>[^/]+)"
        seen.add(group)
        position = found.end()
    return re.compile(pattern + re.escape(template[position:]))


def _subscription(template: str) -> str:
    """The subscription for an input topic template: placeholder levels become `+`."""
    return "/".join("+" if PLACEHOLDER.search(level) else level for level in template.split("/"))


@dataclass(frozen=True, slots=True)  # one per remembered topic: no __dict__
class ReadingMatch:
    """A raw reading of the channel `template` makes (or feeds) channel `name`."""

    template: str
    name: str
    wildcards: tuple[str, ...]
    decoder: Decoder
    senml_name: str | None


@dataclass(frozen=True, slots=True)  # one per remembered topic: no __dict__
class InputMatch:
    """A value of input `input_name` of channels of `template`."""

    template: str
    input_name: str
    decoder: Decoder


@dataclass(frozen=True, slots=True)  # one per remembered topic: no __dict__
class ControlMatch:
    """A technician's control event for channel `channel`."""

    channel: str


Match = ReadingMatch | InputMatch | ControlMatch


@dataclass(frozen=True)
class _ReadingRoute:
    config: ChannelConfig
    pattern: TopicPattern
    decoder: Decoder


@dataclass(frozen=True)
class _InputRoute:
    config: ChannelConfig
    input: InputConfig
    regex: re.Pattern[str]
    subscription: str
    decoder: Decoder


class Routes:
    """What each topic means under one config; safe to share between threads.

    The answer for a topic never changes under one config, so `match` remembers it: a
    reading's topic is matched against every pattern once, not on every message. The memory
    is bounded (cleared when full) and written only by the one thread that decodes; a dict
    lookup or store is atomic in CPython, so readers on other threads need no lock.
    """

    def __init__(self, config: Config, limits: DecodeLimits | None = None) -> None:
        self.config = config
        self._matched: dict[str, tuple[Match, ...]] = {}
        kept = min(int(config.limits["max_channels"]), int(config.limits["resident_channels"]))
        self._matched_bound = MATCHES_REMEMBERED_PER_CHANNEL * kept
        self.prefix = config.output_prefix
        limits = limits or DecodeLimits(max_bytes=int(config.limits["max_payload_bytes"]))
        self.limits = limits
        self.templates = {channel.name: channel for channel in config.channels}
        self._readings = [
            _ReadingRoute(
                channel,
                TopicPattern.parse(channel.topic),
                make_decoder(
                    channel.payload,
                    time_field=channel.time_field,
                    value_field=channel.value_field,
                    time_unit=channel.time_unit,
                    limits=limits,
                ),
            )
            for channel in config.channels
        ]
        self._inputs = [
            _InputRoute(
                channel,
                spec,
                _template_regex(spec.topic),
                _subscription(spec.topic),
                make_decoder(spec.payload, limits=limits),
            )
            for channel in config.channels
            for spec in channel.inputs.values()
            if spec.topic is not None
        ]
        self.control = TopicPattern.parse(f"{self.prefix}/+/control")

    def subscriptions(self) -> set[str]:
        """Every topic filter to subscribe to."""
        topics = {route.pattern.text for route in self._readings}
        topics |= {route.subscription for route in self._inputs}
        topics.add(self.control.text)
        return topics

    def match(self, topic: str) -> tuple[Match, ...]:
        """Everything `topic` is, in config order; empty for a topic no route knows."""
        known = self._matched.get(topic)
        if known is not None:
            return known
        matches = tuple(self._match(topic))
        if len(self._matched) >= self._matched_bound:
            self._matched.clear()  # a flood of odd topics must not grow this without end
        self._matched[topic] = matches
        return matches

    def _match(self, topic: str) -> list[Match]:
        matches: list[Match] = []
        for route in self._readings:
            wildcards = route.pattern.match(topic)
            if wildcards is not None:
                name = fill(route.config.name, wildcards)
                matches.append(
                    ReadingMatch(
                        route.config.name, name, wildcards, route.decoder, route.config.senml_name
                    )
                )
        for entry in self._inputs:
            if entry.regex.fullmatch(topic):
                matches.append(InputMatch(entry.config.name, entry.input.name, entry.decoder))
        control = self.control.match(topic)
        if control is not None:
            matches.append(ControlMatch(control[0]))
        return matches


class ChannelTable:
    """The worker's channels, created on first sight within a bound, and their inputs.

    Channels restored from a snapshot are *parked*: kept as their packed row (checked
    against the config's model when parked) and unpacked into a `Channel` only when
    something asks for them (`get`, a reading, an input value). A daemon with 10,000
    channels is back at work after reading one array instead of building 10,000 channels
    first (bench/snapshot.py), and a channel that never reports again costs its row only.

    At most `max_resident` channels are kept as `Channel` objects (~5 KB each at p = 6);
    beyond that the least recently used are parked too, a tenth of the bound at a time
    (one `pack_channels` call, ~11 µs a channel), as rows of ~0.7 KB in their template's
    `ParkedRows`. Packing and unpacking are exact (the snapshot tests check bit for bit),
    so parking changes no result: it trades ~120 µs at a parked channel's next reading for
    memory that no longer grows ~5 KB with every channel.
    """

    def __init__(self, routes: Routes, max_channels: int, max_resident: int | None = None) -> None:
        self.routes = routes
        self.max_channels = max_channels
        self.max_resident = max_channels if max_resident is None else max_resident
        self.channels: dict[str, Channel] = {}
        self._used: dict[str, int] = {}  # resident channel → tick of its latest use
        self._tick = 0
        self.evicted = 0  # channels parked for the resident bound, since start
        # Where each channel (in use or parked) comes from: its template, and the wildcard
        # levels only where parsing the name back would not give them (`wildcards_of`).
        self._template_of: dict[str, str] = {}
        self._odd_wildcards: dict[str, tuple[str, ...]] = {}
        # template → (regex reading a name's levels back, or None; its groups p1, p2…)
        self._name_patterns: dict[str, tuple[re.Pattern[str] | None, tuple[str, ...]]] = {}
        # One string object per channel name, whatever made it: the name is a key of
        # several tables (channels, parked rows, templates, the status board's, the
        # snapshot's dirty set), and each match of a topic that the match memory has
        # forgotten makes the name anew. A dict of our own rather than sys.intern:
        # interning 10,000 names grew the interpreter's table of interned strings by ~100
        # bytes a name (tracemalloc), this dict by ~20.
        self._one_string: dict[str, str] = {}
        self.parked: dict[str, int] = {}  # name → its slot in its template's store
        self._stores: dict[str, ParkedRows] = {}  # template → its parked rows
        self._input_index: dict[str, list[tuple[str, str]]] = {}  # topic → (channel, input)
        self._latest_inputs: OrderedDict[str, tuple[float, float]] = OrderedDict()
        self.max_inputs = INPUTS_PER_CHANNEL_BOUND * max_channels
        self.inputs_forgotten = 0
        self.unpark_failures = 0
        self._limit_log = RateLimitedLogger(_log)

    def __len__(self) -> int:
        return len(self.channels) + len(self.parked)

    def get(self, name: str) -> Channel | None:
        """The channel `name` for the worker to use, unparked if need be (which may park
        the least recently used others: hold no other `Channel` of this table across a
        call)."""
        channel = self.channels.get(name)
        if channel is None:
            if name not in self.parked:
                return None
            return self._unpark(name)
        self._touch(name)
        return channel

    def view(self, name: str) -> Channel | None:
        """The channel to look at from another thread (the status page): a channel in use,
        or for a parked one a copy unpacked from its row, which is not kept (the worker
        alone unparks channels)."""
        channel = self.channels.get(name)
        if channel is not None:
            return channel
        if name not in self.parked:  # or unparked by the worker just now
            return self.channels.get(name)
        try:
            return self._unpacked(name)
        except KeyError:  # unparked by the worker meanwhile
            return self.channels.get(name)
        except _UNREADABLE:
            return None  # the worker logs it and counts it when the channel is used

    def create(
        self, template: str, wildcards: tuple[str, ...], name: str | None = None
    ) -> Channel | None:
        """The channel for `template` at `wildcards` (named `name` if the caller has filled
        it in already, as `Routes.match` does), created if new; None at the bound."""
        config = self.routes.templates[template]
        if name is None:
            name = fill(config.name, wildcards)
        channel = self.get(name)
        if channel is not None:
            return channel
        if len(self) >= self.max_channels:
            self._limit_log.warning(
                "channel_limit",
                f"channel limit reached: {self.max_channels} channels exist, so {name!r} "
                "is not created and its readings are refused (reason channel_limit); "
                "raise limits.max_channels if the site really has more sensors",
            )
            return None
        channel = Channel(config, self._one_string.setdefault(name, name))
        self._adopt(channel, template, wildcards)
        return channel

    def adopt(self, channel: Channel, template: str, wildcards: tuple[str, ...]) -> None:
        """Add an existing channel (kept over a reload, or restored the long way)."""
        self._adopt(channel, template, wildcards)

    def park(
        self,
        template: str,
        names: list[str],
        wildcards: list[tuple[str, ...]],
        packed: PackedChannels,
    ) -> None:
        """Add restored channels as `packed` rows (in the layout of `template`'s config).

        A name the table already has, or one given twice, keeps its first state: a
        snapshot lists each channel once, so a second one is a damaged or hand-made file
        (or two templates that make the same name), and two rows for one channel would
        both be written to every snapshot after."""
        names = [self._one_string.setdefault(name, name) for name in names]
        seen: set[str] = set()
        keep: list[int] = []
        for i, name in enumerate(names):
            if name not in seen and name not in self.channels and name not in self.parked:
                keep.append(i)
            seen.add(name)
        if len(keep) < len(names):
            _log.warning(
                "%d saved channel state(s) of template %r name a channel already restored; "
                "the first state of each is kept",
                len(names) - len(keep),
                template,
            )
            names = [names[i] for i in keep]
            wildcards = [wildcards[i] for i in keep]
            packed = packed.take(keep)
        config = self.routes.templates[template]
        self._put_parked(template, names, packed)
        for name, levels in zip(names, wildcards, strict=True):
            self._remember_origin(name, template, levels)
            self._index_inputs(name, config, levels)

    def parked_blocks(self) -> list[tuple[str, list[str], PackedChannels]]:
        """Parked channels by template: (template, names, their packed rows, copied)."""
        blocks = []
        for template, store in self._stores.items():
            with store.lock:
                names, slots = store.held()
                if names:
                    blocks.append((template, names, store.rows(slots)))
        return blocks

    def _put_parked(self, template: str, names: list[str], packed: PackedChannels) -> None:
        """Store `packed`'s rows as channels `names` of `template`, parked."""
        store = self._store(template)
        with store.lock:
            slots = store.put(names, packed)
            for name, slot in zip(names, slots, strict=True):
                self.parked[name] = slot

    def _store(self, template: str) -> ParkedRows:
        store = self._stores.get(template)
        if store is None:
            store = ParkedRows(blank_packed(self.routes.templates[template]))
            self._stores[template] = store
        return store

    def _unpacked(self, name: str) -> Channel:
        """A parked channel unpacked from its row (it stays parked); _UNREADABLE if not.
        KeyError if it is no longer parked (another thread's `view` lost a race)."""
        template = self._template_of[name]
        store = self._stores[template]
        with store.lock:  # the slot is read and copied before the worker can reuse it
            packed = store.rows([self.parked[name]])
        [channel] = unpack_channels(self.routes.templates[template], [name], packed)
        return channel

    def _unpark(self, name: str) -> Channel:
        name = self._one_string.get(name, name)  # the parked name's own string object
        template = self._template_of[name]
        try:
            channel = self._unpacked(name)
        except _UNREADABLE as error:
            self.unpark_failures += 1
            _log.warning(
                "channel %r: its saved state cannot be read (%s); it starts fresh", name, error
            )
            channel = Channel(self.routes.templates[template], name)
        # In use first, then no longer parked: `names` (read from the status page's thread,
        # parked first) then never misses the channel.
        self.channels[name] = channel
        store = self._stores[template]
        with store.lock:
            store.release(self.parked.pop(name))
        self._apply_latest_inputs(channel)
        self._now_resident(name)
        return channel

    def _touch(self, name: str) -> None:
        self._tick += 1
        self._used[name] = self._tick

    def _now_resident(self, name: str) -> None:
        self._touch(name)
        self._keep_resident_bound()

    def _keep_resident_bound(self) -> None:
        """Park the least recently used channels once more than `max_resident` are in use."""
        excess = len(self.channels) - self.max_resident
        if excess <= 0:
            return
        count = min(len(self.channels) - 1, excess + self.max_resident // 10)
        oldest = heapq.nsmallest(count, self.channels, key=self._used.__getitem__)
        groups: dict[str, list[str]] = {}
        for name in oldest:
            groups.setdefault(self._template_of[name], []).append(name)
        for template, names in groups.items():
            # Parked first, then no longer in use (as in `_unpark`, the other way).
            self._put_parked(template, names, pack_channels([self.channels[n] for n in names]))
            for name in names:
                del self.channels[name]
                del self._used[name]
        self.evicted += len(oldest)

    def _adopt(self, channel: Channel, template: str, wildcards: tuple[str, ...]) -> None:
        channel.name = self._one_string.setdefault(channel.name, channel.name)
        self.channels[channel.name] = channel
        self._remember_origin(channel.name, template, wildcards)
        self._index_inputs(channel.name, channel.config, wildcards)
        self._apply_latest_inputs(channel)
        self._now_resident(channel.name)

    def template_of(self, name: str) -> str | None:
        """The template channel `name` comes from; None for no such channel."""
        return self._template_of.get(name)

    def origin_of(self, name: str) -> tuple[str, tuple[str, ...]]:
        """(template, wildcard levels) of channel `name`; KeyError for no such channel."""
        return self._template_of[name], self.wildcards_of(name)

    def wildcards_of(self, name: str) -> tuple[str, ...]:
        """The wildcard levels channel `name` was made with (KeyError for no such channel).

        Most names give them back by parsing (`{1}-gas` and `m12-gas` give `m12`), so
        they are kept only for names that do not (`{1}-{2}` from `a` and `b-c` parses as
        `a-b` and `c`; a template name that leaves a level out): ~170 bytes a channel
        fewer at 10,000 channels than a (template, wildcards) pair each."""
        odd = self._odd_wildcards.get(name)
        if odd is not None:
            return odd
        parsed = self._parsed_wildcards(self._template_of[name], name)
        assert parsed is not None  # else `_remember_origin` kept them as odd
        return parsed

    def _remember_origin(self, name: str, template: str, wildcards: tuple[str, ...]) -> None:
        self._template_of[name] = template
        if self._parsed_wildcards(template, name) == wildcards:
            self._odd_wildcards.pop(name, None)
        else:
            self._odd_wildcards[name] = wildcards

    def _parsed_wildcards(self, template: str, name: str) -> tuple[str, ...] | None:
        """The levels that fill `template`'s name into `name`, read back by a regex (None
        if it does not match); `_remember_origin` checks them against the real ones."""
        known = self._name_patterns.get(template)
        if known is None:
            known = self._name_patterns[template] = self._name_pattern(template)
        pattern, groups = known
        if pattern is None:
            return None
        found = pattern.fullmatch(name)
        if found is None:
            return None
        # One call for all levels (a snapshot reads back every channel's): `group` with
        # one name gives a string, with several a tuple.
        if len(groups) == 1:
            return (found.group(groups[0]),)
        return found.group(*groups) if groups else ()

    def _name_pattern(self, template: str) -> tuple[re.Pattern[str] | None, tuple[str, ...]]:
        """The regex reading `template`'s levels back from a channel name and its groups
        p1, p2… in level order; no regex if the name leaves a level out (it cannot be read
        back)."""
        levels = self.routes.templates[template].topic.split("/").count("+")
        pattern = _template_regex(template)
        groups = tuple(f"p{i}" for i in range(1, levels + 1))
        if set(pattern.groupindex) != set(groups):
            return None, groups
        return pattern, groups

    def _index_inputs(self, name: str, config: ChannelConfig, wildcards: tuple[str, ...]) -> None:
        for spec in config.inputs.values():
            if spec.topic is not None:
                topic = fill(spec.topic, wildcards)
                self._input_index.setdefault(topic, []).append((name, spec.name))

    def _apply_latest_inputs(self, channel: Channel) -> None:
        wildcards: tuple[str, ...] | None = None
        for spec in channel.config.inputs.values():
            if spec.topic is not None:
                if wildcards is None:  # parsed only for a template with input topics
                    wildcards = self.wildcards_of(channel.name)
                latest = self._latest_inputs.get(fill(spec.topic, wildcards))
                if latest is not None:
                    channel.set_input(spec.name, *latest)

    def deliver_input(self, topic: str, time: float, value: float) -> list[str]:
        """Give an input value to every channel that reads `topic`; returns their names."""
        self._remember(topic, time, value)
        targets = self._input_index.get(topic, [])
        for channel_name, input_name in targets:
            channel = self.get(channel_name)
            assert channel is not None  # every indexed name is a channel or parked
            channel.set_input(input_name, time, value)
        return [channel_name for channel_name, _ in targets]

    def _remember(self, topic: str, time: float, value: float) -> None:
        current = self._latest_inputs.get(topic)
        if current is not None and current[0] > time:
            return
        self._latest_inputs[topic] = (time, value)
        self._latest_inputs.move_to_end(topic)
        while len(self._latest_inputs) > self.max_inputs:
            forgotten, _ = self._latest_inputs.popitem(last=False)
            self.inputs_forgotten += 1
            self._limit_log.warning(
                "inputs_forgotten",
                f"more than {self.max_inputs} input topics seen; forgetting the oldest "
                f"({forgotten})",
            )

    def latest_inputs(self) -> dict[str, list[float]]:
        return {topic: [t, v] for topic, (t, v) in self._latest_inputs.items()}

    def load_latest_inputs(self, saved: Any) -> None:
        if isinstance(saved, dict):
            for topic, pair in saved.items():
                if isinstance(pair, list) and len(pair) == 2:
                    self._remember(str(topic), float(pair[0]), float(pair[1]))

    def names(self) -> Iterable[str]:
        """Every channel's name, parked ones included (a name may appear twice while it
        is being unparked: parked is read first so that none is ever missing)."""
        return [*self.parked, *self.channels]
