"""Exceptions that end a command with exit code 2 (the command could not run)."""

from __future__ import annotations


class InputError(Exception):
    """A problem with what the user gave us: a file, a column, an option, a value.

    The message is one line that names what is wrong and where (file, column,
    first bad row). The CLI prints it on stderr and exits with code 2.
    """

    def __init__(self, message: str) -> None:
        super().__init__(" ".join(str(message).split()))


class ColumnError(InputError):
    """A column that was asked for is absent, duplicated or of the wrong kind."""


class TimeParseError(InputError):
    """Time values that cannot be placed on a period grid."""
