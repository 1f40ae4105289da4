"""Shared helpers of every stage: atomic output, progress bars, the allocator setting for tiles.

======================  =================================================  ===========================================
module                  what                                               public entry
======================  =================================================  ===========================================
``atomic.py``           temporary file + fsync + rename (all or nothing)   ``atomic_path``, ``atomic_write_bytes``,
                                                                           ``atomic_write_text``, ``ensure_dir``
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
    "progress": "progress",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
