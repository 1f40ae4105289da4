"""A compile's tiles as tasks on a Dask cluster (dask.distributed): local worker processes or an existing cluster.

:func:`tile_runner` opens a client (a new local cluster of ``workers`` processes, or the scheduler at
``scheduler``) and gives :func:`metalay.mask.compile.compile_mask` a runner with the same contract as its
in-process thread pool: it yields the tiles' outputs in tile order. Each task computes one tile (the same pure
function the threads run), writes the tile's encoded records (every GDSII and OASIS part,
:mod:`metalay.mask._emit`) to one file in a ``.parts`` folder inside the compile's staging folder (written under a
temporary name and renamed, so a retried task never leaves half a part) and returns only its statistics and the
part index. The client merges the parts into the final files in tile order, deleting each part as it goes, so the
files are byte-identical to a single-process compile; the whole output folder is still published at once by
:func:`metalay.util.atomic.published_folder`.

* Progress comes back from the cluster: the bar advances as tasks finish, in any order.
* A failed task is retried (:data:`TASK_RETRIES` times) by the scheduler; a task that still fails stops the
  compile with its own error (bad input: exit code 2; anything else: an internal error), and nothing is
  published.
* At most :data:`TASKS_IN_FLIGHT_PER_WORKER` tasks per worker are submitted ahead of the merge, which bounds the
  client's memory and the disk the parts take (a few tiles).
* An existing cluster's workers must see the staging folder (a shared file system) and run the same metalay.
* The compile's checks, when they stream (bounded memory per worker), run there too: one task per check
  (:meth:`ClusterRunner.run_checks`), retried like the tiles; their results equal those of a single process.

References
----------
Dask.distributed documentation: ``Client``, ``LocalCluster``, ``Client.submit(..., retries=)``, ``as_completed``.
"""

from __future__ import annotations

import contextlib
import logging
import os
import shutil
import uuid
from dataclasses import dataclass, replace
from pathlib import Path

from metalay.errors import DesignError
from metalay.mask._emit import Part

__all__ = ["tile_runner", "ClusterRunner", "TASK_RETRIES", "TASKS_IN_FLIGHT_PER_WORKER", "CONNECT_TIMEOUT_S",
           "MAX_WORKERS"]

#: Times the scheduler re-runs a failed tile task before the compile fails.
TASK_RETRIES = 2
#: Tasks submitted per worker ahead of the in-order merge (bounds memory and the parts on disk).
TASKS_IN_FLIGHT_PER_WORKER = 3
#: Seconds to wait for a scheduler (``--scheduler``) or a local cluster to answer.
CONNECT_TIMEOUT_S = 10.0
#: Largest ``--workers`` accepted for a local cluster.
MAX_WORKERS = 256
_PARTS = ".parts"


@dataclass(frozen=True)
class _ComplementSummary:
    """What the manifest needs of a tone-inversion band (its polygons stay in the part file)."""

    count: int
    max_vertices: int
    area_db2: float
    target_area_db2: float
    xor_area_db2: float
    xor_bound_db2: float


def _write_part(path: Path, parts: list[Part]) -> list[tuple]:
    """Write the parts of one tile to ``path`` (temporary name, then rename); return their index.

    No fsync: a part lives only until the merge reads it in the same run (a crash loses the whole unpublished
    staging folder anyway); the rename is what keeps a retried task from leaving half a part.
    """
    index = []
    tmp = path.with_name(f"{path.name}.{uuid.uuid4().hex}.tmp")
    try:
        with open(tmp, "wb") as fh:
            off = 0
            for p in parts:
                view = memoryview(p.data).cast("B")
                fh.write(view)
                index.append((p.target, p.cell, off, view.nbytes, p.elements, p.placements, p.placed))
                off += view.nbytes
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return index


def _tile_task(fn, tile, ctx, k: int, parts_dir: str):
    """One tile on a worker: compute it, write its part file, return its statistics and the part index."""
    out = fn(tile, ctx)
    index = _write_part(Path(parts_dir) / f"tile-{k:08d}.part", out.parts)
    ct = out.complement
    if ct is not None:
        ct = _ComplementSummary(ct.count, int(ct.max_vertices), float(ct.area_db2), float(ct.target_area_db2),
                                float(ct.xor_area_db2), float(ct.xor_bound_db2))
    return replace(out, parts=index, complement=ct)


def _load_part(path: Path, out):
    """The tile output with its parts read back from ``path`` (then deleted)."""
    data = memoryview(path.read_bytes())
    path.unlink()
    parts = [Part(t, cell, data[off:off + n], el, pl, tuple(placed)) for t, cell, off, n, el, pl, placed in out.parts]
    return replace(out, parts=parts)


def _client(workers: int | None, scheduler: str | None, where: str):
    """A connected client: to ``scheduler``, or to a new local cluster of ``workers`` processes."""
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:  # pragma: no cover - a declared dependency
        raise DesignError("--workers/--scheduler need the 'distributed' package (pip install distributed)") from exc
    if scheduler is not None:
        try:
            return Client(scheduler, timeout=f"{CONNECT_TIMEOUT_S}s", set_as_default=False), None
        except (OSError, TimeoutError, ValueError, TypeError) as exc:
            raise DesignError(f"{where}: option --scheduler {scheduler!r}: no Dask scheduler answered within "
                              f"{CONNECT_TIMEOUT_S:g} s ({type(exc).__name__}: {str(exc).splitlines()[0][:160]}); "
                              "allowed: the address of a running scheduler, e.g. tcp://host:8786") from exc
    if isinstance(workers, bool) or not isinstance(workers, int) or not 1 <= workers <= MAX_WORKERS:
        raise DesignError(f"{where}: option --workers {workers!r}: allowed 1 to {MAX_WORKERS} worker processes")
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None,
                           silence_logs=logging.ERROR)
    try:
        return Client(cluster, timeout=f"{CONNECT_TIMEOUT_S}s", set_as_default=False), cluster
    except BaseException:
        cluster.close()
        raise


@contextlib.contextmanager
def tile_runner(stage: str | Path, *, workers: int | None = None, scheduler: str | None = None,
                where: str = "compile"):
    """A runner of a compile's tiles on a Dask cluster, for :func:`metalay.mask.compile.compile_mask`.

    Parameters
    ----------
    stage : str or Path
        The compile's staging folder; the tasks write their parts into ``stage/.parts`` (removed at the end).
    workers : int, optional
        Worker processes of a new local cluster (1 thread each).
    scheduler : str, optional
        Address of an existing scheduler (``tcp://host:8786``); wins over ``workers``.
    where : str
        Named in error messages (the design file).

    Yields
    ------
    ClusterRunner
        Called as ``run(tiles, ctx, fn, bar)``: yields ``fn(tile, ctx)`` for every tile, in tile order, with the
        parts read back from the part files; ``bar`` (a progress bar) advances as tasks finish. Its
        :meth:`~ClusterRunner.run_checks` runs the compile's streamed checks as tasks.
    """
    client, cluster = _client(workers, scheduler, where)
    parts_dir = Path(stage) / _PARTS
    try:
        parts_dir.mkdir(exist_ok=True)
        yield ClusterRunner(client, parts_dir)
    finally:
        shutil.rmtree(parts_dir, ignore_errors=True)
        with contextlib.suppress(Exception):
            client.close()
        if cluster is not None:
            with contextlib.suppress(Exception):
                cluster.close()


@dataclass(frozen=True)
class ClusterRunner:
    """The compile's work on one connected cluster: the tiles (called like the in-process runner) and the checks."""

    client: object
    parts_dir: Path

    def __call__(self, tiles, ctx, fn, bar):
        return _run(self.client, self.parts_dir, tiles, ctx, fn, bar)

    def run_checks(self, jobs) -> list:
        """(result, seconds) of each :class:`metalay.mask.checkrun.CheckJob`, each one task (retried like a tile;
        a check that still fails raises its own error here), in the order given. The workers read the written
        mask from the staging folder (a shared file system for an existing cluster)."""
        from metalay.mask.checkrun import timed_run

        run_id = uuid.uuid4().hex[:12]
        futures = [self.client.submit(timed_run, j.run, j.written, key=f"metalay-check-{run_id}-{j.name}",
                                      retries=TASK_RETRIES, pure=False) for j in jobs]
        try:
            return [f.result() for f in futures]
        finally:
            for f in futures:
                with contextlib.suppress(Exception):
                    f.cancel()


def _run(client, parts_dir: Path, tiles, ctx, fn, bar):
    """Submit the tiles (a bounded window ahead), merge in order as they finish."""
    from distributed import as_completed

    n_workers = max(1, len(client.scheduler_info(n_workers=-1).get("workers", {})))
    window = TASKS_IN_FLIGHT_PER_WORKER * n_workers
    ctx_future = client.scatter(ctx, broadcast=True, hash=False)
    run_id = uuid.uuid4().hex[:12]
    pending = as_completed(loop=client.loop)
    index_of = {}
    done: dict[int, object] = {}
    submitted = emitted = 0
    try:
        while emitted < len(tiles):
            while submitted < len(tiles) and submitted - emitted < window:
                fut = client.submit(_tile_task, fn, tiles[submitted], ctx_future, submitted, str(parts_dir),
                                    key=f"metalay-tile-{run_id}-{submitted}", retries=TASK_RETRIES, pure=False)
                index_of[fut.key] = (submitted, fut)
                pending.add(fut)
                submitted += 1
            if emitted not in done:
                fut = next(pending)
                bar.update(1)
                k, _ = index_of.pop(fut.key)
                done[k] = fut.result()  # a task that failed TASK_RETRIES + 1 times raises its own error here
                fut.release()
                continue
            yield _load_part(parts_dir / f"tile-{emitted:08d}.part", done.pop(emitted))
            emitted += 1
    finally:
        for _, fut in index_of.values():  # tasks still out when the compile stops early
            with contextlib.suppress(Exception):
                fut.cancel()
