"""`zeroline run -c CONFIG`: the daemon (see `zeroline.service` for how it works).

The main thread owns the signals: SIGTERM and SIGINT stop the daemon cleanly (finish the
outputs in transit, commit, snapshot, publish `offline`), SIGHUP reloads the config file;
a config that no longer validates is reported line by line and the running one is kept.
Start-up problems (config, state directory, TLS, credentials) are one line and exit 2.
"""

from __future__ import annotations

import argparse
import logging
import signal
import threading
from collections.abc import Callable
from typing import Any

from zeroline.config import Config, ConfigProblemsError, load_config
from zeroline.errors import UserError
from zeroline.heap import return_large_blocks
from zeroline.http_status import StatusServer, start_http_server
from zeroline.logs import setup_logging
from zeroline.mqtt import BrokerSettings, SocketBroker
from zeroline.outputs import StatusBoard, TimeseriesOutput, timeseries_config
from zeroline.service import Service
from zeroline.state import StateStore
from zeroline.tsdb import TimeseriesSink

_log = logging.getLogger("zeroline.run")

EXIT_OK, EXIT_INTERNAL = 0, 1
POLL_S = 0.2


def add_parser(commands: Any) -> None:
    parser = commands.add_parser("run", help="run the daemon")
    parser.add_argument("-c", "--config", required=True, metavar="CONFIG", help="config file")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    return_large_blocks()  # before the state is loaded: see zeroline.heap
    config = load_config(args.config)
    setup_logging(str(config.logging["format"]), str(config.logging["level"]))
    settings = BrokerSettings.from_config(
        config.broker, config.output_prefix, int(config.limits["queue"])
    )
    store = StateStore(str(config.state["dir"]))
    broker = SocketBroker(settings)
    service = Service(config, broker, store)
    timeseries = _timeseries(config, service)
    board = StatusBoard(
        names=lambda: list(service.table.names()),
        lookup=lambda name: service.table.view(name),  # the table a reload replaces
        counters=service.counters.as_dict,
        ready=broker.connected.is_set,
        extra=_sink_gauges(timeseries),
    )
    service.sinks.append(board)
    if timeseries is not None:
        service.sinks.append(timeseries)
    http = _http(config, board)
    stop, reload = threading.Event(), threading.Event()
    # Until the service runs (it may be waiting for an absent broker) a stop request simply
    # ends the process: nothing has been processed, the state on disk is as it was.
    signal.signal(signal.SIGTERM, _interrupt)
    signal.signal(signal.SIGHUP, lambda *_: reload.set())
    service.start()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    signal.signal(signal.SIGINT, lambda *_: stop.set())
    _log.info(
        "zeroline running: %d channel template(s), state in %s",
        len(config.channels),
        config.state["dir"],
    )
    while not stop.wait(POLL_S):
        if service.failed.is_set():
            return EXIT_INTERNAL
        if reload.is_set():
            reload.clear()
            _reload(args.config, service)
    service.stop()
    if http is not None:
        http.stop()
    return EXIT_INTERNAL if service.failed.is_set() else EXIT_OK


def _timeseries(config: Config, service: Service) -> TimeseriesOutput | None:
    """The time-series output, when `timeseries:` is configured (its spool first)."""
    settings = timeseries_config(config)
    if settings is None:
        return None
    sink = TimeseriesSink(settings)
    _log.info("time-series output to %s (spool %s)", settings.url, settings.spool_dir)
    return TimeseriesOutput(sink, str(config.broker["client_id"]), service.counters.as_dict)


def _sink_gauges(timeseries: TimeseriesOutput | None) -> Callable[[], dict[str, float]]:
    """The time-series sink's counters (spool bytes, drops, failed writes) for /metrics,
    as `zeroline_tsdb_*`: without them a full spool would be visible only in the log."""
    if timeseries is None:
        return dict
    sink = timeseries.sink
    return lambda: {f"tsdb_{name}": float(value) for name, value in sink.stats().items()}


def _http(config: Config, board: StatusBoard) -> StatusServer | None:
    """The status page, /health, /ready, /metrics and /api (http.listen; off if empty)."""
    listen = str(config.http["listen"] or "")
    if listen in ("", "off"):
        return None
    server = start_http_server(board, listen, config.http.get("token_file"))
    _log.info("status page on %s", server.url)
    return server


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt  # the CLI turns it into exit 0


def _reload(path: str, service: Service) -> None:
    try:
        config = load_config(path)
    except ConfigProblemsError as problems:
        for line in problems.lines:
            _log.error("reload refused: %s", line)
        _log.error("keeping the running config")
        return
    except UserError as error:  # unreadable file, YAML syntax
        _log.error("reload refused: %s; keeping the running config", error)
        return
    if dict(config.broker) != dict(service.config.broker):
        _log.warning("broker settings changed: they take effect at the next restart")
    service.request_reload(config)
