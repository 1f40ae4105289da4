"""Options shared by several commands (used only inside :mod:`metalay.cli`)."""

from __future__ import annotations

import argparse

from metalay.errors import MetalayError
from metalay.util.budget import parse_memory_size

__all__ = ["add_max_memory"]


def _memory_size(text: str) -> int:
    try:
        return parse_memory_size(text)
    except MetalayError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def add_max_memory(parser) -> None:
    """``--max-memory SIZE``: the memory budget (default: half of the least of the memory available, the free
    part of the cgroup limit and of the address-space limit, ``ulimit -v``)."""
    parser.add_argument("--max-memory", type=_memory_size, default=None, metavar="SIZE",
                        help="memory budget, e.g. 4G (10^9 bytes), 4GiB or 512M; larger inputs are refused before "
                             "anything is allocated (default: half of what this process may use: available "
                             "memory, cgroup limit, ulimit -v)")
