"""`zeroline check -c CONFIG`: validate a config file.

Exit 0 and a one-line summary when it is valid; otherwise print every problem as
`file:line: key.path: what is wrong; what would be right` on standard output and exit 2.
A file that cannot be read or is not valid YAML is one such problem line, too.
"""

from __future__ import annotations

import argparse
from typing import Any

from zeroline.config import ConfigProblemsError, load_config
from zeroline.errors import ConfigError

EXIT_PROBLEMS = 2


def add_parser(commands: Any) -> None:
    parser = commands.add_parser("check", help="validate a config file")
    parser.add_argument("-c", "--config", required=True, metavar="CONFIG", help="config file")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    try:
        config = load_config(args.config)
    except ConfigProblemsError as problems:
        lines = problems.lines
    except ConfigError as error:  # unreadable file or YAML syntax: one line, file:line first
        lines = [str(error)]
    else:
        names = ", ".join(channel.name for channel in config.channels)
        print(f"{args.config}: ok ({len(config.channels)} channel(s): {names})")
        return 0
    for line in lines:
        print(line)
    print(f"{len(lines)} problem(s) in {args.config}")
    return EXIT_PROBLEMS
