"""Process-wide memory allocator settings for tile-by-tile array work."""

from __future__ import annotations

import ctypes
import sys

__all__ = ["keep_freed_memory"]

_MALLOC_TUNED = False


def keep_freed_memory() -> None:
    """Ask glibc to reuse freed memory instead of returning it to the kernel after every tile.

    Each tile allocates and frees arrays of a few to tens of MB; by default glibc serves those with fresh mmap
    pages, so every tile pays page faults again (measured: about 4x fewer minor faults and ~0.5 s less system time
    at 1e7 sites). Peak memory is unchanged (the same tile-sized buffers are reused). No effect off glibc.
    """
    global _MALLOC_TUNED
    if _MALLOC_TUNED or not sys.platform.startswith("linux"):
        return
    _MALLOC_TUNED = True
    try:
        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt(-3, 256 << 20)  # M_MMAP_THRESHOLD: serve blocks up to 256 MB from the heap
        libc.mallopt(-1, 1 << 30)    # M_TRIM_THRESHOLD: keep up to 1 GB of freed heap for reuse
    except (OSError, AttributeError):
        pass
