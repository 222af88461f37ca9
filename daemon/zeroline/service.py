"""The daemon: a bounded queue between the network thread and one worker that runs channels.

Threads. The broker link's input thread calls `Service._on_message`, which only decodes
(`zeroline.intake`) and enqueues. One worker thread takes `Work` items in arrival order
(what has queued up, in batches), feeds the channels (exactly as `zeroline.replay` does:
inputs first, then the reading, so a daemon and a replay of the same rows agree to the last
bit), publishes the outputs through the broker seam, and hands what is ready to the
committer thread (`zeroline.committer`), which journals, fsyncs and acknowledges, so the
worker never waits for the disk. Signals are the main thread's (`zeroline.commands.run`).

No loss, no double counting. A QoS 1 message is acknowledged to the broker only when its
effect is safe, in this order:

1. the worker processes it and publishes its outputs (QoS 1);
2. the broker acknowledges those outputs (`BrokerLink.confirmed`);
3. the message's effect is appended to the state journal and fsync'ed (`zeroline.state`);
4. only then the message is acknowledged.

A crash (SIGKILL, power cut) before 3 loses nothing: the broker redelivers the message,
and the restarted daemon, restored from snapshot + journal to the state before it,
processes it again and publishes identical outputs (a consumer may see a correction twice,
with the same values and time: at-least-once outputs). A crash between 3 and 4 gives a
redelivery that the channel's time check skips (`not_newer`, counted): its outputs were
already confirmed in 2. Either way the model applies every reading exactly once.
One exception: a bare-number payload carries no time (time = arrival), so a redelivery of
one that was journaled but whose acknowledgement was lost (a crash between 3 and 4, or a
broker dying before it got the PUBACK) is a new reading to the model; payloads that must
count exactly once need a time (JSON or SenML).

Back-pressure. Nothing here ever drops a message to keep up. Two mechanisms:

- the bounded queue (`limits.queue`): when it is full the network thread waits in
  `_on_message`, i.e. stops reading the socket; TCP flow control then stops the broker,
  which queues for us (Mosquitto: `max_queued_messages 0`, see deploy/mosquitto-notes.md).
  This is the mechanism that actually holds: Mosquitto 2.0.11 was measured to ignore our
  MQTT 5 Receive Maximum (and its own `max_inflight_messages`) once acknowledgements
  flow: with a receive maximum of 50 and a slow acknowledger, 480 of 500 messages were
  out to the client unacknowledged at once (it holds to the limit only while no
  acknowledgement arrives at all).
- the acknowledgement window: `broker.inflight` is sent as Receive Maximum, for brokers
  that honour it, and processed-but-uncommitted messages are bounded by the queue size:
  beyond it the worker waits for commits before taking more work.

The worker never waits for the network thread while the queue is full (that thread may be
blocked handing over a message, and it is the one that reads the broker's
acknowledgements), so the two cannot deadlock.

Commits are batched: when `broker.inflight // 2` messages are ready, when the oldest has
waited `COMMIT_DELAY_S`, or when the queue is empty and the oldest has waited
`IDLE_COMMIT_S` (one fsync per batch, on the committer thread). A snapshot needs
a quiet moment (every processed message handed to the committer, so snapshot and journal
agree): when one is due the worker stops taking new work until the outputs in transit are
confirmed, at most `QUIESCE_TIMEOUT_S` (it tries again later if the broker is away), packs
every channel's state and goes on; the committer writes the snapshot after the journal
batches before it and empties the journal before the next, so no fsync stalls the
worker (a slow disk's fsync can take 100-200 ms). A reload and the final snapshot at
shutdown also wait for the committer to finish (`_quiesce`).

Bad input of every kind becomes one message on `<prefix>/error` (`{"time", "topic",
"reason", "detail", "payload"}`, the payload cut to 200 characters), one counter per
reason and a rate-limited log line; it is acknowledged like any other message.

Other outputs (the time-series database, next) plug in as `OutputSink`s: they receive
every live corrected reading and alert event, and their `commit()` runs before the journal
fsync, so a sink that makes its data durable there (the tsdb spool's flush) inherits the
same no-loss guarantee. Journal replay at start-up does not call them again.

SIGHUP (`reload`): at a quiet moment the new routes replace the old; every channel whose
template still exists and whose `model_key` did not change keeps its state, the others
start fresh (logged), and the subscriptions are brought up to date.
"""

from __future__ import annotations

import json
import logging
import queue
import threading
import time
from collections import OrderedDict, deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any, Protocol

from zeroline.alerts import AlertEvent
from zeroline.channel import (
    Channel,
    ControlEvent,
    Corrected,
    Sample,
    conformed,
    pack_channels,
    unpack_channels,
)
from zeroline.codecs import Reading
from zeroline.committer import Batch, Committer
from zeroline.config import Config
from zeroline.errors import InputError
from zeroline.handoff import Handoff
from zeroline.heap import give_back_free_pages
from zeroline.intake import ControlPart, ErrorPart, InputPart, Part, ReadingPart, Work, decode
from zeroline.logs import RateLimitedLogger
from zeroline.mqtt import BrokerLink, Message
from zeroline.output_json import corrected_payload
from zeroline.router import ChannelTable, Routes, fill
from zeroline.state import Snapshot, SnapshotGroup, StateStore
from zeroline.state_layout import PackedChannels, concatenated

_log = logging.getLogger(__name__)

COMMIT_DELAY_S = 0.1  # longest a processed message waits for its journal fsync
IDLE_COMMIT_S = 0.005  # a quiet queue commits what waited this long (fsyncs stay batched)
QUIESCE_TIMEOUT_S = 2.0  # longest the worker pauses for a snapshot before trying later
JOURNAL_SNAPSHOT_RECORDS = 10_000  # replaying more at start-up would take over ~4 s
STATS_EVERY_S = 1.0
ERROR_PAYLOAD_CHARS = 200
TICK_S = 0.02
COMMIT_WAIT_S = 0.001
AWAITING_PER_QUEUE = 4  # processed-but-uncommitted messages allowed, per queue slot
BATCH_MESSAGES = 64  # messages handled between two commit checks when the queue is busy
#: Channels created or parked by the resident bound before an idle worker hands the heap's
#: free pages back (zeroline.heap: ~1 ms each time, some MiB after thousands of moves).
TRIM_AFTER_CHANNELS = 1_000


class OutputSink(Protocol):
    """Another destination for corrected readings and alert events (the time-series
    database is the next one). Called on the worker thread, live processing only."""

    def corrected(self, channel: Channel, result: Corrected) -> None: ...

    def alert(self, channel: Channel, event: AlertEvent) -> None: ...

    def commit(self) -> None:
        """Make everything handed over so far durable: called before messages are acked."""

    def close(self) -> None: ...


class Counters:
    """Named counts (received, processed, errors.<reason>, …) added to by several threads.

    Adding is on the per-message path of two threads, so it takes no lock: each thread adds
    to a dict of its own, and reading sums them. Only its owner writes a dict; CPython
    copies a dict in one step with respect to other Python threads, so a reader never sees
    one half-changed.
    """

    def __init__(self) -> None:
        self._local = threading.local()
        self._lock = threading.Lock()  # only for registering a thread's dict
        self._per_thread: list[dict[str, int]] = []

    def _mine(self) -> dict[str, int]:
        counts: dict[str, int] | None = getattr(self._local, "counts", None)
        if counts is None:
            counts = self._local.counts = {}
            with self._lock:
                self._per_thread.append(counts)
        return counts

    def add(self, key: str, amount: int = 1) -> None:
        counts = self._mine()
        counts[key] = counts.get(key, 0) + amount

    def get(self, key: str) -> int:
        with self._lock:
            dicts = list(self._per_thread)
        return sum(counts.get(key, 0) for counts in dicts)

    def as_dict(self) -> dict[str, int]:
        with self._lock:
            dicts = list(self._per_thread)
        total: dict[str, int] = {}
        for counts in dicts:
            for key, value in dict(counts).items():
                total[key] = total.get(key, 0) + value
        return dict(sorted(total.items()))


@dataclass
class _Pending:
    """A processed message waiting for its outputs' confirmation and its journal fsync."""

    token: Any
    records: list[dict[str, Any]]
    needs: int  # publish sequence number that must be confirmed first
    since: float = field(default_factory=time.monotonic)


class Service:
    """The daemon's core, independent of MQTT clients and of signals (see the module docstring)."""

    def __init__(
        self,
        config: Config,
        broker: BrokerLink,
        store: StateStore,
        sinks: Iterable[OutputSink] = (),
    ) -> None:
        self.config = config
        self.broker = broker
        self.store = store
        self.sinks = list(sinks)
        self.counters = Counters()
        self.prefix = config.output_prefix
        self.routes = Routes(config)
        self.table = _channel_table(self.routes, config)
        self.snapshot_every = float(config.state["snapshot_every"])
        self._queue: Handoff[Work] = Handoff(maxsize=int(config.limits["queue"]))
        self._awaiting: deque[_Pending] = deque()
        self._committer = Committer(
            lambda records: self.store.append_journal(records),
            lambda token: self.broker.ack(token),
            self.counters.add,
            lambda: self.broker.flush(),
        )
        self._commit_batch = max(1, int(config.broker["inflight"]) // 2)
        self._live = False  # False while replaying the journal: no outputs then
        self._last_seq = 0
        self._journal_seq = 0
        self._journal_since_snapshot = 0
        self._dirty: set[str] = set()  # changed since the last snapshot (is one due?)
        # See _publish_last_again; for the most recently published channels only, as many
        # as may be resident (a redelivery follows its reading within seconds).
        self._last_output: OrderedDict[str, tuple[float, bytes]] = OrderedDict()
        self._last_snapshot = time.monotonic()
        self._last_stats = 0.0
        self._moves_at_trim = 0  # `_channel_moves()` when the heap was last trimmed
        # Set by the thread that wrote the snapshot (it may be the committer's), read by the
        # worker: a failed write is tried again one period later.
        self._snapshot_failed = False
        self._snapshot_writing = False  # a snapshot handed to the committer, not yet written
        self._subscribed: set[str] = set()
        self._stop = threading.Event()
        self._closed = threading.Event()
        self._reload: Config | None = None
        self._reload_lock = threading.Lock()
        self._worker: threading.Thread | None = None
        self.failed = threading.Event()
        self._bad_input = RateLimitedLogger(_log)
        self._backlog_log = RateLimitedLogger(_log)

    # --- life cycle -----------------------------------------------------------------------

    def start(self) -> None:
        """Restore the state, start the worker, connect (BrokerError if refused)."""
        self.restore()
        self._committer.start()
        self._live = True
        self._worker = threading.Thread(target=self._run, name="zeroline-worker", daemon=True)
        self._worker.start()
        self.broker.connect(self._on_message, self._on_connect)

    def stop(self, timeout: float = 10.0) -> None:
        """Finish in-transit work, commit, snapshot, go offline. Unprocessed messages stay
        unacknowledged: the broker redelivers them to the next run."""
        self._stop.set()
        if self._worker is not None:
            self._worker.join(timeout)
        self._committer.stop(timeout)
        self._closed.set()  # releases a network thread waiting on a full queue
        self.broker.close()
        for sink in self.sinks:
            sink.close()
        self.store.close()
        _log.info("stopped; counters: %s", json.dumps(self.counters.as_dict()))

    def request_reload(self, config: Config) -> None:
        """Apply `config` at the worker's next quiet moment (called from the main thread)."""
        with self._reload_lock:
            self._reload = config

    # --- network thread -------------------------------------------------------------------

    def _on_connect(self) -> None:
        topics = self.routes.subscriptions()
        self._subscribed = set(topics)
        self.broker.subscribe(sorted(topics))

    def _on_message(self, message: Message) -> None:
        if self._closed.is_set():
            return  # unacknowledged: the broker redelivers it to the next run
        self.counters.add("received")
        work = decode(message, self.routes)
        try:
            self._queue.put_nowait(work)
        except queue.Full:
            self.counters.add("queue_full_waits")
            self._backlog_log.warning(
                "queue_full",
                f"the queue is full ({self._queue.maxsize} messages): pausing reading from "
                "the broker until the worker catches up (back-pressure, nothing is dropped)",
            )
            while not self._closed.is_set():
                try:
                    self._queue.put(work, timeout=TICK_S)
                    return
                except queue.Full:
                    continue
            # Shutting down: left unacknowledged, so the broker redelivers it next run.

    # --- worker ---------------------------------------------------------------------------

    def _run(self) -> None:
        try:
            while not self._stop.is_set():
                self._step()
            self._finish()
        except Exception:
            _log.exception("the worker failed; stopping (state up to the last commit is safe)")
            self.failed.set()

    def _step(self) -> None:
        unacknowledged = len(self._awaiting) + self._committer.pending()
        backlog = unacknowledged >= AWAITING_PER_QUEUE * self._queue.maxsize
        if backlog and not self._queue.full():
            # Too much processed but not yet committed: let the confirmations catch up.
            self._commit(force=True)
            time.sleep(COMMIT_WAIT_S)
            return
        if self._reload is not None:
            if self._quiesce():
                self._apply_reload()
                self.snapshot()
        elif not self._snapshot_writing and self._snapshot_due() and self._quiesce(journal=False):
            self._snapshot_in_background()
        try:
            work = self._queue.get(timeout=self._idle_wait())
        except queue.Empty:
            work = None
            self._when_idle()
        # What has queued up meanwhile is taken in one go: one commit check per batch
        # instead of per message.
        for _ in range(BATCH_MESSAGES):
            if work is None:
                break
            self._handle(work)
            try:
                work = self._queue.get_nowait()
            except queue.Empty:
                work = None
        if work is not None:
            self._handle(work)
        # Send what this batch published, and let the link's network thread have the
        # interpreter now: without it, it would wait up to the interpreter's switch
        # interval (5 ms) for the worker to block, which is latency on every output.
        self.broker.flush()
        time.sleep(0)
        self._commit(force=False)
        if self._publish_stats():
            self.broker.flush()

    def _idle_wait(self) -> float:
        """How long to wait for work: TICK_S, or less if a commit falls due sooner (a
        broker holds back new readings while too many are unacknowledged, so a late
        commit would delay readings, not just their acknowledgements)."""
        if not self._awaiting:
            return TICK_S
        due = self._awaiting[0].since + IDLE_COMMIT_S - time.monotonic()
        return min(TICK_S, max(0.0, due))

    def _when_idle(self) -> None:
        """Nothing came for a while: give the heap's free pages back if many channels were
        made or parked since the last time (see zeroline.heap)."""
        moves = self._channel_moves()
        if moves < self._moves_at_trim:  # a reload made a new table
            self._moves_at_trim = 0
        if moves - self._moves_at_trim >= TRIM_AFTER_CHANNELS:
            self._moves_at_trim = moves
            give_back_free_pages()

    def _channel_moves(self) -> int:
        return len(self.table) + self.table.evicted

    def _finish(self) -> None:
        if self._quiesce(timeout=QUIESCE_TIMEOUT_S * 2):
            self.snapshot()
        else:
            _log.warning(
                "outputs still unconfirmed at shutdown; skipping the final snapshot (the "
                "broker redelivers the unacknowledged readings to the next run)"
            )

    def _handle(self, work: Work) -> None:
        records: list[dict[str, Any]] = []
        for part in work.parts:
            try:
                record = self._apply(part, work.message)
            except Exception as error:  # a bug must cost one message, not the daemon
                _log.exception("internal error on a message from %s", work.message.topic)
                self._error(work.message, "internal_error", f"{type(error).__name__}: {error}")
                continue
            if record is not None:
                records.append(record)
        self._awaiting.append(_Pending(work.message.token, records, self._last_seq))

    # --- applying parts (live and on journal replay) -------------------------------------

    def _apply(self, part: Part, message: Message | None) -> dict[str, Any] | None:
        """Apply one part; returns its journal record if it changed state."""
        if isinstance(part, ErrorPart):
            self._error(message, part.reason, part.detail)
            return None
        if isinstance(part, ReadingPart):
            return self._apply_readings(part, message)
        if isinstance(part, InputPart):
            for name in self.table.deliver_input(part.topic, part.time, part.value):
                self._dirty.add(name)
            self.counters.add("inputs")
            return {"t": "i", "topic": part.topic, "time": part.time, "value": part.value}
        return self._apply_control(part, message)

    def _apply_readings(self, part: ReadingPart, message: Message | None) -> dict[str, Any] | None:
        if part.template not in self.routes.templates:
            self._error(message, "unknown_topic", f"channel template {part.template!r} is gone")
            return None
        known = self.table.template_of(part.name)
        if known is not None and known != part.template:
            self._error(
                message,
                "name_collision",
                f"channel {part.name!r} already comes from template {known!r}; give the "
                "templates names that cannot collide",
            )
            return None
        channel = self.table.create(part.template, part.wildcards, part.name)
        if channel is None:
            self._error(
                message,
                "channel_limit",
                f"limits.max_channels ({self.table.max_channels}) reached; {part.name!r} "
                "not created",
            )
            return None
        applied = []
        for reading in part.readings:
            if reading.value is None:
                self.counters.add("skipped_no_value")
                continue
            if reading.time <= channel.last_time:
                self.counters.add("skipped_not_newer")
                if reading.time == channel.last_time:
                    self._publish_last_again(channel.name, reading.time)
                self._error(
                    message,
                    "not_newer",
                    f"reading at {reading.time!r} is not newer than the last one of "
                    f"{channel.name!r} ({channel.last_time!r}); a redelivery, a duplicate or "
                    "out of order: skipped",
                )
                continue
            self._process(channel, reading)
            applied.append([reading.time, reading.value, dict(reading.fields)])
        if not applied:
            return None
        self._dirty.add(channel.name)
        return {"t": "r", "c": part.template, "w": list(part.wildcards), "r": applied}

    def _process(self, channel: Channel, reading: Reading) -> None:
        assert reading.value is not None
        result, events = channel.process(Sample(reading.time, reading.value, reading.fields))
        self.counters.add("processed" if self._live else "replayed")
        if self._live:
            topic = f"{self.prefix}/{channel.name}/corrected"
            body = corrected_payload(result)
            self._remember_output(channel.name, result.time, body)
            self._send(topic, body)
            for sink in self.sinks:
                sink.corrected(channel, result)
        self._publish_alerts(channel, events)

    def _remember_output(self, name: str, time_: float, body: bytes) -> None:
        kept = self._last_output
        kept[name] = (time_, body)  # the topic is the name's
        kept.move_to_end(name)
        if len(kept) > self.table.max_resident:
            kept.popitem(last=False)

    def _publish_last_again(self, name: str, time_: float) -> None:
        """A redelivery of a channel's last reading: publish its output again, same bytes.

        Why: a broker killed (SIGKILL, power cut) can lose outputs it had acknowledged but
        not yet written to disk (Mosquitto saves periodically). Their readings' own
        acknowledgements came later still, so those readings are redelivered after its
        restart; the model must not apply them twice, but their outputs may be gone. The
        last reading of a channel is the one most at risk, and its output is remembered
        for the `limits.resident_channels` channels published most recently.
        Consumers de-duplicate on (channel, time) as for any QoS 1 resend.
        """
        last = self._last_output.get(name)
        if self._live and last is not None and last[0] == time_:
            self._send(f"{self.prefix}/{name}/corrected", last[1], counter="republished")

    def _apply_control(self, part: ControlPart, message: Message | None) -> dict[str, Any] | None:
        channel = self.table.get(part.channel)
        if channel is None:
            self._error(
                message,
                "unknown_channel",
                f"control for {part.channel!r}, which is not a channel (yet); channels: "
                f"{', '.join(sorted(self.table.names())) or 'none'}",
            )
            return None
        events = channel.control(part.event)
        self.counters.add("controls")
        self._publish_alerts(channel, events)
        self._dirty.add(channel.name)
        event = part.event
        return {"t": "c", "ch": channel.name, "e": [event.time, event.event, event.mode]}

    def _replay_record(self, record: dict[str, Any]) -> None:
        kind = record["t"]
        if kind == "r":
            readings = tuple(Reading(t, v, f) for t, v, f in record["r"])
            template = record["c"]
            if template not in self.routes.templates:
                return
            wildcards = tuple(record["w"])
            name = _fill_name(self.routes, template, wildcards)
            self._apply_readings(ReadingPart(template, name, wildcards, readings), None)
        elif kind == "i":
            self._apply(InputPart("", "", record["topic"], record["time"], record["value"]), None)
        elif kind == "c":
            time_, event, mode = record["e"]
            self._apply_control(ControlPart(record["ch"], ControlEvent(time_, event, mode)), None)

    # --- outputs --------------------------------------------------------------------------

    def _publish(self, topic: str, payload: Any, *, retain: bool = False) -> None:
        if not self._live:
            return
        self._send(topic, json.dumps(payload, allow_nan=False).encode(), retain=retain)

    def _send(
        self, topic: str, body: bytes, *, retain: bool = False, counter: str = "published"
    ) -> None:
        """Queue one output with the broker link (flushed once per batch, see `_step`)."""
        self._last_seq = self.broker.publish(topic, body, retain=retain)
        self.counters.add(counter)

    def _publish_alerts(self, channel: Channel, events: Iterable[AlertEvent]) -> None:
        for event in events:
            body = event.to_json()
            self._publish(f"{self.prefix}/{channel.name}/alert", body, retain=True)
            self._publish(f"{self.prefix}/{channel.name}/alert/{event.rule}", body, retain=True)
            self.counters.add("alerts")
            if self._live:
                for sink in self.sinks:
                    sink.alert(channel, event)

    def _error(self, message: Message | None, reason: str, detail: str) -> None:
        if message is None:  # replaying the journal: the error was reported the first time
            return
        self.counters.add(f"errors.{reason}")
        self.counters.add("errors")
        self._bad_input.warning(reason, f"bad input on {message.topic}: {reason}: {detail}")
        text = message.payload[: ERROR_PAYLOAD_CHARS * 4].decode("utf-8", "replace")
        body = {
            "time": message.arrival,
            "topic": message.topic,
            "reason": reason,
            "detail": detail,
            "payload": text[:ERROR_PAYLOAD_CHARS],
        }
        self._publish(f"{self.prefix}/error", body)

    def _publish_stats(self) -> bool:
        """The counters on `<prefix>/stats` every STATS_EVERY_S; True if published."""
        now = time.monotonic()
        if now - self._last_stats < STATS_EVERY_S:
            return False
        self._last_stats = now
        stats = {**self.counters.as_dict(), "channels": len(self.table)}
        stats["channels_parked"] = len(self.table.parked)  # restored or over the resident bound
        stats["channels_evicted"] = self.table.evicted
        stats["states_unreadable"] = self.table.unpark_failures
        stats["queue"] = self._queue.qsize()
        stats["awaiting_commit"] = len(self._awaiting) + self._committer.pending()
        self._publish(f"{self.prefix}/stats", stats, retain=True)
        return True

    # --- commits and snapshots ------------------------------------------------------------

    def _commit(self, *, force: bool) -> None:
        """Hand what is ready (outputs confirmed) to the committer, in batches: when
        `commit_batch` messages are ready, the oldest has waited COMMIT_DELAY_S, the
        queue has run dry for IDLE_COMMIT_S, or `force`."""
        if not self._awaiting:
            return
        confirmed = self.broker.confirmed()
        ready = 0
        for pending in self._awaiting:
            if pending.needs > confirmed:
                break
            ready += 1
        if not ready:
            return
        waited = time.monotonic() - self._awaiting[0].since
        idle = self._queue.empty() and waited >= IDLE_COMMIT_S
        if not (force or ready >= self._commit_batch or waited >= COMMIT_DELAY_S or idle):
            return
        batch = [self._awaiting.popleft() for _ in range(ready)]
        first = self._journal_seq + 1
        records: list[dict[str, Any]] = []
        for pending in batch:
            for record in pending.records:
                records.append({"s": first + len(records), **record})
        try:
            for sink in self.sinks:
                sink.commit()
        except OSError as error:
            # A sink that cannot make its data durable holds the acks, like the journal.
            self._awaiting.extendleft(reversed(batch))
            self.counters.add("sink_commit_errors")
            self._backlog_log.warning(
                "sink", f"an output cannot make its data durable ({error.strerror}); holding acks"
            )
            return
        self._journal_seq += len(records)
        self._journal_since_snapshot += len(records)
        self._committer.submit(Batch(records, [pending.token for pending in batch]))

    def _snapshot_due(self) -> bool:
        if self._journal_since_snapshot >= JOURNAL_SNAPSHOT_RECORDS:
            return True
        changed = bool(self._dirty) or self._snapshot_failed
        return changed and time.monotonic() - self._last_snapshot >= self.snapshot_every

    def _quiesce(self, timeout: float = QUIESCE_TIMEOUT_S, *, journal: bool = True) -> bool:
        """Hand every processed message to the committer (their outputs confirmed first)
        and, with `journal`, wait until it has written and acknowledged them all; False if
        that cannot happen now."""
        deadline = time.monotonic() + timeout
        while True:
            self._commit(force=True)
            if not self._awaiting and (not journal or self._committer.wait_drained(COMMIT_WAIT_S)):
                return True
            # A full queue may mean the network thread waits on us: never wait back.
            if self._queue.full() or time.monotonic() > deadline:
                self._last_snapshot = time.monotonic()  # try again one period later
                return False
            time.sleep(0.002)

    def snapshot(self) -> None:
        """Write every channel's state now (call only when nothing awaits a commit and the
        committer is idle: `_quiesce`).

        Every channel in use is packed each time (10,000 in about 0.15 s, see
        bench/RESULTS.md), so no per-channel copy of the state is kept in memory; parked
        channels are written as the rows they were restored from.
        """
        self._save_snapshot(*self._snapshot_contents())

    def _snapshot_in_background(self) -> None:
        """Pack every channel's state now and let the committer write it after the journal
        batches already handed to it (call only when nothing awaits a commit:
        `_quiesce(journal=False)`). The worker goes on meanwhile; the records it commits next are
        appended after the snapshot has emptied the journal (`Committer.run_in_order`)."""
        groups, meta = self._snapshot_contents()
        self._snapshot_writing = True  # one at a time: a slow disk must not pile them up
        self._committer.run_in_order(lambda: self._save_snapshot(groups, meta))

    def _snapshot_contents(self) -> tuple[list[SnapshotGroup], dict[str, Any]]:
        """Every channel's state and the snapshot's metadata, as of now; what changes from
        here on is the next snapshot's."""
        groups = self._snapshot_groups()
        meta = {
            "journal_seq": self._journal_seq,
            "saved_at": time.time(),
            "latest_inputs": self.table.latest_inputs(),
        }
        self._dirty.clear()
        self._journal_since_snapshot = 0
        self._last_snapshot = time.monotonic()
        self._snapshot_failed = False
        return groups, meta

    def _save_snapshot(self, groups: list[SnapshotGroup], meta: dict[str, Any]) -> None:
        """Write the snapshot and empty the journal it makes redundant (the worker's thread
        or the committer's; a failure leaves the journal as it is and is retried one
        snapshot period later)."""
        try:
            size = self.store.save_snapshot(groups, meta)
            self.store.reset_journal()
        except OSError as error:
            _log.error("cannot write the state snapshot (%s); will retry", error.strerror)
            self._snapshot_failed = True
            return
        finally:
            self._snapshot_writing = False
        self.counters.add("snapshots")
        _log.debug(
            "snapshot of %d channels, %d bytes in %.1f ms",
            sum(len(group.names) for group in groups),
            size,
            1000 * (self.store.last_snapshot_s or 0.0),
        )

    def _snapshot_groups(self) -> list[SnapshotGroup]:
        """Every channel's state, one group per template: channels in use packed now,
        parked ones (restored, not asked for since) as the rows they were restored from."""
        members: dict[str, list[tuple[str, Channel]]] = {}
        for name, channel in self.table.channels.items():
            template = self.table.template_of(name)
            assert template is not None  # every channel in use has its origin
            members.setdefault(template, []).append((name, channel))
        blocks: dict[str, tuple[list[str], list[PackedChannels]]] = {}
        for template, group in members.items():
            packed = pack_channels([channel for _, channel in group])
            blocks[template] = ([name for name, _ in group], [packed])
        for template, names, packed in self.table.parked_blocks():
            entry = blocks.setdefault(template, ([], []))
            entry[0].extend(names)
            entry[1].append(packed)
        wildcards_of = self.table.wildcards_of
        return [
            SnapshotGroup(template, names, [wildcards_of(n) for n in names], concatenated(parts))
            for template, (names, parts) in blocks.items()
        ]

    def restore(self) -> None:
        """Load the snapshot and replay the journal after it (no outputs)."""
        snapshot = self.store.load_snapshot() or Snapshot(meta={})
        self.table.load_latest_inputs(snapshot.meta.get("latest_inputs"))
        restored = 0
        for group in snapshot.groups:
            restored += self._restore_group(group)
        for name, entry in snapshot.legacy_channels.items():  # a version-1 JSON snapshot
            restored += self._restore_channel(str(name), entry)
        after = int(snapshot.meta.get("journal_seq", 0))
        self._journal_seq = after
        replayed = 0
        for record in self.store.read_journal(after):
            try:
                self._replay_record(record)
            except (KeyError, TypeError, ValueError, InputError) as error:
                _log.error("journal record %s cannot be applied (%s); skipped", record, error)
            self._journal_seq = max(self._journal_seq, int(record["s"]))
            replayed += 1
        if snapshot.meta or replayed:
            _log.info(
                "restored %d channel(s) from the snapshot and %d journal record(s)",
                restored,
                replayed,
            )

    def _restore_group(self, group: SnapshotGroup) -> int:
        config = self.routes.templates.get(group.template)
        if config is None:
            _log.warning(
                "%d channel(s) in the snapshot come from template %r, which is no longer "
                "configured; their state is dropped",
                len(group.names),
                group.template,
            )
            return 0
        try:
            packed = conformed(config, group.packed, len(group.names))
        except (KeyError, TypeError, ValueError, IndexError, InputError) as error:
            _log.warning(
                "%d channel(s) of template %r: saved state does not fit the configured model "
                "(%s); each starts fresh",
                len(group.names),
                group.template,
                error,
            )
            return 0
        self.table.park(group.template, group.names, group.wildcards, packed)
        self._dirty.update(group.names)
        return len(group.names)

    def _restore_channel(self, name: str, entry: Any) -> int:
        try:
            template = entry["template"]
            wildcards = tuple(str(w) for w in entry["wildcards"])
            config = self.routes.templates.get(template)
            if config is None:
                _log.warning(
                    "channel %r in the snapshot comes from template %r, which is no longer "
                    "configured; its state is dropped",
                    name,
                    template,
                )
                return 0
            channel = Channel(config, name)
            channel.load_state(entry["state"])
        except (KeyError, TypeError, ValueError, InputError) as error:
            _log.warning(
                "channel %r: saved state does not fit the configured model (%s); it starts fresh",
                name,
                error,
            )
            return 0
        self.table.adopt(channel, template, wildcards)
        self._dirty.add(name)
        return 1

    # --- reload ---------------------------------------------------------------------------

    def _apply_reload(self) -> None:
        with self._reload_lock:
            config = self._reload
        assert config is not None
        routes = Routes(config)
        table = _channel_table(routes, config)
        table.load_latest_inputs(self.table.latest_inputs())
        kept = fresh = dropped = 0
        wildcards_of = self.table.wildcards_of
        for template, names, packed in self.table.parked_blocks():
            new_config = routes.templates.get(template)
            if new_config is not None and packed.model == new_config.model_key():
                conformed_rows = conformed(new_config, packed, len(names))
                table.park(template, names, [wildcards_of(n) for n in names], conformed_rows)
                kept += len(names)
            elif new_config is None:
                dropped += len(names)
            else:
                for name in names:
                    table.adopt(Channel(new_config, name), template, wildcards_of(name))
                    _log.info("channel %r: its model changed; it starts fresh", name)
                fresh += len(names)
        for name, channel in self.table.channels.items():
            template, wildcards = self.table.origin_of(name)
            new_config = routes.templates.get(template)
            if new_config is None:
                dropped += 1
                continue
            if new_config.model_key() == channel.config.model_key():
                [replacement] = unpack_channels(new_config, [name], pack_channels([channel]))
                kept += 1
            else:
                replacement = Channel(new_config, name)
                fresh += 1
                _log.info("channel %r: its model changed; it starts fresh", name)
            table.adopt(replacement, template, wildcards)
        old_topics = self._subscribed
        self.config, self.routes, self.table = config, routes, table
        self.prefix = config.output_prefix
        self._dirty = set(table.names())
        new_topics = routes.subscriptions()
        self.broker.unsubscribe(sorted(old_topics - new_topics))
        self.broker.subscribe(sorted(new_topics - old_topics))
        self._subscribed = set(new_topics)
        _log.info(
            "config reloaded: %d channel(s) kept their state, %d start fresh, %d dropped",
            kept,
            fresh,
            dropped,
        )
        with self._reload_lock:  # done only now: whoever waits for it sees the new table
            if self._reload is config:
                self._reload = None

    # --- for tests and the status page ---------------------------------------------------

    def wait_idle(self, timeout: float, condition: Callable[[], bool] | None = None) -> bool:
        """Wait until every message received is committed and acknowledged (tests)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            done = self.counters.get("acked") == self.counters.get("received")
            if done and (condition is None or condition()):
                return True
            time.sleep(0.005)
        return False


def _channel_table(routes: Routes, config: Config) -> ChannelTable:
    limits = config.limits
    return ChannelTable(routes, int(limits["max_channels"]), int(limits["resident_channels"]))


def _fill_name(routes: Routes, template: str, wildcards: tuple[str, ...]) -> str:
    return fill(routes.templates[template].name, wildcards)
