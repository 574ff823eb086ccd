"""Checks on a path given by the user, with the standard library only.

Kept apart from ``io.py`` (which imports pandas and pyarrow) so the command
line can refuse a missing or unreadable input before any heavy import.
"""

from __future__ import annotations

import errno
import os
import stat
from pathlib import Path

from panelprep.errors import InputError


def shown_path(path: Path | str) -> str:
    """A path as written in a message: bytes that are not UTF-8 as escapes (``b\\xffd.csv``)."""
    return os.fsencode(path).decode("utf-8", errors="backslashreplace")


def resolved(path: str | os.PathLike[str]) -> Path:
    """``path`` made absolute with every symbolic link followed; one line for a link loop."""
    try:
        return Path(path).resolve()
    except (RuntimeError, OSError) as err:
        # Python raises RuntimeError (3.11, 3.12) or OSError ELOOP (3.13) on a loop
        if isinstance(err, OSError) and err.errno != errno.ELOOP:
            raise InputError(f"{shown_path(path)}: cannot follow the path: "
                             f"{err.strerror or err}") from None
        raise InputError(_loop_message(path)) from None


def _loop_message(path: str | os.PathLike[str]) -> str:
    return (f"{shown_path(path)}: is a symbolic link loop (following its links leads back to "
            "where they start); fix or remove the link, or name another path")


def refuse_link_loop(path: str | os.PathLike[str]) -> None:
    """One line when following ``path`` runs into a symbolic link loop (else nothing)."""
    try:
        os.stat(path)
    except OSError as err:
        if err.errno == errno.ELOOP:
            raise InputError(_loop_message(path)) from None
    except ValueError:
        pass


def check_readable(path: Path) -> None:
    """Fail with one line when ``path`` is not a readable, non-empty regular file.

    A file name that is not UTF-8 is refused too: the name is written into
    every report and output file, which are UTF-8.
    """
    name = shown_path(path)
    if name != str(path):
        raise InputError(f"{name}: the file name is not UTF-8 text, so it cannot be written "
                         "into the reports; rename the file (or link to it under a UTF-8 name)")
    if not path.exists():
        refuse_link_loop(path)
        if path.is_symlink():
            raise InputError(f"{path}: is a broken symbolic link (to {os.readlink(path)}, "
                             "which does not exist)")
        raise InputError(f"{path}: no such file")
    if path.is_dir():
        raise InputError(f"{path}: is a directory, expected a data file")
    mode = path.stat().st_mode
    if not stat.S_ISREG(mode):
        kind = ("a named pipe" if stat.S_ISFIFO(mode) else "a socket" if stat.S_ISSOCK(mode)
                else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode) else "a special file")
        raise InputError(f"{path}: is {kind}, not a regular file; the data is read more than "
                         "once (header, columns, checksum), so save it to a file and pass that")
    if not os.access(path, os.R_OK):
        raise InputError(f"{path}: not readable (permission denied)")
    if path.stat().st_size == 0:
        raise InputError(f"{path}: the file is empty")
