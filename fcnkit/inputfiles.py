"""Inputs are regular files: opening a FIFO (named pipe) for reading blocks until another process writes to it,
and a character device may never end, so a command given one where it reads a file would hang rather than
answer. Every reader of a named input asks here first; a path that does not exist is left to the reader's own
message."""

from __future__ import annotations

import os
import stat
from pathlib import Path

from fcnkit.errors import FcnkitError


def special_kind(path: str | Path) -> str | None:
    """What ``path`` is when it exists but is neither a regular file nor a folder (after symbolic links), else
    None."""
    try:
        mode = os.stat(path).st_mode
    except (OSError, ValueError):
        return None
    if stat.S_ISREG(mode) or stat.S_ISDIR(mode):
        return None
    if stat.S_ISFIFO(mode):
        return "a FIFO (named pipe)"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "a device"


def not_regular(path: str | Path) -> str | None:
    """The one-line problem of a special file at ``path`` (naming it), or None."""
    kind = special_kind(path)
    return None if kind is None else f"{path}: is {kind}, not a regular file (expected a file to read)"


def require_regular(path: str | Path, error: type[FcnkitError]) -> None:
    """Raise ``error`` naming ``path`` when it is a FIFO, socket or device."""
    problem = not_regular(path)
    if problem is not None:
        raise error(problem)
