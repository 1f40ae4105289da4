"""How much memory this process may really use: the one budget of the readers, the rules check and the compile.

A process can be stopped by several limits, and the tightest one wins: the memory the kernel can still give
(``MemAvailable`` in ``/proc/meminfo``), the container's control-group limit (cgroup v2 ``memory.max`` minus
``memory.current``, or v1 ``memory.limit_in_bytes`` minus ``memory.usage_in_bytes``), and the address-space limit
(``RLIMIT_AS``, set by ``ulimit -v``) minus the address space already mapped. :func:`memory_limits` reads each,
:func:`memory_budget` takes a share of the least (or the caller's explicit ``--max-memory``), and
:func:`parse_memory_size` reads that option (``4G``, ``512M``, ``1.5GiB``, a plain number of bytes).
"""

from __future__ import annotations

import os
import re
import resource
from dataclasses import dataclass

from metalay.errors import MetalayError

__all__ = ["MemoryLimits", "memory_limits", "memory_budget", "parse_memory_size", "format_bytes",
           "DEFAULT_BUDGET_FRACTION"]

DEFAULT_BUDGET_FRACTION = 0.5
"""Share of the least limit a run may plan to allocate by default (the rest is for the interpreter, libraries,
allocator slack and other processes; measured peaks are estimates, not exact)."""

_V2 = ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current")
_V1 = ("/sys/fs/cgroup/memory/memory.limit_in_bytes", "/sys/fs/cgroup/memory/memory.usage_in_bytes")
_NO_LIMIT = 1 << 60  # cgroup v1 reports "no limit" as a huge number near 2**63


@dataclass(frozen=True)
class MemoryLimits:
    """What the process may still allocate under each limit, bytes (None: that limit is not set or unknown).

    Attributes
    ----------
    available_bytes : int or None
        ``MemAvailable`` (else free physical pages).
    cgroup_bytes : int or None
        Control-group limit minus current usage (v2, else v1).
    address_space_bytes : int or None
        ``RLIMIT_AS`` (soft) minus the current virtual size of the process.
    """

    available_bytes: int | None
    cgroup_bytes: int | None
    address_space_bytes: int | None

    @property
    def least_bytes(self) -> int:
        """The tightest of the limits that are set (never negative)."""
        vals = [v for v in (self.available_bytes, self.cgroup_bytes, self.address_space_bytes) if v is not None]
        return max(0, min(vals)) if vals else 1 << 62

    @property
    def binding(self) -> str:
        """Name of the tightest limit, for messages."""
        named = [(v, n) for v, n in ((self.available_bytes, "available memory"), (self.cgroup_bytes,
                                      "cgroup memory limit"), (self.address_space_bytes, "address-space limit "
                                                                                         "(ulimit -v)"))
                 if v is not None]
        return min(named)[1] if named else "no limit found"


def _read_int(path: str) -> int | None:
    try:
        with open(path) as fh:
            text = fh.read().strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None


def _mem_available() -> int | None:
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_AVPHYS_PAGES"))
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        return None


def _cgroup_free() -> int | None:
    for lim_path, cur_path in (_V2, _V1):
        lim = _read_int(lim_path)
        if lim is not None and lim < _NO_LIMIT:
            return lim - (_read_int(cur_path) or 0)
    return None


def _address_space_free() -> int | None:
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    if soft == resource.RLIM_INFINITY:
        return None
    vsize = 0
    try:
        with open("/proc/self/statm") as fh:
            vsize = int(fh.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        pass
    return int(soft) - vsize


def memory_limits() -> MemoryLimits:
    """Read the three limits now (each call reads them afresh: memory use changes while a run goes on)."""
    return MemoryLimits(_mem_available(), _cgroup_free(), _address_space_free())


def memory_budget(max_memory_bytes: int | None = None, *, fraction: float = DEFAULT_BUDGET_FRACTION) -> int:
    """Bytes a stage may plan to allocate.

    Parameters
    ----------
    max_memory_bytes : int, optional
        An explicit budget (the ``--max-memory`` option): used as given.
    fraction : float
        Share of :attr:`MemoryLimits.least_bytes` used when no explicit budget is given.

    Returns
    -------
    int
        The budget in bytes (>= 0).
    """
    if max_memory_bytes is not None:
        return max(0, int(max_memory_bytes))
    return max(0, int(fraction * memory_limits().least_bytes))


_UNITS = {"": 1, "b": 1, "k": 1000, "kb": 1000, "kib": 1 << 10, "m": 1000 ** 2, "mb": 1000 ** 2, "mib": 1 << 20,
          "g": 1000 ** 3, "gb": 1000 ** 3, "gib": 1 << 30, "t": 1000 ** 4, "tb": 1000 ** 4, "tib": 1 << 40}


def parse_memory_size(text: str, *, what: str = "--max-memory") -> int:
    """Bytes from a size such as ``4G``, ``4GB`` (10^9), ``4GiB`` (2^30), ``512M``, ``1e9`` or ``1000000``.

    Raises
    ------
    MetalayError
        Not a positive size (exit code 2), with the allowed forms.
    """
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-z]*)\s*", str(text))
    unit = m.group(2).lower() if m else None
    if not m or unit not in _UNITS or float(m.group(1)) <= 0:
        raise MetalayError(f"{what} = {text!r} is invalid; allowed: a positive size such as 4G, 4GB (10^9 bytes), "
                           "4GiB (2^30 bytes), 512M or a number of bytes")
    return int(float(m.group(1)) * _UNITS[unit])


def format_bytes(n: float) -> str:
    """``n`` bytes as a short text in decimal units (``1.2 GB``, ``340 MB``)."""
    n = float(n)
    for unit, size in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if abs(n) >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.0f} B"
