"""Atomic, deterministic file output: write to a temporary file in the target folder, fsync, then rename.

An interrupted run leaves either the previous file or nothing, never a partial file.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

from metalay.errors import OutputError

__all__ = ["atomic_path", "atomic_write_bytes", "atomic_write_text", "ensure_dir"]


def ensure_dir(folder: str | os.PathLike) -> Path:
    """Create ``folder`` (and parents) or raise :class:`OutputError` naming it."""
    path = Path(folder)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{path}: cannot create output folder ({exc.strerror or exc})") from exc
    if not os.access(path, os.W_OK):
        raise OutputError(f"{path}: output folder is not writable")
    return path


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike):
    """Yield a temporary path beside ``path``; on success rename it onto ``path``, on error delete it."""
    final = Path(path)
    ensure_dir(final.parent)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".part", dir=final.parent)
    except OSError as exc:
        raise OutputError(f"{final}: cannot write ({exc.strerror or exc})") from exc
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp_path, 0o644)
        os.replace(tmp_path, final)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically; return the path."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write UTF-8 ``text`` (LF line ends) to ``path`` atomically; return the path."""
    return atomic_write_bytes(path, text.encode("utf-8"))
