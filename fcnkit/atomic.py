"""Atomic file output: write under a hidden temporary name in the same folder, then rename.

A reader (or a crash) never sees a half-written file under its final name: either the old file, the new
one, or nothing.
"""

from __future__ import annotations

import contextlib
import os
import secrets
from collections.abc import Iterator
from pathlib import Path

from fcnkit.errors import FcnkitError


def partial_path(final: str | Path) -> Path:
    """A hidden temporary name beside ``final`` (``.NAME.partial-XXXX``)."""
    final = Path(final)
    return final.with_name(f".{final.name}.partial-{secrets.token_hex(4)}")


@contextlib.contextmanager
def atomic_output(final: str | Path) -> Iterator[Path]:
    """Yield a temporary path to write to; on success it is renamed to ``final``, on error removed."""
    final = Path(final)
    if not final.parent.is_dir():  # say so for the final name, not for the hidden temporary one
        raise FcnkitError(f"{final}: cannot write here, folder {final.parent} does not exist")
    tmp = partial_path(final)
    try:
        open(tmp, "xb").close()  # fails here, naming the final file, when the folder cannot be written
    except OSError as e:
        raise FcnkitError(f"{final}: cannot write here ({e.strerror or e})") from None
    try:
        yield tmp
        with open(tmp, "rb+") as f:  # flush file data before the rename makes it visible
            os.fsync(f.fileno())
        os.replace(tmp, final)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise


def write_bytes_atomic(final: str | Path, data: bytes) -> None:
    with atomic_output(final) as tmp:
        tmp.write_bytes(data)


def write_text_atomic(final: str | Path, text: str) -> None:
    write_bytes_atomic(final, text.encode("utf-8"))
