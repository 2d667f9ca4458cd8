"""Atomic file output: write under a hidden temporary name in the same folder, then rename.

A reader (or a crash) never sees a half-written file under its final name: either the old file, the new
one, or nothing. The final file gets the mode any new file gets under the process's umask (some writers, such
as safetensors, create theirs readable by the owner alone). A full disk (or a file size limit) while writing is
reported naming the final file. Text is written as UTF-8; file names that are not UTF-8 (which Python holds as
lone surrogates) are written as ``\\xNN`` escapes of their bytes rather than failing the write.
"""

from __future__ import annotations

import codecs
import contextlib
import errno
import os
import secrets
from collections.abc import Iterator
from pathlib import Path

from fcnkit.errors import DiskFullError, FcnkitError

DISK_FULL = (errno.ENOSPC, errno.EDQUOT, errno.EFBIG)  # no space, quota exceeded, file size limit
ESCAPES = "fcnkit-escape"  # codec error handler: undecodable file-name bytes as \xNN, anything else as \uNNNN


def _escape(e: UnicodeError) -> tuple[str, int]:
    if not isinstance(e, UnicodeEncodeError):
        raise e
    text = e.object[e.start:e.end]
    return "".join(f"\\x{ord(c) - 0xDC00:02x}" if 0xDC80 <= ord(c) <= 0xDCFF else
                   c.encode("ascii", "backslashreplace").decode("ascii") for c in text), e.end


codecs.register_error(ESCAPES, _escape)


def default_mode() -> int:
    """The permission bits a new file gets under this process's umask (0o666 & ~umask)."""
    try:  # Linux ≥ 4.7 states it without changing it
        with open("/proc/self/status", encoding="ascii") as f:
            umask = next(int(line.split()[1], 8) for line in f if line.startswith("Umask:"))
    except (OSError, StopIteration, ValueError, IndexError):
        umask = os.umask(0o022)
        os.umask(umask)
    return 0o666 & ~umask


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
        os.chmod(tmp, default_mode())
        os.replace(tmp, final)
    except BaseException as e:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        if isinstance(e, OSError) and e.errno in DISK_FULL:
            reason = e.strerror or str(e)
            raise DiskFullError(f"{final}: {reason} while writing it (nothing was written under this name; free some "
                                "space or write elsewhere)", final, reason) from None
        raise


def write_bytes_atomic(final: str | Path, data: bytes) -> None:
    with atomic_output(final) as tmp:
        tmp.write_bytes(data)


def write_text_atomic(final: str | Path, text: str) -> None:
    write_bytes_atomic(final, text.encode("utf-8", ESCAPES))
