"""The configuration file: YAML → frozen, typed objects, or every problem with file:line.

The keys are declared once, as `schema.Key` tuples below; validation, defaults and the
JSON Schema in `config/zeroline.schema.json` all come from them. After the per-key checks,
`_cross_check` looks at what single keys cannot see: unknown basis sets, inputs used but not
declared, a gain basis without reference learning, a basis dependent by construction, and so
on. `load_config` raises `ConfigProblemsError` listing every problem, formatted as
`file:line: key.path: what is wrong; what would be right`.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from zeroline.basis import Basis, parse_instant, parse_term
from zeroline.errors import ConfigError, UserError
from zeroline.independence import dependent_terms
from zeroline.schema import Key, Problems, read_section, read_value, section_schema
from zeroline.yamlfile import Located, load_yaml, parse_yaml

INPUT_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
PLACEHOLDER = re.compile(r"\{(\d+)\}")
LEARN_MODES = ("all", "reference", "envelope")

# --- the keys -------------------------------------------------------------------------------

TLS_KEYS = (
    Key("ca_file", "str", "CA certificate (PEM) that signed the broker's certificate"),
    Key("cert_file", "str", "client certificate (PEM), for brokers that require one"),
    Key("key_file", "str", "client private key (PEM)"),
)
BROKER_KEYS = (
    Key("host", "str", "broker host name or address", default="127.0.0.1"),
    Key("port", "int", "broker TCP port", default=1883, minimum=1, maximum=65535),
    Key("protocol", "enum", "MQTT protocol version", default="5", choices=("5", "3.1.1")),
    Key("client_id", "str", "MQTT client id; unique per gateway", default="zeroline"),
    Key("username", "str", "user name for password authentication"),
    Key("password_file", "str", "file holding the broker password (never put it in the config)"),
    Key("password_env", "str", "environment variable holding the broker password"),
    Key("tls", "section", "TLS to the broker", keys=TLS_KEYS),
    Key("keepalive", "duration", "MQTT keep-alive", default="60s", positive=True),
    Key("session_expiry", "duration", "how long the broker keeps our session", default="7d"),
    Key("inflight", "int", "QoS 1 messages in flight", default=100, minimum=1, maximum=65535),
)
OUTPUT_KEYS = (
    Key("prefix", "str", "first level of every topic zeroline publishes", default="zeroline"),
)
STATE_KEYS = (
    Key("dir", "str", "directory for state snapshots", default="/var/lib/zeroline"),
    Key("snapshot_every", "duration", "time between snapshots", default="60s", positive=True),
)
HTTP_KEYS = (
    Key("listen", "str", "address:port of the status page", default="127.0.0.1:8470"),
    Key("token_file", "str", "bearer token file, required when listening beyond loopback"),
)
TIMESERIES_KEYS = (
    Key("url", "str", "base URL of a database accepting the InfluxDB v2 write API", required=True),
    Key("org", "str", "organisation", default="zeroline"),
    Key("bucket", "str", "bucket (database)", default="zeroline"),
    Key("token_file", "str", "file holding the API token"),
    Key("token_env", "str", "environment variable holding the API token"),
    Key("spool_dir", "str", "durable on-disk queue", default="/var/lib/zeroline/spool"),
    Key(
        "spool_max_bytes",
        "int",
        "spool size bound; oldest dropped beyond",
        default=268435456,
        minimum=65536,
    ),
    Key("batch_size", "int", "points per write request", default=5000, minimum=1),
    Key("flush_every", "duration", "longest wait before a write", default="1s", positive=True),
)
LOGGING_KEYS = (
    Key("format", "enum", "log line format", default="text", choices=("text", "json")),
    Key(
        "level",
        "enum",
        "least severe level logged",
        default="info",
        choices=("debug", "info", "warning", "error"),
    ),
)
LIMIT_KEYS = (
    Key(
        "max_channels",
        "int",
        "channels created from wildcard topics, at most",
        default=10000,
        minimum=1,
    ),
    Key(
        "resident_channels",
        "int",
        "channels kept unpacked; the least recently used others wait packed",
        default=2000,
        minimum=1,
    ),
    Key("queue", "int", "readings waiting for the model, at most", default=2000, minimum=10),
    Key("max_payload_bytes", "int", "larger payloads are refused", default=65536, minimum=64),
)
INPUT_KEYS = (
    Key("topic", "str", "topic the input is published on; {1}… are the channel's wildcards"),
    Key("field", "str", "or: a numeric field of the channel's own payload"),
    Key(
        "payload",
        "enum",
        "payload format of the input topic",
        default="json",
        choices=("json", "senml", "number"),
    ),
    Key("max_age", "duration", "older values are stale", default="10m"),
)
LEARN_KEYS = (
    Key("mode", "enum", "which samples teach the baseline", default="all", choices=LEARN_MODES),
    Key(
        "nominal",
        "number",
        "level the signal sits at apart from drift (mode all/envelope)",
        default=0.0,
    ),
    Key(
        "input",
        "str",
        "the input holding the reference value (mode reference)",
        default="reference",
    ),
    Key(
        "robust",
        "bool",
        "Huber weights so single bad samples cannot drag the baseline",
        default=False,
    ),
    Key("huber_k", "number", "Huber threshold in residual SDs", default=1.345, positive=True),
    Key(
        "envelope_k",
        "number",
        "envelope: residual SDs above the baseline still counted as noise",
        default=2.0,
        positive=True,
    ),
    Key(
        "envelope_weight",
        "number",
        "envelope: weight of samples above that",
        default=0.01,
        positive=True,
        maximum=1.0,
    ),
    Key(
        "min_samples",
        "int",
        "useful samples before the quality leaves 'learning' (0: 2×terms)",
        default=0,
        minimum=0,
    ),
    Key(
        "max_gap",
        "duration",
        "no useful sample for longer: quality 'extrapolating'",
        default="3d",
        positive=True,
    ),
)
MEMORY_KEYS = (
    Key(
        "half_life",
        "duration",
        "exponential forgetting: a sample's weight halves this often",
        positive=True,
    ),
    Key("window", "duration", "or: an exact sliding window", positive=True),
    Key(
        "prior_sd",
        "number",
        "prior SD of each coefficient, in multiples of the residual SD",
        default=1000.0,
        positive=True,
    ),
)
CORRECTION_KEYS = (
    Key(
        "cap",
        "number",
        "largest |correction| applied; beyond it the correction is capped",
        positive=True,
    ),
    Key(
        "ill_conditioned_above",
        "number",
        "condition number flagged as ill_conditioned",
        default=1e8,
        positive=True,
    ),
)
CUSUM_KEYS = (
    Key("k", "number", "reference value in residual SDs", default=0.5, positive=True),
    # h = 5 (in-control ARL ≈ 465 samples) alarms about daily on 5-minute data; 8 is quieter.
    Key("h", "number", "decision interval in residual SDs", default=8.0, positive=True),
)
CHECK_KEYS = (
    Key("limit", "number", "a check error beyond this counts as a failure", positive=True),
    Key("consecutive", "int", "failures in a row that raise the alert", default=5, minimum=1),
    Key("hard_limit", "number", "a single check error beyond this raises at once", positive=True),
    Key(
        "clear_limit",
        "number",
        "a check within this clears the alert (default: limit)",
        positive=True,
    ),
)
SEVERITY_KEYS = tuple(
    Key(
        rule,
        "enum",
        f"severity of {rule} alerts",
        default=default,
        choices=("info", "warning", "critical"),
    )
    for rule, default in (
        ("drift_limit", "warning"),
        ("rate_limit", "warning"),
        ("forecast", "info"),
        ("residual_change", "warning"),
        ("check_failures", "critical"),
        ("correction_cap", "critical"),
        ("model_health", "warning"),
    )
)
ALERT_KEYS = (
    Key("drift_limit", "number", "|baseline| beyond this (engineering units)", positive=True),
    Key("rate_limit", "rate", "|d baseline/dt| beyond this, e.g. 2/d", positive=True),
    Key(
        "horizon",
        "duration",
        "warn when the forecast crosses drift_limit within this",
        positive=True,
    ),
    Key(
        "clear_fraction",
        "number",
        "clear when back below this fraction of a limit",
        default=0.8,
        positive=True,
        maximum=1.0,
    ),
    Key("dwell", "duration", "a condition must hold this long to raise or clear", default="1h"),
    Key("cusum", "section", "change in the residuals (two-sided tabular CUSUM)", keys=CUSUM_KEYS),
    Key("residual_change", "bool", "enable the CUSUM rule", default=True),
    Key("check", "section", "reference-check failures", keys=CHECK_KEYS),
    Key("severity", "section", "severity per rule", keys=SEVERITY_KEYS),
)
CHANNEL_KEYS = (
    Key("name", "str", "channel name; {1}, {2}… are the topic's + levels", required=True),
    Key("topic", "str", "MQTT topic of the raw readings (+ wildcards allowed)", required=True),
    Key("payload", "enum", "payload format", default="json", choices=("json", "senml", "number")),
    Key("time_field", "str", "JSON field with the time", default="time"),
    Key("value_field", "str", "JSON field with the value", default="value"),
    Key("time_unit", "enum", "unit of numeric times", default="auto", choices=("auto", "s", "ms")),
    Key("senml_name", "str", "SenML: use only records with this resolved name"),
    Key("labels", "string_map", "extra tags for the time-series database, e.g. site"),
    Key(
        "epoch",
        "any",
        "origin of t (ISO 8601 time); default: the first sample",
        extra={"type": ["string", "number"]},
    ),
    Key(
        "basis",
        "any",
        "a basis set's name, or an inline list of terms",
        required=True,
        extra={"anyOf": [{"type": "string"}, {"type": "array"}]},
    ),
    Key(
        "gain",
        "any",
        "optional gain basis (only with learn.mode: reference)",
        extra={"anyOf": [{"type": "string"}, {"type": "array"}]},
    ),
    Key(
        "inputs",
        "any",
        "named inputs: name → {topic | field, max_age}",
        extra={
            "type": "object",
            "propertyNames": {"pattern": INPUT_NAME.pattern, "not": {"const": "t"}},
            "additionalProperties": section_schema(INPUT_KEYS),
        },
    ),
    Key("learn", "section", "what teaches the model", keys=LEARN_KEYS),
    Key("memory", "section", "how fast old samples are forgotten", keys=MEMORY_KEYS),
    Key("correction", "section", "limits on the correction", keys=CORRECTION_KEYS),
    Key("alerts", "section", "drift alert rules", keys=ALERT_KEYS),
)
TOP_KEYS = (
    Key("broker", "section", "MQTT broker (daemon only)", keys=BROKER_KEYS),
    Key("output", "section", "published topics", keys=OUTPUT_KEYS),
    Key("state", "section", "state snapshots", keys=STATE_KEYS),
    Key("http", "section", "status page, /health and /metrics", keys=HTTP_KEYS),
    Key(
        "timeseries", "any", "optional time-series database", extra=section_schema(TIMESERIES_KEYS)
    ),
    Key("logging", "section", "logging", keys=LOGGING_KEYS),
    Key("limits", "section", "resource bounds", keys=LIMIT_KEYS),
    Key(
        "basis_sets",
        "any",
        "named, reusable basis lists",
        extra={"type": "object", "additionalProperties": {"type": "array"}},
    ),
    Key(
        "channels",
        "list",
        "the channels, each with at least name, topic and basis",
        required=True,
        items=Key("channel", "section", "one channel", keys=CHANNEL_KEYS),
    ),
)


def reference_rows(keys: tuple[Key, ...] = TOP_KEYS, prefix: str = "") -> list[str]:
    """The config reference as Markdown table rows: key path, default, meaning."""
    rows: list[str] = []
    for key in keys:
        path = f"{prefix}{key.name}"
        default = "" if key.default is None else f"`{key.default}`"
        if key.required:
            default = "required"
        choices = f" ({' / '.join(key.choices)})" if key.choices else ""
        rows.append(f"| `{path}` | {default} | {key.doc}{choices} |")
        if key.kind == "section":
            rows += reference_rows(key.keys, f"{path}.")
        elif key.kind == "list" and key.items is not None and key.items.kind == "section":
            rows += reference_rows(key.items.keys, f"{path}[].")
        elif key.name == "inputs":
            rows += reference_rows(INPUT_KEYS, f"{path}.NAME.")
        elif key.name == "timeseries":
            rows += reference_rows(TIMESERIES_KEYS, f"{path}.")
    return rows


def json_schema() -> dict[str, Any]:
    """The JSON Schema of the whole config file (written to config/zeroline.schema.json)."""
    schema = section_schema(TOP_KEYS)
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": "zeroline configuration",
        **schema,
    }


# --- the typed result -----------------------------------------------------------------------


@dataclass(frozen=True)
class InputConfig:
    name: str
    topic: str | None
    field: str | None
    payload: str
    max_age: float


@dataclass(frozen=True)
class LearnConfig:
    mode: str
    nominal: float
    input: str
    robust: bool
    huber_k: float
    envelope_k: float
    envelope_weight: float
    min_samples: int
    max_gap: float


@dataclass(frozen=True)
class MemoryConfig:
    half_life: float | None
    window: float | None
    prior_sd: float


@dataclass(frozen=True)
class CheckConfig:
    limit: float
    consecutive: int
    hard_limit: float | None
    clear_limit: float | None


@dataclass(frozen=True)
class AlertConfig:
    drift_limit: float | None
    rate_limit: float | None
    horizon: float | None
    clear_fraction: float
    dwell: float
    cusum_k: float
    cusum_h: float
    residual_change: bool
    check: CheckConfig | None
    severity: Mapping[str, str]


@dataclass(frozen=True)
class ChannelConfig:
    """One channel as configured; `name` and topics may hold {1}… placeholders."""

    name: str
    topic: str
    payload: str
    time_field: str
    value_field: str
    time_unit: str
    senml_name: str | None
    labels: Mapping[str, str]
    epoch: float | None
    basis_spec: Any
    basis: Basis
    gain_spec: Any
    gain: Basis | None
    inputs: Mapping[str, InputConfig]
    learn: LearnConfig
    memory: MemoryConfig
    cap: float | None
    ill_conditioned_above: float
    alerts: AlertConfig

    def model_key(self) -> str:
        """Everything that defines the learned model: channels whose key did not change keep
        their state on a config reload. Made once per config (the config never changes;
        a restored channel is checked against it when it is unpacked)."""
        key: str | None = self.__dict__.get("_model_key")
        if key is None:
            key = repr((self.basis_spec, self.gain_spec, self.learn, self.memory, self.epoch))
            object.__setattr__(self, "_model_key", key)  # a cache, not a field
        return key


@dataclass(frozen=True)
class Config:
    path: str
    broker: Mapping[str, Any]
    output_prefix: str
    state: Mapping[str, Any]
    http: Mapping[str, Any]
    timeseries: Mapping[str, Any] | None
    logging: Mapping[str, Any]
    limits: Mapping[str, Any]
    channels: tuple[ChannelConfig, ...]

    def channel(self, name: str) -> ChannelConfig:
        """The channel called `name`, or UserError listing the names."""
        for channel in self.channels:
            if channel.name == name:
                return channel
        names = [c.name for c in self.channels]
        close = difflib.get_close_matches(name, names, n=1)
        hint = f"did you mean {close[0]!r}?" if close else f"channels: {', '.join(names)}"
        raise UserError(f"{self.path}: no channel {name!r}; {hint}")


class ConfigProblemsError(UserError):
    """Every problem found in a config file, one `file:line: path: message` per line."""

    def __init__(self, lines: list[str]) -> None:
        super().__init__("\n".join(lines))
        self.lines = lines


# --- loading --------------------------------------------------------------------------------


def load_config(path: str | Path) -> Config:
    """Load and validate a config file; raises ConfigProblemsError with every problem."""
    return _from_located(load_yaml(path))


def parse_config(text: str, name: str = "<config>") -> Config:
    """Validate config text (for tests and generated configs)."""
    return _from_located(parse_yaml(text, name))


def _from_located(located: Located) -> Config:
    problems = Problems()
    if located.data is not None and not isinstance(located.data, Mapping):
        raise ConfigProblemsError([f"{located.where('')}: (top): {_not_a_config(located.data)}"])
    top = read_section(located.data, TOP_KEYS, "", problems)
    timeseries = None
    if top["timeseries"] is not None:
        timeseries = read_section(top["timeseries"], TIMESERIES_KEYS, "timeseries", problems)
    basis_sets = _basis_sets(top["basis_sets"], problems)
    channels = tuple(
        channel
        for i, raw in enumerate(top["channels"] or [])
        if (channel := _channel(raw, f"channels[{i}]", basis_sets, problems)) is not None
    )
    if top["channels"] == [] and isinstance((located.data or {}).get("channels"), list):
        problems.add("channels", "the list is empty; configure at least one channel")
    _check_unique(channels, problems)
    _check_security(top, problems)
    if problems:
        ordered = sorted(problems.items, key=lambda p: located.line_of(p.path))
        raise ConfigProblemsError(
            [f"{located.where(p.path)}: {p.path or '(top)'}: {p.message}" for p in ordered]
        )
    return Config(
        path=located.path,
        broker=top["broker"],
        output_prefix=top["output"]["prefix"],
        state=top["state"],
        http=top["http"],
        timeseries=timeseries,
        logging=top["logging"],
        limits=top["limits"],
        channels=channels,
    )


def _not_a_config(data: Any) -> str:
    kind = "a list" if isinstance(data, list) else f"the single value {data!r}"
    hint = "; a bare list of basis terms is a basis file for `zeroline fit --basis`"
    return (
        "a config is a mapping of sections such as `broker:` and `channels:`, "
        f"got {kind}{hint if isinstance(data, list) else ''}"
    )


def _basis_sets(raw: Any, problems: Problems) -> dict[str, Any]:
    if raw is None:
        return {}
    if not isinstance(raw, Mapping):
        problems.add("basis_sets", "expected a mapping of names to basis lists")
        return {}
    return {str(name): spec for name, spec in raw.items()}


def _channel(
    raw: dict[str, Any], path: str, basis_sets: Mapping[str, Any], problems: Problems
) -> ChannelConfig | None:
    if raw["name"] is None or raw["topic"] is None or raw["basis"] is None:
        return None  # already reported as missing (or wrong)
    before = len(problems.items)
    inputs = _inputs(raw["inputs"], f"{path}.inputs", problems)
    names = frozenset(inputs)
    basis_spec, basis = _basis(raw["basis"], f"{path}.basis", basis_sets, names, problems)
    gain_spec, gain = None, None
    if raw["gain"] is not None:
        gain_spec, gain = _basis(raw["gain"], f"{path}.gain", basis_sets, names, problems)
    learn = LearnConfig(**raw["learn"])
    memory = _memory(raw["memory"], f"{path}.memory", problems)
    alerts = _alerts(raw["alerts"], f"{path}.alerts", problems)
    epoch = None
    if raw["epoch"] is not None:
        try:
            epoch = parse_instant(raw["epoch"], f"{path}.epoch")
        except ConfigError as error:
            problems.add(error.path, error.message)
    _check_topics(raw, inputs, path, problems)
    _check_learning(learn, inputs, gain, path, problems)
    if basis is not None:
        _check_independence(basis, gain, f"{path}.basis", problems)
    if len(problems.items) > before or basis is None:
        return None
    return ChannelConfig(
        name=raw["name"],
        topic=raw["topic"],
        payload=raw["payload"],
        time_field=raw["time_field"],
        value_field=raw["value_field"],
        time_unit=raw["time_unit"],
        senml_name=raw["senml_name"],
        labels=raw["labels"] or {},
        epoch=epoch,
        basis_spec=basis_spec,
        basis=basis,
        gain_spec=gain_spec,
        gain=gain,
        inputs=inputs,
        learn=learn,
        memory=memory,
        cap=raw["correction"]["cap"],
        ill_conditioned_above=raw["correction"]["ill_conditioned_above"],
        alerts=alerts,
    )


def _inputs(raw: Any, path: str, problems: Problems) -> dict[str, InputConfig]:
    if raw is None:
        return {}
    if not isinstance(raw, Mapping):
        problems.add(path, "expected a mapping of input names to {topic | field, max_age}")
        return {}
    result: dict[str, InputConfig] = {}
    for name, spec in raw.items():
        child = f"{path}.{name}"
        name = str(name)
        if name == "t":
            problems.add(child, "'t' is time in every basis term; give the input another name")
            continue
        if not INPUT_NAME.match(name):
            usable = re.sub(r"\W", "_", name)
            usable = usable if INPUT_NAME.match(usable) else f"x_{usable}"
            problems.add(
                child,
                f"{name!r} cannot name an input; use letters, digits and _ "
                f"(no digit first), e.g. {usable}",
            )
            continue
        if not isinstance(spec, Mapping):
            problems.add(child, f"expected {{topic: ...}} or {{field: ...}}, got {spec!r}")
            continue
        values = read_section(spec, INPUT_KEYS, child, problems)
        if (values["topic"] is None) == (values["field"] is None):
            problems.add(
                child,
                "give exactly one of `topic` (another topic) or `field` "
                "(a field of the channel's own payload)",
            )
            continue
        result[name] = InputConfig(
            name, values["topic"], values["field"], values["payload"], values["max_age"]
        )
    return result


def _basis(
    raw: Any, path: str, basis_sets: Mapping[str, Any], inputs: frozenset[str], problems: Problems
) -> tuple[Any, Basis | None]:
    spec = raw
    if isinstance(raw, str):
        if raw not in basis_sets:
            close = difflib.get_close_matches(raw, list(basis_sets), n=1)
            known = ", ".join(basis_sets) or "none defined"
            hint = f"did you mean {close[0]!r}?" if close else f"basis_sets: {known}"
            problems.add(path, f"unknown basis set {raw!r}; {hint}")
            return raw, None
        spec = basis_sets[raw]
        path = f"basis_sets.{raw}"
    if not isinstance(spec, list) or not spec:
        problems.add(path, "expected a non-empty list of basis terms, e.g. [constant]")
        return spec, None
    terms = []
    for i, entry in enumerate(spec):
        try:
            terms.append(parse_term(entry, f"{path}[{i}]", inputs))
        except ConfigError as error:
            problems.add(error.path or path, error.message)
    if len(terms) < len(spec):
        return spec, None
    return spec, Basis(tuple(terms))


def _memory(raw: dict[str, Any], path: str, problems: Problems) -> MemoryConfig:
    half_life, window = raw["half_life"], raw["window"]
    if half_life is not None and window is not None:
        problems.add(path, "give either half_life or window, not both")
    if half_life is None and window is None:
        half_life = 7 * 86400.0
    return MemoryConfig(half_life, window, raw["prior_sd"])


def _alerts(raw: dict[str, Any], path: str, problems: Problems) -> AlertConfig:
    if raw["horizon"] is not None and raw["drift_limit"] is None:
        problems.add(f"{path}.horizon", "a forecast horizon needs alerts.drift_limit to forecast")
    check = None
    check_raw = raw["check"]
    if check_raw["limit"] is not None:
        hard = check_raw["hard_limit"]
        if hard is not None and hard <= check_raw["limit"]:
            problems.add(
                f"{path}.check.hard_limit",
                f"must be larger than check.limit ({check_raw['limit']:g}), got {hard:g}",
            )
        check = CheckConfig(
            check_raw["limit"], check_raw["consecutive"], hard, check_raw["clear_limit"]
        )
    elif check_raw["hard_limit"] is not None:
        problems.add(
            f"{path}.check.limit",
            "check.hard_limit needs check.limit as well (the error that counts as a failure)",
        )
    return AlertConfig(
        drift_limit=raw["drift_limit"],
        rate_limit=raw["rate_limit"],
        horizon=raw["horizon"],
        clear_fraction=raw["clear_fraction"],
        dwell=raw["dwell"],
        cusum_k=raw["cusum"]["k"],
        cusum_h=raw["cusum"]["h"],
        residual_change=raw["residual_change"],
        check=check,
        severity=dict(raw["severity"]),
    )


def _check_topics(
    raw: dict[str, Any], inputs: Mapping[str, InputConfig], path: str, problems: Problems
) -> None:
    topic: str = raw["topic"]
    levels = topic.split("/")
    if "#" in topic:
        problems.add(f"{path}.topic", "'#' is not supported; use one + per varying level")
    if any("+" in level and level != "+" for level in levels):
        problems.add(f"{path}.topic", "a + wildcard must fill a whole level, e.g. site/+/no2")
    wildcards = levels.count("+")
    placeholders = {int(n) for n in PLACEHOLDER.findall(raw["name"])}
    if wildcards and not placeholders:
        problems.add(
            f"{path}.name",
            f"the topic has {wildcards} + wildcard(s): put {{1}}… in "
            "the name so each matching topic gets its own channel",
        )
    for where, text in [("name", raw["name"])] + [
        (f"inputs.{i.name}.topic", i.topic) for i in inputs.values() if i.topic
    ]:
        for number in {int(n) for n in PLACEHOLDER.findall(text)}:
            if not 1 <= number <= wildcards:
                problems.add(
                    f"{path}.{where}",
                    f"{{{number}}} has no matching + in the topic (it has {wildcards})",
                )


def _check_learning(
    learn: LearnConfig,
    inputs: Mapping[str, InputConfig],
    gain: Basis | None,
    path: str,
    problems: Problems,
) -> None:
    if learn.mode == "reference" and learn.input not in inputs:
        problems.add(
            f"{path}.learn.input",
            f"reference learning needs the input {learn.input!r}"
            " declared under inputs (a topic or a payload field)",
        )
    if gain is not None and learn.mode != "reference":
        problems.add(
            f"{path}.gain",
            "a gain basis is only identifiable with learn.mode: "
            "reference (known reference values); remove gain or change the mode",
        )


def _check_independence(basis: Basis, gain: Basis | None, path: str, problems: Problems) -> None:
    for where, terms in ((path, basis), (path.replace(".basis", ".gain"), gain)):
        colliding = dependent_terms(terms) if terms is not None else ()
        if colliding:
            problems.add(where, _dependent_message(colliding))


def _dependent_message(names: tuple[str, ...]) -> str:
    listed = ", ".join(map(repr, names[:-1])) + f" and {names[-1]!r}"
    why = (
        "one is a multiple of the other"
        if len(names) == 2
        else "one is a weighted sum of the others"
    )
    return f"columns {listed} are linearly dependent for any data ({why}); remove one"


def _check_unique(channels: tuple[ChannelConfig, ...], problems: Problems) -> None:
    seen: dict[str, int] = {}
    for i, channel in enumerate(channels):
        if channel.name in seen:
            problems.add(
                f"channels[{i}].name",
                f"channel name {channel.name!r} is used twice "
                f"(also channels[{seen[channel.name]}]); names must be unique",
            )
        seen.setdefault(channel.name, i)


def _check_security(top: dict[str, Any], problems: Problems) -> None:
    listen = str(top["http"]["listen"])
    host = listen.rsplit(":", 1)[0] if ":" in listen else listen
    if host not in {"127.0.0.1", "localhost", "::1", "[::1]"} and not top["http"]["token_file"]:
        problems.add(
            "http.listen",
            "listening beyond loopback needs http.token_file (a bearer "
            "token); or listen on 127.0.0.1",
        )
    broker = top["broker"]
    if broker["password_file"] and broker["password_env"]:
        problems.add("broker.password_file", "give password_file or password_env, not both")
    if (broker["password_file"] or broker["password_env"]) and not broker["username"]:
        problems.add("broker.username", "a password needs a username")


__all__ = [
    "ChannelConfig",
    "Config",
    "ConfigProblemsError",
    "json_schema",
    "load_config",
    "parse_config",
    "read_value",
]
