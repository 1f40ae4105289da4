"""Running a compile's checks on the mask it wrote: one after another, side by side, or as tasks on a cluster.

A compile hands each enabled check a :class:`~metalay.mask.steps.WrittenMask` and keeps what it returns
(:func:`metalay.mask.compile.compile_mask`, stage 3). The checks only read the written file, so they are
independent of each other and may run at the same time:

* **one after another** in this process (the default; always for small masks, whose checks take less time than a
  second interpreter takes to start);
* **side by side**: the first check in this process, the others each in a fresh interpreter (``spawn``: no state of
  the compile's threads is copied), when :func:`side_by_side` allows it: at least two checks streamed (masks above
  :attr:`~metalay.mask.steps.MaskCheck.stream_above_sites`), a second processor, and room in the memory budget
  for all their streamed figures at once (:func:`concurrent_bytes`, counted by the compile's admission);
* **on the compile's Dask cluster** (``--workers`` / ``--scheduler``): one task per check, retried like the tiles
  (:meth:`metalay.mask.cluster.ClusterRunner.run_checks`).

Whichever way, each result is the same dict (the checks are pure functions of the file and the design; tested), the
results are kept in the order the checks were given, and a check's error reaches the caller as that check's own
exception. A child process that dies (killed, out of memory) stops the compile (an internal error, exit code 70)
with one line naming the check; nothing is published.
"""

from __future__ import annotations

import contextlib
import importlib
import os
import pickle
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from multiprocessing import get_context

from metalay.mask.steps import MaskCheck, WrittenMask

__all__ = ["CheckJob", "run_jobs", "child_processes", "side_by_side", "concurrent_bytes", "timed_run",
           "CHILD_FIXED_BYTES"]

#: Memory of a fresh interpreter that imports the checks (numpy, scipy, matplotlib, metalay): 87 MB peak resident
#: measured after ``metalay.checks.steps.prepare_check_process()``; counted with room to spare. (The optical check's
#: child then peaked at 272 MB in all at 1e7 sites: ``bench/bench_scale.py``, peak with the child less the parent's.)
CHILD_FIXED_BYTES = 200_000_000
#: Niceness added to the checks' child processes (see :func:`_start_child`).
CHILD_NICENESS = 5


@dataclass(frozen=True)
class CheckJob:
    """One check to run: its name, its step function and the written mask as that check is to see it."""

    name: str
    run: Callable[[WrittenMask], dict]
    written: WrittenMask


def timed_run(run: Callable[[WrittenMask], dict], written: WrittenMask) -> tuple[dict, float]:
    """``run(written)`` and the seconds it took (the unit of work of every way of running checks)."""
    t0 = time.perf_counter()
    result = run(written)
    return result, time.perf_counter() - t0


def concurrent_bytes(checks: Sequence[MaskCheck], sites: float) -> float:
    """Peak memory of running ``checks`` side by side with their streamed methods: the sum of their streamed
    figures, each beyond the first with a fresh interpreter (:data:`CHILD_FIXED_BYTES`)."""
    total = 0.0
    for i, c in enumerate(checks):
        total += (c.streamed_bytes_per_site or 0.0) * sites + c.streamed_fixed_bytes + (CHILD_FIXED_BYTES if i else 0)
    return total


def _picklable(fn) -> bool:
    """Whether a fresh interpreter can import ``fn`` (a module-level function of an importable module); a closure,
    a lambda or a function of a notebook or script (``__main__``) handed in by a caller runs in this process."""
    if getattr(fn, "__module__", "__main__") == "__main__":
        return False
    try:
        pickle.dumps(fn)
    except Exception:
        return False
    return True


def side_by_side(checks: Sequence[MaskCheck], streamed: frozenset, sites: float, budget_bytes: float) -> bool:
    """Whether a compile runs ``checks`` side by side (see the module text): two or more, all streamed, each step
    function importable in a fresh interpreter, a second processor, and their figures together within
    ``budget_bytes``."""
    if len(checks) < 2 or any(c.name not in streamed for c in checks):
        return False
    if (os.cpu_count() or 1) < 2 or not all(_picklable(c.run) for c in checks[1:]):
        return False
    return concurrent_bytes(checks, sites) <= budget_bytes


def _start_child(modules: tuple = ()) -> None:
    """In a child, when it starts: a lower scheduling priority (:data:`CHILD_NICENESS`), so that the first check,
    the longest of the standard set (design rules: two passes over the file), keeps its processor and the compile
    ends sooner; then the checks' modules imported and each one's ``prepare_check_process()`` run, if it has one
    (what a check will load anyway, loaded while the compile still writes the mask). Best effort: a module that
    fails here fails again, with its own error, when its check runs."""
    try:
        os.nice(CHILD_NICENESS)
    except OSError:  # not permitted here: same priority, same results
        pass
    for name in modules:
        try:
            prepare = getattr(importlib.import_module(name), "prepare_check_process", None)
            if callable(prepare):
                prepare()
        except Exception:  # noqa: BLE001 - reported by the check itself
            pass


def _ready() -> bool:
    return True


@contextlib.contextmanager
def child_processes(checks: Sequence[MaskCheck], enabled: bool):
    """The child processes of checks that will run side by side (None when not ``enabled``): started at once, so
    that their start-up and imports overlap the writing of the mask; hand the pool to :func:`run_jobs`."""
    if not enabled or len(checks) < 2:
        yield None
        return
    modules = tuple(sorted({c.run.__module__ for c in checks[1:]}))
    pool = ProcessPoolExecutor(max_workers=len(checks) - 1, mp_context=get_context("spawn"),
                               initializer=_start_child, initargs=(modules,))
    try:
        for _ in range(len(checks) - 1):
            pool.submit(_ready)
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def run_jobs(jobs: Sequence[CheckJob], *, parallel: bool = False, cluster=None,
             pool: ProcessPoolExecutor | None = None) -> list[tuple[dict, float]]:
    """(result, seconds) of every job, in the order given.

    Parameters
    ----------
    jobs : sequence of CheckJob
    parallel : bool
        Run the first job here and the others each in a fresh interpreter at the same time.
    cluster : object with ``run_checks(jobs)``, optional
        The compile's Dask cluster (:class:`metalay.mask.cluster.ClusterRunner`): every job is a task there.
    pool : ProcessPoolExecutor, optional
        Child processes already started (:func:`child_processes`); else started here when ``parallel``.
    """
    if cluster is not None and jobs:
        return cluster.run_checks(jobs)
    if not parallel or len(jobs) < 2:
        return [timed_run(j.run, j.written) for j in jobs]
    with contextlib.ExitStack() as stack:
        if pool is None:
            pool = stack.enter_context(ProcessPoolExecutor(
                max_workers=len(jobs) - 1, mp_context=get_context("spawn"), initializer=_start_child))
        futures = [pool.submit(timed_run, j.run, j.written) for j in jobs[1:]]
        first = timed_run(jobs[0].run, jobs[0].written)
        rest = []
        for j, fut in zip(jobs[1:], futures):
            try:
                rest.append(fut.result())
            except BrokenProcessPool as exc:
                raise RuntimeError(f"{j.written.path.name}: the {j.name} check's process stopped before it "
                                   "finished (killed, or out of memory); nothing was published") from exc
    return [first, *rest]
