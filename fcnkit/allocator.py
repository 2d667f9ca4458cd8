"""How this process's C allocator treats the large blocks that mapping frees and takes again band after band.

Row streaming allocates the same few feature-map sizes for every band (megabytes each) from several worker
threads. glibc's malloc gives each thread an arena of 64 MB heaps, and hands heaps and the top of the main heap
back to the kernel as soon as they fall free, so the next band's maps are fresh pages: 15 000–50 000 page faults
and up to a third of the time of a light net over a 2048² image (measured on the 2-core development machine).
One arena for all threads and a high trim threshold keep those blocks for reuse; large blocks stay mapped
afresh each time (the threshold is fixed at glibc's maximum, 32 MB). The process then keeps up to
``TRIM_BYTES`` of freed memory; its peak is unchanged.

Threads take their arena when they first allocate, so this must run before any thread but the main one has
allocated: ``fcnkit``'s command line calls it first thing; Python programs can call it at start-up.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

TRIM_BYTES = 256 << 20  # freed memory kept for reuse before any is handed back
MMAP_BYTES = 32 << 20  # blocks from this size on are mapped afresh (glibc's largest threshold)
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD, _M_ARENA_MAX = -1, -3, -8  # mallopt parameters (malloc.h)


def reuse_freed_memory() -> bool:
    """Set glibc's malloc to one arena for all threads, keeping freed memory for reuse (see module notes).
    False, changing nothing, where the C library is not glibc."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return all([mallopt(_M_ARENA_MAX, 1), mallopt(_M_TRIM_THRESHOLD, TRIM_BYTES),
                mallopt(_M_MMAP_THRESHOLD, MMAP_BYTES)])
