"""The `zeroline` console script: argparse wiring and the one place errors become exit codes.

Exit codes (design §3): 0 ok, 2 usage or input error (one clear line, no traceback),
1 internal error (a bug: the traceback is printed so it can be reported).
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Sequence

from zeroline import __version__
from zeroline.commands import check, demo, fit, replay, run
from zeroline.config import ConfigProblemsError
from zeroline.errors import UserError

EXIT_OK, EXIT_INTERNAL, EXIT_USAGE = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse, but usage errors are one line plus a hint, and exit 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_USAGE, f"zeroline: error: {message}; see `{self.prog} --help`\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="zeroline",
        description="Drift and baseline correction for field data loggers. Corrected values "
        "are advisory: never use them for life-safety alarms, interlocks or compliance.",
    )
    parser.add_argument("--version", action="version", version=f"zeroline {__version__}")
    commands = parser.add_subparsers(title="commands", metavar="COMMAND", parser_class=_Parser)
    for module in (check, demo, fit, replay, run):
        module.add_parser(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not hasattr(args, "handler"):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        return int(args.handler(args))
    except ConfigProblemsError as problems:
        for line in problems.lines:
            print(line, file=sys.stderr)
        return EXIT_USAGE
    except UserError as error:
        print(f"zeroline: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        return EXIT_OK
    except Exception:  # a bug, not the user's fault: show everything
        traceback.print_exc()
        print("zeroline: internal error; please report the traceback above", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
