"""What a compile hands to the checks it runs on the mask it has just written.

:func:`metalay.mask.compile.compile_mask` receives its checks as a sequence of :class:`MaskCheck` steps and never
imports a check module: the standard set is assembled in :func:`metalay.checks.steps.default_checks` (and used by
:func:`metalay.api.compile_design` and the command line). A step is a name, a function of :class:`WrittenMask`
returning a JSON-ready dict (it becomes ``manifest["checks"][name]``) and the design setting that switches it on.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from metalay.cells.library import CellLibrary
from metalay.design.spec import Design

__all__ = ["WrittenMask", "MaskCheck"]


@dataclass(frozen=True)
class WrittenMask:
    """A mask file just written by a compile (still in its staging folder), with what it was made from.

    Attributes
    ----------
    path : Path
        The primary mask file: the GDSII file when one was written, else the OASIS file.
    library : CellLibrary
        The cell library the design used.
    design : Design
        The validated design.
    structures_path : Path or None
        For tone ``"complement"``: a GDSII file holding the structures themselves (the holes), written when a step
        asks for it (:attr:`MaskCheck.needs_structures`); None otherwise.
    max_memory_bytes : int or None
        The compile's memory budget (``--max-memory``); a check whose whole-mask method would exceed it streams
        the mask instead (None: the default budget of :func:`metalay.util.budget.memory_budget`).
    streamed : bool
        The compile's memory admission counted this check with its streamed method (the whole-mask method would not
        fit beside the compile): the step must stream. False: the step chooses by the budget itself.
    sha256 : str or None
        SHA-256 of ``path`` as the compile computed it while writing the file (a step reporting the digest of the
        file it checked need not read it once more for that); None when not known.
    """

    path: Path
    library: CellLibrary
    design: Design
    structures_path: Path | None = None
    max_memory_bytes: int | None = None
    streamed: bool = False
    sha256: str | None = None


def _always(design: Design) -> bool:
    return True


@dataclass(frozen=True)
class MaskCheck:
    """One check a compile runs on the mask it wrote.

    Attributes
    ----------
    name : str
        Key in ``manifest["checks"]``; its time goes to ``timings.json`` as ``<name>_s``.
    run : callable (WrittenMask) -> dict
        Computes the check; a ``"timings_s"`` entry of the result is moved to ``timings.json`` (timings are not
        deterministic, the manifest is).
    enabled : callable (Design) -> bool
        Whether this design asks for the check (e.g. its ``[checks]`` setting).
    needs_structures : bool
        The step wants :attr:`WrittenMask.structures_path` for tone ``"complement"`` masks.
    bytes_per_site : float
        Peak memory of the step per lattice site (measured), for the compile's memory admission before anything
        is written (:func:`metalay.mask.compile.compile_memory_bytes`); 0 for a step of negligible size.
    streamed_bytes_per_site : float or None
        Peak memory per site of the step's streamed method (tile by tile), which it uses when the whole-mask method
        does not fit the memory budget; None: the step has no streamed method.
    streamed_fixed_bytes : float
        Memory of the streamed method that does not grow with the mask (bands, block grids, buffers).
    streams : callable (Design) -> bool
        Whether the streamed method applies to this design (e.g. not to every design kind).
    stream_above_sites : float
        Above this many lattice sites the streamed method is used even where the whole mask would fit (it is then
        the lighter and not the slower one; measured in ``bench/bench_stream_checks.py``).
    """

    name: str
    run: Callable[[WrittenMask], dict]
    enabled: Callable[[Design], bool] = _always
    needs_structures: bool = False
    bytes_per_site: float = 0.0
    streamed_bytes_per_site: float | None = None
    streamed_fixed_bytes: float = 0.0
    streams: Callable[[Design], bool] = _always
    stream_above_sites: float = float("inf")
