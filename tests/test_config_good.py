"""Good configs load into frozen, typed objects with the values converted as documented.

`DESIGN_EXAMPLE` is the configuration example of design §5 (the contract for config keys),
with the two `{1}` placeholders inside flow mappings quoted as the README's troubleshooting
section explains, and the `...` of the TLS line replaced by paths. Durations become seconds,
rates become units per second, and every key left out takes its documented default.
"""

from __future__ import annotations

import dataclasses
import textwrap
from collections.abc import Callable
from datetime import datetime, timezone
from typing import Any

import pytest

from zeroline.config import Config, parse_config

DAY = 86400.0

DESIGN_EXAMPLE = """\
broker:                      # daemon only
  host: 127.0.0.1
  port: 1883
  protocol: 5                # or 3.1.1
  client_id: zeroline-gw01
  username: gw01             # optional
  password_file: /etc/zeroline/broker.pass   # secrets come from files or the environment
  tls: {ca_file: /etc/zeroline/ca.pem, cert_file: /etc/zeroline/gw.pem, key_file: gw.key}
output: {prefix: zeroline}
state: {dir: /var/lib/zeroline, snapshot_every: 60s}
http: {listen: 127.0.0.1:8470}   # status page, /health, /metrics
timeseries:                  # optional
  url: http://127.0.0.1:8086
  org: field
  bucket: sensors
  token_file: /etc/zeroline/tsdb.token
  spool_dir: /var/lib/zeroline/spool

basis_sets:                  # named, reusable basis lists (section 2)
  slow_drift:
    - constant
    - polynomial: {of: t, degree: 2, scale: 30d}
    - periodic: {of: t, period: 24h, harmonics: 1}

channels:
  - name: "{1}-no2"          # with + wildcards in topic: one channel per matching topic,
    topic: site/+/no2/raw    #   {1}, {2}, ... are the matched levels
    payload: json            # json {"time": ..., "value": ...} | senml | number
    basis: slow_drift        # a basis set's name, or an inline list
    gain: [constant]         # optional gain basis; only with learn.mode: reference
    inputs:                  # named inputs usable in basis terms and as the reference
      temperature: {topic: "site/{1}/met/temp", max_age: 10m}
      reference: {topic: "site/{1}/no2/check", max_age: 0s}   # or {field: check_value}: a
                             #   field of the channel's own payload (zero/span check samples)
    learn: {mode: reference, input: reference}   # all (+ nominal: 0) | reference | envelope
    memory: {half_life: 7d}  # or {window: 14d}
    alerts:
      drift_limit: 15        # |baseline| beyond this (engineering units)
      rate_limit: 2/d        # |d baseline / dt| beyond this
      horizon: 14d           # warn when the forecast crosses drift_limit within this
"""

MINIMAL = """\
channels:
  - name: cell
    topic: lab/cell
    basis: [constant]
"""


@pytest.fixture(scope="module")
def design() -> Config:
    return parse_config(DESIGN_EXAMPLE, "design.yaml")


def test_design_example_broker(design: Config) -> None:
    """Given broker keys keep their values; protocol 5 (a YAML number) becomes the text "5"."""
    assert dict(design.broker) == {
        "host": "127.0.0.1",
        "port": 1883,
        "protocol": "5",
        "client_id": "zeroline-gw01",
        "username": "gw01",
        "password_file": "/etc/zeroline/broker.pass",
        "password_env": None,
        "tls": {
            "ca_file": "/etc/zeroline/ca.pem",
            "cert_file": "/etc/zeroline/gw.pem",
            "key_file": "gw.key",
        },
        "keepalive": 60.0,
        "session_expiry": 7 * DAY,
        "inflight": 100,
    }


def test_design_example_top_level_sections(design: Config) -> None:
    """Output prefix, state, http and the time-series database, defaults filled in."""
    assert design.path == "design.yaml"
    assert design.output_prefix == "zeroline"
    assert dict(design.state) == {"dir": "/var/lib/zeroline", "snapshot_every": 60.0}
    assert dict(design.http) == {"listen": "127.0.0.1:8470", "token_file": None}
    assert design.timeseries is not None
    assert dict(design.timeseries) == {
        "url": "http://127.0.0.1:8086",
        "org": "field",
        "bucket": "sensors",
        "token_file": "/etc/zeroline/tsdb.token",
        "token_env": None,
        "spool_dir": "/var/lib/zeroline/spool",
        "spool_max_bytes": 268435456,
        "batch_size": 5000,
        "flush_every": 1.0,
    }
    assert dict(design.logging) == {"format": "text", "level": "info"}
    assert dict(design.limits) == {
        "max_channels": 10000,
        "resident_channels": 2000,
        "queue": 2000,
        "max_payload_bytes": 65536,
    }


def test_design_example_channel(design: Config) -> None:
    """The channel keeps its placeholders; the basis set is resolved into its columns."""
    (channel,) = design.channels
    assert design.channel("{1}-no2") is channel
    assert (channel.name, channel.topic, channel.payload) == ("{1}-no2", "site/+/no2/raw", "json")
    assert (channel.time_field, channel.value_field, channel.time_unit) == ("time", "value", "auto")
    assert channel.senml_name is None and dict(channel.labels) == {} and channel.epoch is None
    assert channel.basis.names == (
        "constant",
        "t/30d",
        "(t/30d)^2",
        "sin(2π·t/24h)",
        "cos(2π·t/24h)",
    )
    assert channel.basis_spec == [
        "constant",
        {"polynomial": {"of": "t", "degree": 2, "scale": "30d"}},
        {"periodic": {"of": "t", "period": "24h", "harmonics": 1}},
    ]
    assert channel.gain is not None and channel.gain.names == ("constant",)
    assert channel.gain_spec == ["constant"]
    assert channel.cap is None and channel.ill_conditioned_above == 1e8


def test_design_example_inputs(design: Config) -> None:
    """max_age durations become seconds; 0s is allowed (a reference is never stale-checked)."""
    inputs = design.channels[0].inputs
    assert list(inputs) == ["temperature", "reference"]
    temperature, reference = inputs["temperature"], inputs["reference"]
    assert (temperature.topic, temperature.field, temperature.max_age) == (
        "site/{1}/met/temp",
        None,
        600.0,
    )
    assert (reference.topic, reference.max_age, reference.payload) == (
        "site/{1}/no2/check",
        0.0,
        "json",
    )


def test_design_example_learn_memory_alerts(design: Config) -> None:
    """7d → 604800 s, 14d → 1209600 s, 2/d → 2/86400 per second; the rest are defaults."""
    channel = design.channels[0]
    learn = channel.learn
    assert (learn.mode, learn.input, learn.nominal, learn.robust) == (
        "reference",
        "reference",
        0.0,
        False,
    )
    assert (learn.huber_k, learn.envelope_k, learn.envelope_weight) == (1.345, 2.0, 0.01)
    assert (learn.min_samples, learn.max_gap) == (0, 3 * DAY)
    assert dataclasses.asdict(channel.memory) == {
        "half_life": 7 * DAY,
        "window": None,
        "prior_sd": 1000.0,
    }
    alerts = channel.alerts
    assert alerts.drift_limit == 15.0
    assert alerts.rate_limit == pytest.approx(2.0 / DAY, rel=1e-15)
    assert alerts.horizon == 14 * DAY
    assert (alerts.clear_fraction, alerts.dwell) == (0.8, 3600.0)
    assert (alerts.cusum_k, alerts.cusum_h, alerts.residual_change) == (0.5, 8.0, True)
    assert alerts.check is None
    assert dict(alerts.severity) == {
        "drift_limit": "warning",
        "rate_limit": "warning",
        "forecast": "info",
        "residual_change": "warning",
        "check_failures": "critical",
        "correction_cap": "critical",
        "model_health": "warning",
    }


def test_config_objects_are_frozen(design: Config) -> None:
    """Config is parsed once; nothing downstream can change it by accident."""
    with pytest.raises(dataclasses.FrozenInstanceError):
        design.output_prefix = "other"  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        design.channels[0].learn.mode = "all"  # type: ignore[misc]
    assert isinstance(design.channels, tuple)


def test_minimal_config_takes_every_default() -> None:
    """Only the three required channel keys: every section exists with its defaults."""
    config = parse_config(MINIMAL, "minimal.yaml")
    assert config.broker["host"] == "127.0.0.1" and config.broker["port"] == 1883
    assert config.broker["protocol"] == "5" and config.broker["client_id"] == "zeroline"
    assert config.timeseries is None
    assert config.state == {"dir": "/var/lib/zeroline", "snapshot_every": 60.0}
    (channel,) = config.channels
    assert channel.inputs == {} and channel.gain is None
    assert channel.learn.mode == "all" and channel.learn.nominal == 0.0
    # No memory given: exponential forgetting with a half-life of 7 days.
    assert (channel.memory.half_life, channel.memory.window) == (7 * DAY, None)
    assert channel.alerts.drift_limit is None and channel.alerts.rate_limit is None


def _with(text: str, old: str, new: str) -> str:
    assert text.count(old) == 1, old
    return text.replace(old, new)


# The alternatives the design's comments name, each applied to the design example:
# (id, text replaced, replacement, where the value lands, the value expected there).
ALTERNATIVES: list[tuple[str, str, str, Callable[[Config], Any], Any]] = [
    ("protocol 3.1.1", "protocol: 5 ", "protocol: 3.1.1 ", lambda c: c.broker["protocol"], "3.1.1"),
    (
        "payload senml",
        "payload: json ",
        "payload: senml ",
        lambda c: c.channels[0].payload,
        "senml",
    ),
    (
        "payload number",
        "payload: json ",
        "payload: number ",
        lambda c: c.channels[0].payload,
        "number",
    ),
    (
        "reference as a payload field",
        'reference: {topic: "site/{1}/no2/check", max_age: 0s}',
        "reference: {field: check_value}",
        lambda c: c.channels[0].inputs["reference"].field,
        "check_value",
    ),
    (
        "window instead of half_life",
        "memory: {half_life: 7d}",
        "memory: {window: 14d}",
        lambda c: (c.channels[0].memory.window, c.channels[0].memory.half_life),
        (14 * DAY, None),
    ),
    (
        "inline basis",
        "basis: slow_drift ",
        "basis: [constant, {polynomial: {of: t, degree: 1}}] ",
        lambda c: c.channels[0].basis.names,
        ("constant", "t"),
    ),
]


@pytest.mark.parametrize(
    ("old", "new", "read", "expected"),
    [alt[1:] for alt in ALTERNATIVES],
    ids=[alt[0] for alt in ALTERNATIVES],
)
def test_design_alternatives_are_accepted(
    old: str, new: str, read: Callable[[Config], Any], expected: Any
) -> None:
    """Every alternative the design's comments offer loads, with the value it says."""
    assert read(parse_config(_with(DESIGN_EXAMPLE, old, new), "design.yaml")) == expected


@pytest.mark.parametrize("mode", ["all", "envelope"])
def test_learn_modes_without_reference(mode: str) -> None:
    """`all` (with nominal) and `envelope` need no reference input and take no gain."""
    text = _with(
        DESIGN_EXAMPLE,
        "learn: {mode: reference, input: reference}",
        f"learn: {{mode: {mode}, nominal: 3}}",
    )
    text = _with(
        text,
        "    gain: [constant]         # optional gain basis; only with learn.mode: reference\n",
        "",
    )
    channel = parse_config(text, "design.yaml").channels[0]
    assert (channel.learn.mode, channel.learn.nominal, channel.gain) == (mode, 3.0, None)


def test_every_section_and_duration_spelling() -> None:
    """A config using the less common keys: units m/min/h/w/y, epoch, labels, check, cap."""
    text = textwrap.dedent(
        """\
        http: {listen: "0.0.0.0:8470", token_file: /etc/zeroline/http.token}
        broker: {username: gw01, password_env: ZEROLINE_BROKER_PASSWORD, keepalive: 90s}
        logging: {format: json, level: debug}
        channels:
          - name: "{2}-{1}"
            topic: plant/+/+/pressure
            payload: senml
            senml_name: urn:dev:pt1
            labels: {site: plant, channel: 3}
            epoch: "2026-01-01T00:00:00Z"
            basis:
              - constant
              - step: {of: t, at: 2026-05-01T00:00:00Z}
              - exponential: {of: t, tau: 90min}
            memory: {half_life: 2w, prior_sd: 50}
            correction: {cap: 12.5}
            alerts:
              drift_limit: 5
              rate_limit: 0.5/h
              dwell: 30m
              check: {limit: 0.2, consecutive: 3, hard_limit: 1, clear_limit: 0.1}
              severity: {drift_limit: critical}
              cusum: {k: 0.25, h: 5}
        """
    )
    config = parse_config(text, "full.yaml")
    channel = config.channels[0]
    assert config.http["token_file"] == "/etc/zeroline/http.token"
    assert config.broker["keepalive"] == 90.0
    assert dict(channel.labels) == {"site": "plant", "channel": "3"}
    assert channel.epoch == datetime(2026, 1, 1, tzinfo=timezone.utc).timestamp()
    assert channel.basis.names == ("constant", "step(t>=2026-05-01T00:00:00Z)", "exp(-t/90min)")
    assert (channel.memory.half_life, channel.memory.prior_sd) == (14 * DAY, 50.0)
    assert channel.cap == 12.5
    assert channel.alerts.rate_limit == pytest.approx(0.5 / 3600, rel=1e-15)
    assert channel.alerts.dwell == 1800.0
    assert channel.alerts.check is not None
    assert dataclasses.astuple(channel.alerts.check) == (0.2, 3, 1.0, 0.1)
    assert channel.alerts.severity["drift_limit"] == "critical"
    assert (channel.alerts.cusum_k, channel.alerts.cusum_h) == (0.25, 5.0)
