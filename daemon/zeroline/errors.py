"""One error vocabulary for zeroline.

`UserError` and its subclasses are mistakes in what a user gave us (a config, a CSV file, a
command-line argument, a payload). The CLI prints their message as one line and exits 2;
everything else is a bug and exits 1. Third-party exceptions are mapped at the boundary
(`raise InputError(...) from None`) so callers only ever catch these.
"""

from __future__ import annotations


class ZerolineError(Exception):
    """Root of every error zeroline raises on purpose."""


class UserError(ZerolineError):
    """Something the user supplied is wrong; the message says what and what would be right."""


class ConfigError(UserError):
    """A config or basis definition is invalid; `path` is the dotted key path of the problem."""

    def __init__(self, message: str, path: str = "") -> None:
        super().__init__(f"{path}: {message}" if path else message)
        self.message = message
        self.path = path


class ExpressionError(ConfigError):
    """A basis `expression` cannot be parsed or uses something outside the safe language."""


class InputError(UserError):
    """A data file, a payload or a command-line argument is invalid."""


class DependentBasisError(UserError):
    """The basis columns are linearly dependent (or numerically so) on the data given."""


class DecodeError(InputError):
    """A payload could not be decoded into readings; `reason` is a short stable counter key."""

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail
