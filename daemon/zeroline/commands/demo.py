"""`zeroline demo [--duration SECONDS] [--broker HOST:PORT]`: the zero-setup demonstration.

See `zeroline.demo`. Exits 0 after the duration (default: until Ctrl-C).
"""

from __future__ import annotations

import argparse
from typing import Any

from zeroline.errors import InputError


def add_parser(commands: Any) -> None:
    parser = commands.add_parser(
        "demo", help="simulated field sensors, the daemon and live corrected output"
    )
    parser.add_argument(
        "--duration",
        type=float,
        metavar="SECONDS",
        help="play four simulated weeks in this many seconds, then exit "
        "(default: 90 s, then wait for Ctrl-C)",
    )
    parser.add_argument(
        "--broker",
        default="127.0.0.1:1883",
        metavar="HOST:PORT",
        help="MQTT broker to use; an embedded one is started there when none "
        "answers (default 127.0.0.1:1883)",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.duration is not None and not 5 <= args.duration <= 86400:
        raise InputError(f"--duration {args.duration:g} is out of range; give 5 to 86400 s")
    from zeroline.demo import run_demo

    run_demo(args.duration, args.broker)
    return 0
