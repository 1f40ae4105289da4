"""Atomic, deterministic output: a file is written to a temporary file beside it, fsynced, then renamed; a whole
output folder is built beside its place and switched in with one rename (:func:`published_folder`), under a lock.

An interrupted run leaves either the previous file (folder) or nothing, never a partial or mixed one.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import glob
import json
import os
import secrets
import shutil
import sys
import tempfile
import time
from pathlib import Path

from metalay.errors import OutputBusyError, OutputError

try:
    import fcntl
except ImportError:  # pragma: no cover - not POSIX
    fcntl = None

__all__ = ["atomic_path", "atomic_write_bytes", "atomic_write_text", "ensure_dir", "published_folder",
           "pause_point"]


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


# ----------------------------------------------------------------------------------------------------------------
# A whole output folder, published at once
# ----------------------------------------------------------------------------------------------------------------

_RENAME_NOREPLACE = 1
_RENAME_EXCHANGE = 2
_AT_FDCWD = -100
_MANIFEST_KEY = "metalay_manifest_version"


def pause_point(name: str) -> None:
    """Test hook: when ``METALAY_PAUSE_AT`` (comma-separated) names ``name``, touch ``$METALAY_PAUSE_FILE.<name>``
    and wait until ``$METALAY_PAUSE_FILE.<name>.go`` exists (so a test can kill or race the process exactly
    there). Does nothing otherwise.

    Points: ``staged`` (lock held, stage folder made), ``written`` (mask files written), ``checked`` (checks run,
    manifest not yet written), ``complete`` (stage complete, not yet switched), ``switched`` (new folder in place,
    previous set not yet removed).
    """
    wanted = os.environ.get("METALAY_PAUSE_AT", "")
    if not wanted or name not in wanted.split(","):
        return
    prefix = os.environ.get("METALAY_PAUSE_FILE", "")
    if not prefix:
        return
    Path(f"{prefix}.{name}").touch()
    go = Path(f"{prefix}.{name}.go")
    while not go.exists():
        time.sleep(0.02)


def _renameat2(src: Path, dst: Path, flags: int) -> bool:
    """Linux renameat2(2); True when done, False where the call or the flag is not supported (then rename)."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    if fn(_AT_FDCWD, os.fsencode(src), _AT_FDCWD, os.fsencode(dst), flags) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(dst))


class _FolderLock:
    """An exclusive flock on ``<parent>/.<name>.metalay-lock`` held for the whole compile.

    The holder removes the lock file when it is done; a process that locked a file that was removed meanwhile
    (it compares the inode it locked with the one at the path) tries again, so no lock file is left behind and no
    two writers ever hold the lock of one folder. The kernel drops the lock of a killed process.
    """

    def __init__(self, final: Path):
        self.path = final.parent / f".{final.name}.metalay-lock"
        self.fd = None
        if fcntl is None:  # pragma: no cover - no flock on this platform: publication stays atomic, unlocked
            return
        while True:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as exc:
                raise OutputError(f"{final}: cannot lock the output folder ({exc.strerror or exc})") from exc
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                holder = os.read(fd, 32).decode("ascii", "replace").strip()
                os.close(fd)
                who = f" (pid {holder})" if holder.isdigit() else ""
                raise OutputBusyError(f"{final}: another metalay process{who} is writing this output folder; wait "
                                      "for it to finish or choose another folder") from None
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except FileNotFoundError:
                same = False
            if same:
                break
            os.close(fd)
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        self.fd = fd

    def release(self) -> None:
        if self.fd is None:
            return
        with contextlib.suppress(OSError):
            self.path.unlink()
        os.close(self.fd)
        self.fd = None


def _is_replaceable(final: Path) -> bool:
    """An output folder may be replaced when it is empty, holds only stage folders of an earlier metalay, or
    holds a metalay manifest (``metalay_manifest_version``)."""
    entries = list(final.iterdir())
    if all(e.name.startswith(".metalay-stage-") for e in entries):
        return True
    manifest = final / "manifest.json"
    try:
        if manifest.is_file() and manifest.stat().st_size < (16 << 20):
            return _MANIFEST_KEY in json.loads(manifest.read_text(encoding="utf-8"))
    except (OSError, ValueError, TypeError):
        return False
    return False


def _clear_dead_runs(final: Path) -> None:
    """With the lock held: restore a previous set left aside by an interrupted two-rename switch, then remove the
    stage folders of earlier runs of this folder (their writers are dead: a live one would hold the lock)."""
    pattern = glob.escape(f".{final.name}")
    for old in sorted(final.parent.glob(pattern + ".metalay-old-*")):
        if not os.path.lexists(final):
            os.rename(old, final)
        else:
            shutil.rmtree(old, ignore_errors=True)
    for stage in final.parent.glob(pattern + ".metalay-stage-*"):
        shutil.rmtree(stage, ignore_errors=True)


def _fsync_tree(folder: Path) -> None:
    """fsync every folder of the tree (files are fsynced when written), so the switch publishes durable data."""
    for dirpath, _, _ in os.walk(folder):
        fd = os.open(dirpath, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _switch(stage: Path, final: Path) -> None:
    """Put ``stage`` in place of ``final`` with one rename (exchange when ``final`` exists; ``stage`` then holds
    the previous set)."""
    if os.path.lexists(final):
        if _renameat2(stage, final, _RENAME_EXCHANGE):
            return
        # no exchange here (not Linux, or a file system without it): two renames; an interruption between them
        # leaves the previous set aside, and the next run restores it (_clear_dead_runs)
        old = final.parent / f".{final.name}.metalay-old-{os.getpid()}"
        os.rename(final, old)
        os.rename(stage, final)
        os.rename(old, stage)
        return
    if not _renameat2(stage, final, _RENAME_NOREPLACE):
        os.rename(stage, final)


def _make_parents(parent: Path) -> list[Path]:
    """Create ``parent`` and its missing ancestors; return the ones created (outermost first)."""
    missing = []
    p = parent
    while not p.exists():
        missing.append(p)
        if p.parent == p:
            break
        p = p.parent
    for p in reversed(missing):
        try:
            p.mkdir()
        except FileExistsError:
            pass
        except OSError as exc:
            _remove_empty(missing)
            raise OutputError(f"{parent}: cannot create output folder ({exc.strerror or exc})") from exc
    if not parent.is_dir():
        raise OutputError(f"{parent}: cannot create output folder inside it ({os.strerror(errno.ENOTDIR)})")
    return list(reversed(missing))


def _remove_empty(folders) -> None:
    for p in sorted(folders, key=lambda q: len(q.parts), reverse=True):
        with contextlib.suppress(OSError):
            p.rmdir()


@contextlib.contextmanager
def published_folder(out_dir: str | os.PathLike):
    """Yield an empty staging folder beside ``out_dir``; when the block succeeds, it replaces ``out_dir`` at once.

    The output folder appears whole or not at all: everything is written into ``.<name>.metalay-stage-*`` in the
    same parent folder, fsynced, then switched in with one rename (Linux ``renameat2(RENAME_EXCHANGE)`` swaps the
    new folder with the previous one atomically; elsewhere two renames, and an interrupted switch is undone by
    the next run). On any error the staging folder is removed and ``out_dir`` is untouched (a failed first run
    leaves no folder, and no parent folder it created).

    While the block runs the folder is locked (``.<name>.metalay-lock``, an flock): a second writer gets
    :class:`~metalay.errors.OutputBusyError` (exit code 75) at once. With the lock held, stage folders left by
    killed runs of the same folder are removed (a live writer would hold the lock, so they are known to be dead).

    Raises
    ------
    OutputError
        ``out_dir`` exists and is not a folder written by metalay (it would be replaced as a whole), or the
        parent folder cannot be written.
    OutputBusyError
        Another process is writing ``out_dir``.
    """
    shown = Path(out_dir)
    final = Path(os.path.realpath(shown))
    if final.parent == final:
        raise OutputError(f"{shown}: the root folder cannot be an output folder (it is replaced as a whole)")
    created = _make_parents(final.parent)
    try:
        lock = _FolderLock(final)
    except BaseException:
        _remove_empty(created)
        raise
    stage = None
    published = False
    try:
        _clear_dead_runs(final)
        if os.path.lexists(final) and not (final.is_dir() and _is_replaceable(final)):
            raise OutputError(f"{shown}: exists and is not a metalay output folder (no metalay manifest.json); the "
                              "output folder is replaced as a whole, so give a new or empty folder")
        try:  # os.mkdir, not mkdtemp: the published folder gets the usual permissions (0777 less the umask)
            stage = final.parent / f".{final.name}.metalay-stage-{os.getpid()}-{secrets.token_hex(4)}"
            os.mkdir(stage)
        except OSError as exc:
            stage = None
            raise OutputError(f"{shown}: cannot write in {final.parent} ({exc.strerror or exc})") from exc
        pause_point("staged")
        yield stage
        pause_point("complete")
        try:
            _fsync_tree(stage)
            _switch(stage, final)
            fd = os.open(final.parent, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        except OSError as exc:
            raise OutputError(f"{shown}: cannot publish the output folder ({exc.strerror or exc})") from exc
        published = True
        pause_point("switched")
    finally:
        if stage is not None:
            shutil.rmtree(stage, ignore_errors=True)  # after an exchange it holds the previous set
        lock.release()
        if not published:
            _remove_empty(created)
