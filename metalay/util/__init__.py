"""Shared helpers of every stage: atomic output, the memory budget, progress bars, the allocator setting for tiles.

======================  =================================================  ===========================================
module                  what                                               public entry
======================  =================================================  ===========================================
``atomic.py``           temporary file + fsync + rename (all or nothing);  ``atomic_path``, ``atomic_write_bytes``,
                        a whole output folder built beside its place and   ``atomic_write_text``, ``ensure_dir``,
                        switched in by one rename, under a lock            ``published_folder``
``budget.py``           the memory a run may use: least of available       ``memory_budget``, ``memory_limits``,
                        memory, cgroup limit and ``RLIMIT_AS``             ``parse_memory_size``
``progress.py``         tqdm wrapper, quiet off a terminal                 ``progress``
``_memory.py``          glibc allocator setting so tiles reuse freed       ``keep_freed_memory`` (used by the compile
                        memory                                             and the optical check)
``_lazy.py``            lazy public names of the subpackages               ``lazy_entries`` (the ``__init__`` files)
======================  =================================================  ===========================================
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "atomic_path": "atomic",
    "atomic_write_bytes": "atomic",
    "atomic_write_text": "atomic",
    "ensure_dir": "atomic",
    "published_folder": "atomic",
    "memory_budget": "budget",
    "memory_limits": "budget",
    "parse_memory_size": "budget",
    "progress": "progress",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
