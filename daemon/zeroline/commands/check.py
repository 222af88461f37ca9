"""`zeroline check -c CONFIG`: validate a config file.

Exit 0 and a one-line summary when it is valid; otherwise print every problem as
`file:line: key.path: what is wrong; what would be right` on standard output and exit 2.
"""

from __future__ import annotations

import argparse
from typing import Any

from zeroline.config import ConfigProblemsError, load_config

EXIT_PROBLEMS = 2


def add_parser(commands: Any) -> None:
    parser = commands.add_parser("check", help="validate a config file")
    parser.add_argument("-c", "--config", required=True, metavar="CONFIG", help="config file")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    try:
        config = load_config(args.config)
    except ConfigProblemsError as problems:
        for line in problems.lines:
            print(line)
        print(f"{len(problems.lines)} problem(s) in {args.config}")
        return EXIT_PROBLEMS
    names = ", ".join(channel.name for channel in config.channels)
    print(f"{args.config}: ok ({len(config.channels)} channel(s): {names})")
    return 0
