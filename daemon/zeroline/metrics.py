"""/metrics: the daemon's counters and per-channel gauges in the Prometheus text format.

The daemon keeps its own counters; it does not feed `prometheus_client` metric objects as
it goes. Instead a custom collector asks the `StatusSource` for a plain list of `Metric`
samples on every scrape and turns them into metric families (grouped by name), so the
exposition text is written by `prometheus_client` itself and the hot path pays nothing for
the metrics between scrapes.

Label sets stay bounded: a label is a channel name, a decode-error reason, an alert rule
or an HTTP status code, each from a set fixed by the configuration or the code.
`channel_gauges` builds the per-channel gauges from a `ChannelStatus`, so the daemon and
the tests produce them the same way.

>>> from prometheus_client.exposition import generate_latest
>>> source = lambda: [Metric("zeroline_readings_in_total", "Readings received.", "counter", 3)]
>>> text = generate_latest(metrics_registry(source)).decode()
>>> "zeroline_readings_in_total 3.0" in text
True
"""

from __future__ import annotations

import logging
import platform
import re
from collections.abc import Callable, Iterable, Sequence

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.metrics_core import Metric as MetricFamily
from prometheus_client.registry import Collector, CollectorRegistry

from zeroline import __version__
from zeroline.alerts import RULE_NAMES
from zeroline.status import ChannelStatus, Metric

log = logging.getLogger(__name__)

MetricsFunction = Callable[[], Sequence[Metric]]
_NAME = re.compile(r"^[a-zA-Z_:][a-zA-Z0-9_:]*$")
_LABEL = re.compile(r"^[a-zA-Z_][a-zA-Z0-9_]*$")
_KINDS = ("counter", "gauge")


class StatusCollector(Collector):
    """Turns the `Metric` samples of one or more sources into families on each scrape.

    Samples with an invalid name, label or kind, a kind that disagrees with the first
    sample of the same name, or labels repeated within a name, are left out (and logged
    once per name) rather than failing the whole scrape: one bad gauge must not hide all
    the others.
    """

    def __init__(self, *sources: MetricsFunction) -> None:
        self._sources = sources
        self._reported: set[str] = set()

    def collect(self) -> Iterable[MetricFamily]:
        yield _build_info()
        families: dict[str, MetricFamily] = {}
        seen: set[tuple[str, tuple[tuple[str, str], ...]]] = set()
        for source in self._sources:
            for metric in source():
                family = self._family_for(metric, families)
                if family is None:
                    continue
                key = (metric.name, tuple(sorted(metric.labels.items())))
                if key in seen:
                    self._report(metric.name, "the same labels appear twice; kept the first")
                    continue
                seen.add(key)
                sample_name = family.name + ("_total" if family.type == "counter" else "")
                family.add_sample(sample_name, dict(metric.labels), float(metric.value))
        yield from families.values()

    def _family_for(self, metric: Metric, families: dict[str, MetricFamily]) -> MetricFamily | None:
        problem = _problem(metric)
        family = families.get(_base_name(metric))
        if problem is None and family is not None and family.type != metric.kind:
            problem = f"kind {metric.kind!r} disagrees with {family.type!r} seen before"
        if problem is not None:
            self._report(metric.name, problem)
            return None
        if family is None:
            family = _new_family(metric)
            families[_base_name(metric)] = family
        return family

    def _report(self, name: str, problem: str) -> None:
        # Once per metric name for the life of the collector: a scrape every 15 s must not
        # repeat the same complaint forever.
        if name not in self._reported:
            self._reported.add(name)
            log.warning("metric %s left out of /metrics: %s", name, problem)


def metrics_registry(*sources: MetricsFunction) -> CollectorRegistry:
    """A registry of its own (not the process-global one) holding a `StatusCollector`."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(StatusCollector(*sources))
    return registry


def channel_gauges(status: ChannelStatus) -> list[Metric]:
    """The per-channel gauges of one channel: drift, uncertainty, rate, quality, alerts.

    Values that are not known yet (no reading so far) are left out rather than exported as
    NaN, so a dashboard shows a gap instead of a bogus number. Every contract alert rule gets
    a 0/1 gauge, so an alert that clears shows as 0 rather than disappearing.
    """
    labels = {"channel": status.name}
    gauges = [
        (
            "zeroline_channel_drift",
            "Drift as the alerts judge it: the baseline with inputs at their running means.",
            status.drift,
        ),
        (
            "zeroline_channel_baseline",
            "Baseline at the last reading (its inputs as they were), raw units.",
            status.baseline,
        ),
        (
            "zeroline_channel_uncertainty",
            "Standard uncertainty of the baseline, raw units.",
            status.uncertainty,
        ),
        (
            "zeroline_channel_drift_rate",
            "Rate of change of the baseline, raw units per second.",
            status.drift_rate,
        ),
        ("zeroline_channel_drift_limit", "Configured drift limit, raw units.", status.drift_limit),
        (
            "zeroline_channel_quality_code",
            "QARTOD-style quality code of the last reading.",
            float(status.quality_code),
        ),
        (
            "zeroline_channel_last_reading_time",
            "Time of the last reading, epoch seconds.",
            status.last_time,
        ),
    ]
    metrics = [
        Metric(name, text, "gauge", float(value), labels)
        for name, text, value in gauges
        if value is not None
    ]
    active = {str(alert.get("rule")) for alert in status.active_alerts}
    metrics += [
        Metric(
            "zeroline_channel_alert_active",
            "1 while the channel's alert rule is raised, else 0.",
            "gauge",
            1.0 if rule in active else 0.0,
            {"channel": status.name, "rule": rule},
        )
        for rule in RULE_NAMES
    ]
    return metrics


def _problem(metric: Metric) -> str | None:
    if not _NAME.match(metric.name):
        return "the name is not a valid Prometheus metric name"
    if metric.kind not in _KINDS:
        return f"kind {metric.kind!r} is not one of {', '.join(_KINDS)}"
    bad = [label for label in metric.labels if not _LABEL.match(label)]
    if bad:
        return f"label names {bad} are not valid Prometheus label names"
    return None


def _base_name(metric: Metric) -> str:
    # prometheus_client names a counter family without its `_total` suffix.
    if metric.kind == "counter" and metric.name.endswith("_total"):
        return metric.name[: -len("_total")]
    return metric.name


def _new_family(metric: Metric) -> MetricFamily:
    if metric.kind == "counter":
        return CounterMetricFamily(_base_name(metric), metric.help)
    return GaugeMetricFamily(metric.name, metric.help)


def _build_info() -> MetricFamily:
    family = GaugeMetricFamily(
        "zeroline_build_info",
        "zeroline version and Python version; the value is always 1.",
        labels=["version", "python"],
    )
    family.add_metric([__version__, platform.python_version()], 1.0)
    return family
