"""The daemon's worker against a fake broker: routing, outputs, commits, restore, reload."""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from zeroline.channel import Channel, Sample, pack_channels
from zeroline.config import Config, parse_config
from zeroline.mqtt import Message
from zeroline.service import Service
from zeroline.state import LEGACY_SNAPSHOT_NAME, SNAPSHOT_NAME, StateStore

T0 = 1_780_000_000.0  # a fixed instant; arrival times are set to match


def config_text(
    state_dir: Path,
    *,
    basis: str = "[constant, {polynomial: {of: t, degree: 1, scale: 1d}}]",
    extra: str = "",
    max_channels: int = 100,
    resident_channels: int = 100,
) -> str:
    return f"""
state: {{dir: {state_dir}, snapshot_every: 3600s}}
limits: {{max_channels: {max_channels}, resident_channels: {resident_channels}, queue: 1000}}
channels:
  - name: "{{1}}-gas"
    topic: site/+/gas
    basis: {basis}
    inputs:
      temp: {{topic: "site/{{1}}/temp", max_age: 1h}}
    {extra}
"""


class FakeBroker:
    """A `BrokerLink` in memory: records publishes and acks; confirms on demand."""

    def __init__(self, *, auto_confirm: bool = True) -> None:
        self.auto_confirm = auto_confirm
        self.published: list[tuple[str, Any, bool]] = []
        self.acked: list[int] = []
        self.subscribed: set[str] = set()
        self._sequence = 0
        self._confirmed = 0
        self._next_token = 0
        self._lock = threading.Lock()
        self.on_message: Any = None

    def connect(self, on_message: Any, on_connect: Any) -> None:
        self.on_message = on_message
        on_connect()

    def subscribe(self, topics: Any) -> None:
        self.subscribed |= set(topics)

    def unsubscribe(self, topics: Any) -> None:
        self.subscribed -= set(topics)

    def publish(self, topic: str, payload: bytes, *, retain: bool = False) -> int:
        with self._lock:
            self._sequence += 1
            self.published.append((topic, json.loads(payload), retain))
            if self.auto_confirm:
                self._confirmed = self._sequence
            return self._sequence

    def confirm_all(self) -> None:
        with self._lock:
            self._confirmed = self._sequence

    def flush(self) -> None:
        """Publishes are recorded at once: nothing to send."""

    def confirmed(self) -> int:
        with self._lock:
            return self._confirmed

    def ack(self, token: Any) -> None:
        with self._lock:
            self.acked.append(token)

    def close(self) -> None:
        pass

    def deliver(self, topic: str, payload: bytes | str, arrival: float = T0) -> int:
        with self._lock:
            self._next_token += 1
            token = self._next_token
        data = payload.encode() if isinstance(payload, str) else payload
        self.on_message(Message(topic, data, arrival, token))
        return token

    def on(self, suffix: str) -> list[Any]:
        with self._lock:
            return [body for topic, body, _ in self.published if topic.endswith(suffix)]


def start(config: Config, broker: FakeBroker, state_dir: Path) -> Service:
    service = Service(config, broker, StateStore(state_dir))
    service.start()
    return service


def readings(n: int, seed: int = 7) -> list[tuple[float, float, float]]:
    """(time, value, temp): a drifting signal, 5-minute spacing (invented demo data)."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        t = T0 + 300.0 * i
        rows.append((t, 2.0 + 1e-5 * (t - T0) + rng.normal(0, 0.1), 20.0 + i % 7))
    return rows


def reading_payload(t: float, v: float) -> str:
    return json.dumps({"time": t, "value": v})


def assert_same_as_never_stopped(
    service: Service, config: Config, name: str, rows: list[tuple[float, float, float]]
) -> None:
    """The service's channel `name` equals, bit for bit, a channel fed every row directly."""
    direct = Channel(config.channels[0], name)
    for t, v, _ in rows:
        direct.process(Sample(t, v))
    channel = service.table.get(name)  # unpacked if it was restored or parked
    assert channel is not None
    assert np.array_equal(channel.estimator.coefficients, direct.estimator.coefficients)


@pytest.fixture()
def state_dir(tmp_path: Path) -> Path:
    return tmp_path / "state"


class TestRoundTrip:
    def test_corrected_equals_a_channel_fed_directly(self, state_dir: Path) -> None:
        """Readings through the service give exactly what the Channel class gives."""
        config = parse_config(config_text(state_dir))
        broker = FakeBroker()
        service = start(config, broker, state_dir)
        rows = readings(120)
        for t, v, _ in rows:
            broker.deliver("site/a/gas", reading_payload(t, v))
        assert service.wait_idle(10)
        direct = Channel(config.channels[0], "a-gas")
        expected = [direct.process(Sample(t, v))[0].to_json() for t, v, _ in rows]
        got = broker.on("a-gas/corrected")
        assert len(got) == len(rows)
        for mine, theirs in zip(got, expected, strict=True):
            assert mine["time"] == theirs["time"]
            assert mine["corrected"] == pytest.approx(theirs["corrected"], abs=1e-12)
        assert sorted(broker.acked) == list(range(1, len(rows) + 1))
        service.stop()

    def test_wildcard_makes_one_channel_per_topic(self, state_dir: Path) -> None:
        """site/+/gas with name {1}-gas creates a-gas and b-gas on first sight."""
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir)), broker, state_dir)
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        broker.deliver("site/b/gas", reading_payload(T0, 2.0))
        assert service.wait_idle(5)
        assert sorted(service.table.channels) == ["a-gas", "b-gas"]
        assert broker.on("b-gas/corrected")[0]["raw"] == 2.0
        service.stop()


class TestDelivery:
    def test_ack_waits_for_confirmed_outputs_and_the_journal(self, state_dir: Path) -> None:
        """No acknowledgement before the broker confirmed the outputs; then journal, then ack."""
        broker = FakeBroker(auto_confirm=False)
        service = start(parse_config(config_text(state_dir)), broker, state_dir)
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        assert service.wait_idle(0.5) is False  # the commit waits for the confirmation
        assert broker.acked == []
        assert (state_dir / "journal.jsonl").read_text() == ""
        broker.confirm_all()
        assert service.wait_idle(5)
        assert broker.acked == [1]
        record = json.loads((state_dir / "journal.jsonl").read_text())
        assert record["t"] == "r" and record["r"][0][:2] == [T0, 1.0]
        service.stop()

    def test_duplicate_and_out_of_order_are_skipped_and_reported(self, state_dir: Path) -> None:
        """A reading not newer than the last one is not applied, counted and reported; a
        repeat of the last one gets its output again, byte for byte (a broker that lost it
        in a crash redelivers the reading)."""
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir)), broker, state_dir)
        for t in (T0, T0 + 60, T0 + 60, T0 + 30, T0 + 120):
            broker.deliver("site/a/gas", reading_payload(t, 1.0))
        assert service.wait_idle(5)
        times = [c["time"] for c in broker.on("a-gas/corrected")]
        assert times == [T0, T0 + 60, T0 + 60, T0 + 120]
        outputs = [p for topic, p, _ in broker.published if topic.endswith("a-gas/corrected")]
        assert outputs[1] == outputs[2]
        assert service.counters.get("republished") == 1
        errors = broker.on("zeroline/error")
        assert [e["reason"] for e in errors] == ["not_newer", "not_newer"]
        assert service.counters.get("skipped_not_newer") == 2
        assert len(broker.acked) == 5  # skipped messages are acknowledged too
        service.stop()

    def test_last_outputs_are_kept_for_as_many_channels_as_may_be_resident(
        self, state_dir: Path
    ) -> None:
        """The kept outputs follow limits.resident_channels: the two channels published
        last get their output again on a repeat, the one before them (forgotten) does not,
        and the repeat is still skipped and reported."""
        broker = FakeBroker()
        text = config_text(state_dir, resident_channels=2)
        service = start(parse_config(text), broker, state_dir)
        for site in ("a", "b", "c"):
            broker.deliver(f"site/{site}/gas", reading_payload(T0, 1.0))
        for site in ("a", "b", "c"):
            broker.deliver(f"site/{site}/gas", reading_payload(T0, 1.0))
        assert service.wait_idle(5)
        assert list(service._last_output) == ["b-gas", "c-gas"]
        assert [len(broker.on(f"{s}-gas/corrected")) for s in "abc"] == [1, 2, 2]
        assert service.counters.get("republished") == 2
        assert service.counters.get("skipped_not_newer") == 3
        service.stop()

    def test_bad_payload_goes_to_the_error_topic_truncated(self, state_dir: Path) -> None:
        """Malformed JSON: error with topic, reason, detail and the first 200 characters."""
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir)), broker, state_dir)
        broker.deliver("site/a/gas", "{" + "x" * 500)
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        assert service.wait_idle(5)
        [error] = broker.on("zeroline/error")
        assert error["topic"] == "site/a/gas" and error["reason"] == "malformed_json"
        assert error["payload"] == ("{" + "x" * 500)[:200]
        assert error["detail"]
        assert service.counters.get("errors.malformed_json") == 1
        assert len(broker.on("a-gas/corrected")) == 1
        service.stop()

    def test_channel_limit_refuses_new_channels_with_a_log_line(
        self, state_dir: Path, caplog: pytest.LogCaptureFixture
    ) -> None:
        """Beyond limits.max_channels, readings of new channels are refused and counted."""
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir, max_channels=2)), broker, state_dir)
        with caplog.at_level(logging.WARNING):
            for site in "abcd":
                broker.deliver(f"site/{site}/gas", reading_payload(T0, 1.0))
            assert service.wait_idle(5)
        assert sorted(service.table.channels) == ["a-gas", "b-gas"]
        assert service.counters.get("errors.channel_limit") == 2
        assert sum("channel limit reached" in r.getMessage() for r in caplog.records) == 1
        service.stop()

    def test_input_before_its_channel_is_applied_at_creation(self, state_dir: Path) -> None:
        """A temperature that arrives before the channel exists is used by its first reading."""
        basis = "[constant, {polynomial: {of: temp, degree: 1, center: 20}}]"
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir, basis=basis)), broker, state_dir)
        broker.deliver("site/a/temp", json.dumps({"time": T0 - 10, "value": 25.0}))
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        assert service.wait_idle(5)
        [corrected] = broker.on("a-gas/corrected")
        assert corrected["quality"] != "input_stale"
        assert corrected["corrected"] is not None
        service.stop()

    def test_control_event_and_unknown_channel(self, state_dir: Path) -> None:
        """A control message reaches its channel; one for an unknown channel is an error."""
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir)), broker, state_dir)
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        broker.deliver("zeroline/a-gas/control", '{"event": "recalibrated"}')
        broker.deliver("zeroline/zz/control", '{"event": "recalibrated"}')
        broker.deliver("zeroline/a-gas/control", '{"event": "exploded"}')
        assert service.wait_idle(5)
        assert service.counters.get("controls") == 1
        reasons = [e["reason"] for e in broker.on("zeroline/error")]
        assert reasons == ["unknown_channel", "bad_control"]
        service.stop()


class TestState:
    def feed(self, broker: FakeBroker, rows: list[tuple[float, float, float]]) -> None:
        for t, v, _ in rows:
            broker.deliver("site/a/gas", reading_payload(t, v))

    def test_restart_after_stop_restores_from_the_snapshot(self, state_dir: Path) -> None:
        """stop() snapshots; a new service continues exactly where the old one stopped."""
        config = parse_config(config_text(state_dir))
        rows = readings(80)
        broker = FakeBroker()
        first = start(config, broker, state_dir)
        self.feed(broker, rows[:40])
        assert first.wait_idle(5)
        first.stop()
        assert (state_dir / SNAPSHOT_NAME).exists()
        broker2 = FakeBroker()
        second = start(config, broker2, state_dir)
        self.feed(broker2, rows[40:])
        assert second.wait_idle(5)
        assert_same_as_never_stopped(second, config, "a-gas", rows)
        second.stop()

    def test_crash_restores_from_snapshot_plus_journal(self, state_dir: Path) -> None:
        """Without a clean stop the journal carries what came after the last snapshot."""
        config = parse_config(config_text(state_dir))
        rows = readings(60)
        broker = FakeBroker()
        first = start(config, broker, state_dir)
        self.feed(broker, rows[:20])
        assert first.wait_idle(5)
        first._quiesce()
        first.snapshot()
        self.feed(broker, rows[20:45])
        assert first.wait_idle(5)
        # "crash": abandon the first service without stop(); its files stay as they are
        second = start(config, FakeBroker(), state_dir)
        assert second.table.channels["a-gas"].last_time == rows[44][0]
        direct = Channel(config.channels[0], "a-gas")
        for t, v, _ in rows[:45]:
            direct.process(Sample(t, v))
        got = second.table.channels["a-gas"].estimator.coefficients
        np.testing.assert_allclose(got, direct.estimator.coefficients, rtol=0, atol=1e-12)
        first._stop.set()
        second.stop()

    def test_a_periodic_snapshot_does_not_wait_for_the_journal(
        self, state_dir: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """With the journal's fsync stuck (a slow disk), a snapshot falls due: the worker
        packs it and goes on correcting readings; the committer writes it after the journal
        batches before it and empties the journal before the next. A crash afterwards
        restores snapshot + journal to exactly the state of a channel fed every reading."""
        import zeroline.service as service_module

        monkeypatch.setattr(service_module, "JOURNAL_SNAPSHOT_RECORDS", 10)
        config = parse_config(config_text(state_dir))
        rows = readings(30)
        broker = FakeBroker()
        first = start(config, broker, state_dir)
        real = first.store.append_journal
        disk = threading.Event()

        def slow_disk(records: list[dict[str, Any]]) -> None:
            disk.wait(10)
            real(records)

        monkeypatch.setattr(first.store, "append_journal", slow_disk)
        self.feed(broker, rows[:12])  # 12 journal records on their way: a snapshot is due
        deadline = time.monotonic() + 5  # until all 12 are handed to the stuck committer
        while first._committer.pending() < 12 and time.monotonic() < deadline:
            time.sleep(0.01)
        self.feed(broker, rows[12:20])
        deadline = time.monotonic() + 1.0  # a worker waiting for the disk would stall here
        while len(broker.on("a-gas/corrected")) < 20 and time.monotonic() < deadline:
            time.sleep(0.01)
        assert len(broker.on("a-gas/corrected")) == 20
        assert broker.acked == [] and first.counters.get("snapshots") == 0
        disk.set()
        assert first.wait_idle(5, lambda: first.counters.get("snapshots") == 1)
        snapshot = first.store.load_snapshot()
        assert snapshot is not None
        saved = int(snapshot.meta["journal_seq"])
        journal = [json.loads(line) for line in (state_dir / "journal.jsonl").open()]
        assert 12 <= saved < 20
        assert [record["s"] for record in journal] == list(range(saved + 1, 21))
        self.feed(broker, rows[20:])
        assert first.wait_idle(5)
        # Every reading is acknowledged, but the ten since the first snapshot made a second
        # one due, which the committer may still be writing (then it empties the journal).
        # A crashed daemon writes nothing more, so let it finish before the next one reads.
        assert first._committer.wait_drained(5)
        # "crash": abandon the first service without stop(); its files stay as they are
        second = start(config, FakeBroker(), state_dir)
        assert_same_as_never_stopped(second, config, "a-gas", rows)
        first._stop.set()
        second.stop()

    def test_a_failed_background_snapshot_keeps_the_journal_and_is_tried_again(
        self, state_dir: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        import zeroline.service as service_module

        monkeypatch.setattr(service_module, "JOURNAL_SNAPSHOT_RECORDS", 10)
        config = parse_config(config_text(state_dir))
        rows = readings(15)
        broker = FakeBroker()
        service = start(config, broker, state_dir)
        service.snapshot_every = 0.2  # the retry comes one period after the failure
        real = service.store.save_snapshot
        attempts: list[float] = []

        def full_disk_once(groups: Any, meta: Any) -> int:
            attempts.append(time.monotonic())
            if len(attempts) == 1:
                raise OSError(28, "No space left on device")
            return real(groups, meta)

        monkeypatch.setattr(service.store, "save_snapshot", full_disk_once)
        self.feed(broker, rows)
        assert service.wait_idle(5, lambda: len(attempts) == 1)
        assert service.counters.get("snapshots") == 0
        journal = (state_dir / "journal.jsonl").read_text().splitlines()
        assert len(journal) == 15  # nothing emptied by the failed snapshot
        assert service.wait_idle(5, lambda: service.counters.get("snapshots") == 1)
        assert len(attempts) == 2 and attempts[1] - attempts[0] >= 0.2
        assert (state_dir / "journal.jsonl").read_text() == ""
        again = start(config, FakeBroker(), state_dir)
        assert_same_as_never_stopped(again, config, "a-gas", rows)
        service._stop.set()
        again.stop()

    def test_a_json_snapshot_of_the_previous_version_is_upgraded(self, state_dir: Path) -> None:
        """A daemon upgraded in the field finds the version-1 `snapshot.json` (and its
        journal): its channels continue where they were, the next snapshot is binary and
        the JSON file is gone; a restart from that continues as well."""
        config = parse_config(config_text(state_dir))
        rows = readings(90)
        old = Channel(config.channels[0], "a-gas")
        for t, v, _ in rows[:30]:
            old.process(Sample(t, v))
        state_dir.mkdir(parents=True)
        document = {
            "format": "zeroline-snapshot",
            "version": 1,
            "journal_seq": 0,
            "saved_at": T0,
            "latest_inputs": {},
            "channels": {
                "a-gas": {"template": "{1}-gas", "wildcards": ["a"], "state": old.to_state()}
            },
        }
        (state_dir / LEGACY_SNAPSHOT_NAME).write_text(json.dumps(document))
        broker = FakeBroker()
        first = start(config, broker, state_dir)
        assert first.table.channels["a-gas"].last_time == rows[29][0]
        self.feed(broker, rows[30:60])
        assert first.wait_idle(5)
        first.stop()
        assert (state_dir / SNAPSHOT_NAME).exists()
        assert not (state_dir / LEGACY_SNAPSHOT_NAME).exists()
        broker2 = FakeBroker()
        second = start(config, broker2, state_dir)
        self.feed(broker2, rows[60:])
        assert second.wait_idle(5)
        direct = Channel(config.channels[0], "a-gas")
        direct.load_state(json.loads(json.dumps(old.to_state())))
        for t, v, _ in rows[30:]:
            direct.process(Sample(t, v))
        got = second.table.channels["a-gas"].estimator.coefficients
        assert np.array_equal(got, direct.estimator.coefficients)
        second.stop()

    def test_changed_model_starts_fresh_after_restart(
        self, state_dir: Path, caplog: pytest.LogCaptureFixture
    ) -> None:
        """A snapshot for another basis is not forced onto the new model: fresh, logged."""
        broker = FakeBroker()
        first = start(parse_config(config_text(state_dir)), broker, state_dir)
        self.feed(broker, readings(10))
        assert first.wait_idle(5)
        first.stop()
        with caplog.at_level(logging.WARNING):
            second = start(
                parse_config(config_text(state_dir, basis="[constant]")), FakeBroker(), state_dir
            )
        assert "a-gas" not in second.table.channels
        assert any("starts fresh" in r.getMessage() for r in caplog.records)
        second.stop()


class TestParked:
    """Restored channels stay packed rows until something asks for them."""

    def two_channels(self, state_dir: Path) -> tuple[Config, list[tuple[float, float, float]]]:
        config = parse_config(config_text(state_dir))
        rows = readings(60)
        broker = FakeBroker()
        first = start(config, broker, state_dir)
        for t, v, _ in rows[:30]:
            broker.deliver("site/a/gas", reading_payload(t, v))
            broker.deliver("site/b/gas", reading_payload(t, v + 1.0))
        assert first.wait_idle(5)
        first.stop()
        return config, rows

    def test_restore_parks_and_a_reading_unpacks_exactly(self, state_dir: Path) -> None:
        config, rows = self.two_channels(state_dir)
        broker = FakeBroker()
        second = start(config, broker, state_dir)
        assert second.table.channels == {}
        assert sorted(second.table.parked) == ["a-gas", "b-gas"]
        assert len(second.table) == 2
        for t, v, _ in rows[30:]:
            broker.deliver("site/a/gas", reading_payload(t, v))
        assert second.wait_idle(5)
        assert sorted(second.table.channels) == ["a-gas"]
        assert_same_as_never_stopped(second, config, "a-gas", rows)
        second.stop()

    def test_a_parked_channel_is_saved_as_it_was_restored(self, state_dir: Path) -> None:
        """A snapshot written while b is parked holds b's restored row bit for bit, and a
        third start continues b exactly."""
        config, rows = self.two_channels(state_dir)
        saved = StateStore(state_dir).load_snapshot()
        assert saved is not None
        [group] = saved.groups
        b_row = group.packed.rows[group.names.index("b-gas")].copy()
        broker = FakeBroker()
        second = start(config, broker, state_dir)
        broker.deliver("site/a/gas", reading_payload(rows[30][0], rows[30][1]))
        assert second.wait_idle(5)
        second.stop()
        again = StateStore(state_dir).load_snapshot()
        assert again is not None
        [group] = again.groups
        assert sorted(group.names) == ["a-gas", "b-gas"]
        assert group.packed.rows[group.names.index("b-gas")].tobytes() == b_row.tobytes()
        broker3 = FakeBroker()
        third = start(config, broker3, state_dir)
        for t, v, _ in rows[30:]:
            broker3.deliver("site/b/gas", reading_payload(t, v + 1.0))
        assert third.wait_idle(5)
        b_rows = [(t, v + 1.0, temp) for t, v, temp in rows]
        assert_same_as_never_stopped(third, config, "b-gas", b_rows)
        third.stop()

    def test_an_input_value_unpacks_the_channel_that_reads_it(self, state_dir: Path) -> None:
        config, _ = self.two_channels(state_dir)
        broker = FakeBroker()
        second = start(config, broker, state_dir)
        broker.deliver("site/b/temp", json.dumps({"time": T0 + 100.0, "value": 21.5}))
        assert second.wait_idle(5)
        assert sorted(second.table.channels) == ["b-gas"]
        assert "a-gas" in second.table.parked
        second.stop()

    def test_the_status_view_of_a_parked_channel_leaves_it_parked(self, state_dir: Path) -> None:
        config, rows = self.two_channels(state_dir)
        second = start(config, FakeBroker(), state_dir)
        seen = second.table.view("b-gas")
        assert seen is not None and seen.last_time == rows[29][0]
        assert second.table.view("c-gas") is None
        assert sorted(second.table.parked) == ["a-gas", "b-gas"]
        assert sorted(second.table.names()) == ["a-gas", "b-gas"]
        second.stop()

    def test_reload_keeps_parked_channels_parked(self, state_dir: Path) -> None:
        config, rows = self.two_channels(state_dir)
        second = start(config, FakeBroker(), state_dir)
        second.request_reload(
            parse_config(config_text(state_dir, extra="alerts: {drift_limit: 1}"))
        )
        assert second.wait_idle(5, lambda: second._reload is None)
        assert sorted(second.table.parked) == ["a-gas", "b-gas"]
        assert second.table.get("a-gas").last_time == rows[29][0]  # type: ignore[union-attr]
        second.request_reload(parse_config(config_text(state_dir, basis="[constant]")))
        assert second.wait_idle(5, lambda: second._reload is None)
        assert second.table.parked == {}
        assert second.table.channels["b-gas"].last_time == -math.inf  # model changed: fresh
        second.stop()

    def test_an_unreadable_row_starts_fresh_and_is_counted(
        self, state_dir: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
    ) -> None:
        from zeroline import router
        from zeroline.errors import InputError

        config, rows = self.two_channels(state_dir)
        broker = FakeBroker()
        second = start(config, broker, state_dir)

        def unreadable(*_: Any) -> Any:
            raise InputError("a row of NaN")

        monkeypatch.setattr(router, "unpack_channels", unreadable)
        with caplog.at_level(logging.WARNING):
            broker.deliver("site/a/gas", reading_payload(rows[40][0], rows[40][1]))
            assert second.wait_idle(5)
        assert second.table.unpark_failures == 1
        assert second.table.channels["a-gas"].last_time == rows[40][0]  # fresh, then fed
        assert any("cannot be read (a row of NaN)" in r.getMessage() for r in caplog.records)
        second.stop()


class TestResidentBound:
    """Beyond `limits.resident_channels` the least recently used channels are parked; since
    packing is exact (the snapshot tests), nothing anyone can observe changes."""

    SITES = tuple(f"s{i}" for i in range(10))
    BASIS = (
        "[constant, {polynomial: {of: t, degree: 1, scale: 1d}}, "
        "{polynomial: {of: temp, degree: 1, center: 20}}]"
    )

    def feed(self, state_dir: Path, resident: int, rows: list[tuple[float, float, float]]) -> Any:
        config = parse_config(config_text(state_dir, basis=self.BASIS, resident_channels=resident))
        broker = FakeBroker()
        service = start(config, broker, state_dir)
        most_resident = 0
        for k, (t, v, temp) in enumerate(rows):
            for i, site in enumerate(self.SITES):
                if (k + i) % 3 == 0:  # each channel's inputs now and then, out of step
                    broker.deliver(f"site/{site}/temp", json.dumps({"time": t, "value": temp}))
                broker.deliver(f"site/{site}/gas", reading_payload(t, v + 0.1 * i))
            assert service.wait_idle(5)
            most_resident = max(most_resident, len(service.table.channels))
        return config, broker, service, most_resident

    def test_outputs_are_those_of_an_unbounded_daemon(self, tmp_path: Path) -> None:
        rows = readings(40)
        _, free, unbounded, _ = self.feed(tmp_path / "free", 100, rows)
        _, tight, bounded, most_resident = self.feed(tmp_path / "tight", 3, rows)
        assert most_resident <= 3 and len(bounded.table) == 10
        assert bounded.table.evicted > 300  # nearly every reading found its channel parked
        for site in self.SITES:
            got = tight.on(f"{site}-gas/corrected")
            assert len(got) == len(rows) and got == free.on(f"{site}-gas/corrected")
        assert tight.on("/alerts") == free.on("/alerts")
        bounded.stop()
        unbounded.stop()

    def test_a_restart_continues_parked_channels_exactly(self, state_dir: Path) -> None:
        rows = readings(50)
        config, _, service, _ = self.feed(state_dir, 4, rows[:30])
        service.stop()
        config, _, again, _ = self.feed(state_dir, 4, rows[30:])
        for i, site in enumerate(self.SITES):
            mine = [(t, v + 0.1 * i, temp) for t, v, temp in rows]
            channel = again.table.get(f"{site}-gas")
            assert channel is not None
            direct = Channel(config.channels[0], f"{site}-gas")
            for k, (t, v, temp) in enumerate(mine):
                if (k % 30 + i) % 3 == 0:
                    direct.set_input("temp", t, temp)
                direct.process(Sample(t, v))
            got, expected = channel.estimator.coefficients, direct.estimator.coefficients
            assert got.tobytes() == expected.tobytes()
        again.stop()

    def test_parked_rows_take_freed_slots(self, tmp_path: Path) -> None:
        """Channels parked and unparked over and over reuse the slots their template's store
        freed: it holds as many slots as channels were ever parked at once (in arrays of 8
        and 16 rows), and every parked row is, bit for bit, what the same channel of a daemon
        that never parked it packs to."""
        rows = readings(20)
        _, _, service, _ = self.feed(tmp_path / "tight", 3, rows)
        _, _, unbounded, _ = self.feed(tmp_path / "free", 100, rows)
        table = service.table
        assert table.evicted > 100 and len(table.parked) == 7
        [store] = table._stores.values()
        assert len(store) == 7 and store._names.count(None) + 7 == len(store._names) <= 10
        assert store.capacity == (8 + 16 if len(store._names) > 8 else 8)  # arrays of 8, 16
        [(_, names, packed)] = table.parked_blocks()
        assert sorted(names) == sorted(table.parked)
        for name, row in zip(names, packed.rows, strict=True):
            expected = pack_channels([unbounded.table.channels[name]]).rows[0]
            assert row.tobytes() == expected.tobytes()
        service.stop()
        unbounded.stop()

    def test_the_status_view_reads_the_right_row_while_slots_are_reused(
        self, state_dir: Path
    ) -> None:
        """The status page's thread views channels while the worker parks and unparks them
        under a bound of 2 (slots are freed and taken again all the time): every view is
        the channel asked for, never a row another channel has since been parked into.
        Channel i's readings sit at 10·i, so its baseline's constant term names it."""
        config = parse_config(config_text(state_dir, resident_channels=2))
        broker = FakeBroker()
        service = start(config, broker, state_dir)
        sites = [f"v{i}" for i in range(8)]
        for k in range(6):
            for i, site in enumerate(sites):
                broker.deliver(f"site/{site}/gas", reading_payload(T0 + 60.0 * k, 10.0 * i))
        assert service.wait_idle(10)
        wrong: list[tuple[str, float]] = []
        views = 0
        done = threading.Event()

        def look() -> None:
            nonlocal views
            while not done.is_set():
                for i, site in enumerate(sites):
                    channel = service.table.view(f"{site}-gas")
                    if channel is None:
                        continue
                    views += 1
                    level = float(channel.estimator.coefficients[0])
                    if abs(level - 10.0 * i) > 1.0:
                        wrong.append((site, level))

        viewer = threading.Thread(target=look)
        viewer.start()
        for k in range(6, 40):
            for i, site in enumerate(sites):
                broker.deliver(f"site/{site}/gas", reading_payload(T0 + 60.0 * k, 10.0 * i))
        assert service.wait_idle(10)
        done.set()
        viewer.join()
        assert service.table.evicted > 200 and views > 100
        assert wrong == []
        service.stop()

    def test_an_idle_worker_trims_the_heap_after_many_moves(
        self, state_dir: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """Once TRIM_AFTER_CHANNELS channels were made or parked, the next idle moment
        hands the heap's free pages back, once; idle moments without moves do not."""
        import zeroline.service as service_module

        trims: list[float] = []
        monkeypatch.setattr(service_module, "TRIM_AFTER_CHANNELS", 10)
        monkeypatch.setattr(service_module, "give_back_free_pages", lambda: trims.append(1.0))
        config = parse_config(config_text(state_dir, resident_channels=2))
        broker = FakeBroker()
        service = start(config, broker, state_dir)
        for i in range(4):  # 4 made, 2 of them parked: 6 moves
            broker.deliver(f"site/t{i}/gas", reading_payload(T0, 1.0))
        assert service.wait_idle(5)
        time.sleep(0.2)  # ten idle ticks
        assert trims == []
        for i in range(4, 8):  # 4 more made, 4 more parked: 14
            broker.deliver(f"site/t{i}/gas", reading_payload(T0, 1.0))
        assert service.wait_idle(5, lambda: len(trims) == 1)
        time.sleep(0.2)
        assert len(trims) == 1 and service.table.evicted >= 6
        service.stop()


class TestReload:
    def test_reload_keeps_unchanged_models_and_resets_changed_ones(self, state_dir: Path) -> None:
        """SIGHUP semantics: same model_key keeps its state, a changed one starts over."""
        text = (
            config_text(state_dir)
            + """
  - name: "{1}-ph"
    topic: site/+/ph
    basis: [constant]
"""
        )
        broker = FakeBroker()
        service = start(parse_config(text), broker, state_dir)
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        broker.deliver("site/a/ph", reading_payload(T0, 7.0))
        assert service.wait_idle(5)
        changed = text.replace(
            "basis: [constant]\n",
            "basis: [constant, {polynomial: {of: t, degree: 1, scale: 1d}}]\n",
        )
        service.request_reload(parse_config(changed))
        assert service.wait_idle(5, lambda: service._reload is None)
        assert service.table.channels["a-gas"].last_time == T0  # kept
        assert service.table.channels["a-ph"].last_time == -math.inf  # fresh
        service.stop()

    def test_reload_applies_new_alert_settings_to_kept_models(self, state_dir: Path) -> None:
        """Alert settings are not part of the model: a kept channel keeps its estimator
        (bit for bit) and takes the new limits, a new rule included."""
        text = config_text(state_dir, extra="alerts: {drift_limit: 5.0}")
        broker = FakeBroker()
        service = start(parse_config(text), broker, state_dir)
        for t, v, _ in readings(30):
            broker.deliver("site/a/gas", reading_payload(t, v))
        assert service.wait_idle(5)
        before = service.table.channels["a-gas"].estimator.coefficients
        changed = text.replace("{drift_limit: 5.0}", "{drift_limit: 0.5, rate_limit: 1/d}")
        service.request_reload(parse_config(changed))
        assert service.wait_idle(5, lambda: service._reload is None)
        kept = service.table.channels["a-gas"]
        assert np.array_equal(kept.estimator.coefficients, before)
        rules = kept.alerts.book.rules
        assert rules["drift_limit"].limit == 0.5  # type: ignore[attr-defined]
        assert "rate_limit" in rules
        service.stop()


class TestOutputs:
    def test_alerts_are_retained_on_the_channel_and_per_rule_topics(self, state_dir: Path) -> None:
        """A drift beyond the limit: the event on <ch>/alert and <ch>/alert/drift_limit,
        both retained, in the alert contract's shape."""
        extra = "alerts: {drift_limit: 0.5, dwell: 0s}\n    learn: {min_samples: 4}"
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir, extra=extra)), broker, state_dir)
        for i in range(60):
            broker.deliver("site/a/gas", reading_payload(T0 + 3600.0 * i, 0.05 * i))
        assert service.wait_idle(10)
        retained = {topic: body for topic, body, retain in broker.published if retain}
        event = retained["zeroline/a-gas/alert/drift_limit"]
        assert event["state"] == "raised" and event["rule"] == "drift_limit"
        assert set(event) == {
            "time",
            "channel",
            "rule",
            "state",
            "value",
            "limit",
            "severity",
            "message",
        }
        assert "zeroline/a-gas/alert" in retained
        assert not any(retain for topic, _, retain in broker.published if "corrected" in topic)
        service.stop()

    def test_stats_are_published_retained(self, state_dir: Path) -> None:
        """<prefix>/stats carries the counters (retained) for operators and tests."""
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir)), broker, state_dir)
        broker.deliver("site/a/gas", "nonsense")
        assert service.wait_idle(5)
        assert service.wait_idle(3, lambda: bool(broker.on("zeroline/stats")))
        stats = broker.on("zeroline/stats")[-1]
        assert stats["errors.malformed_json"] == 1
        service.stop()


class TestLogs:
    def test_json_lines_and_rate_limited_repeats(self) -> None:
        """JSON format: one object a line; a repeated cause is logged once per interval."""
        import io

        from zeroline.logs import RateLimitedLogger, setup_logging

        stream = io.StringIO()
        root = logging.getLogger()
        saved, level = list(root.handlers), root.level
        setup_logging("json", "info", stream)
        try:
            limiter = RateLimitedLogger(logging.getLogger("zeroline.test"), interval_s=60)
            for _ in range(5):
                limiter.warning("bad", "bad input on x")
        finally:
            root.handlers[:] = saved
            root.setLevel(level)
        lines = stream.getvalue().splitlines()
        assert len(lines) == 1
        entry = json.loads(lines[0])
        assert entry["level"] == "warning" and entry["message"] == "bad input on x"
        assert entry["time"].endswith("Z")


class TestSinks:
    def test_sink_gets_every_reading_and_commits_before_the_ack(self, state_dir: Path) -> None:
        """An OutputSink sees each corrected reading; its commit() precedes the broker ack."""
        broker = FakeBroker()
        order: list[str] = []

        class Sink:
            def __init__(self) -> None:
                self.times: list[float] = []

            def corrected(self, channel: Any, result: Any) -> None:
                self.times.append(result.time)

            def alert(self, channel: Any, event: Any) -> None:
                pass

            def commit(self) -> None:
                order.append(f"commit after {len(broker.acked)} acks")

            def close(self) -> None:
                order.append("close")

        sink = Sink()
        service = Service(
            parse_config(config_text(state_dir)), broker, StateStore(state_dir), sinks=[sink]
        )
        service.start()
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        assert service.wait_idle(5)
        assert sink.times == [T0]
        assert order[0] == "commit after 0 acks" and broker.acked == [1]
        service.stop()
        assert order[-1] == "close"


class TestDiskTrouble:
    def test_journal_failure_holds_the_acks_and_retries(
        self, state_dir: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """A failing journal write acknowledges nothing; once it works, everything is acked."""
        broker = FakeBroker()
        service = start(parse_config(config_text(state_dir)), broker, state_dir)
        real = service.store.append_journal
        failures = {"left": 3}

        def flaky(records: list[dict[str, Any]]) -> None:
            if failures["left"]:
                failures["left"] -= 1
                raise OSError(28, "No space left on device")
            real(records)

        monkeypatch.setattr(service.store, "append_journal", flaky)
        broker.deliver("site/a/gas", reading_payload(T0, 1.0))
        broker.deliver("site/a/gas", reading_payload(T0 + 60, 1.1))
        assert service.wait_idle(5)
        assert service.counters.get("journal_errors") == 3
        assert sorted(broker.acked) == [1, 2]
        lines = (state_dir / "journal.jsonl").read_text().splitlines()
        assert [json.loads(line)["s"] for line in lines] == [1, 2]
        service.stop()
