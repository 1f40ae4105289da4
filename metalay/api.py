"""The Python face of ``metalay compile``, for notebooks and the command line.

Example
-------
>>> from metalay.api import compile_design, load_design
>>> result = compile_design(load_design("my_design.toml"), "out/my_design")   # doctest: +SKIP
>>> print("\\n".join(result.summary))                                        # doctest: +SKIP

:func:`compile_design` is :func:`prepare_design` (optimised multiplex encodings) then
:func:`metalay.mask.compile.compile_mask` with the standard checks (:func:`metalay.checks.steps.default_checks`:
design rules, then the quick optical check); call ``compile_mask`` with your own
:class:`~metalay.mask.steps.MaskCheck` steps to run others.
"""

from __future__ import annotations

from pathlib import Path

from metalay.checks.steps import compile_report_step, default_checks
from metalay.design.spec import Design, load_design, parse_design
from metalay.mask.compile import SAFETY_CAUTION, SITES_PER_TILE, CompileResult, compile_mask

__all__ = ["compile_design", "prepare_design", "load_design", "parse_design", "CompileResult", "SAFETY_CAUTION"]


def prepare_design(design: Design) -> tuple[Design, dict]:
    """What a design asks to be worked out before it is written: ``multiplex`` terms with ``encoding =
    "optimise"`` get their optimised weights and offsets (:func:`metalay.measure.demux.optimise_design_encodings`).

    Returns
    -------
    design : Design
        The design to write (the same object when nothing is asked).
    annotations : dict
        For the manifest: ``{"multiplex_encoding": [records]}`` when an encoding was optimised, else empty.
    """
    from metalay.design.phase import Multiplex

    if not any(isinstance(t, Multiplex) and t.encoding == "optimise" for t in design.terms):
        return design, {}
    from metalay.measure.demux import optimise_design_encodings

    design, records = optimise_design_encodings(design)
    return design, {"multiplex_encoding": records}


def compile_design(design: Design, out_dir: str | Path, *, run_rules: bool | None = None,
                   run_optics: bool | None = None, show_progress: bool | None = None,
                   sites_per_tile: int = SITES_PER_TILE, max_memory_bytes: int | None = None,
                   report: bool = True, workers: int | None = None,
                   scheduler: str | None = None) -> CompileResult:
    """Compile ``design`` into mask files, a manifest and the standard checks in ``out_dir`` (all or nothing).

    Parameters
    ----------
    design : Design
        A validated design (:func:`load_design` or :func:`parse_design`).
    out_dir : str or Path
        Output folder, replaced as a whole when the compile succeeds (new, empty, or an earlier metalay output).
    run_rules, run_optics : bool or None
        Override the design's ``[checks]`` settings (None: as the design says).
    show_progress : bool or None
        Progress bar on stderr (None: only on a terminal).
    sites_per_tile : int
        Tile size bound (memory).
    max_memory_bytes : int, optional
        Memory budget for the admission check (default: half of what this process may use).
    report : bool
        Write ``report.html`` (:func:`metalay.checks.steps.compile_report_step`) after the manifest.
    workers : int, optional
        Run the tiles on a local Dask cluster of this many worker processes (byte-identical output).
    scheduler : str, optional
        Run the tiles on the existing Dask cluster at this address (its workers must see ``out_dir``).

    Returns
    -------
    CompileResult
        Files, manifest, warnings and summary lines.
    """
    design, annotations = prepare_design(design)
    return compile_mask(design, out_dir, checks=default_checks(rules=run_rules, optics=run_optics),
                        show_progress=show_progress, sites_per_tile=sites_per_tile, annotations=annotations,
                        max_memory_bytes=max_memory_bytes, report=compile_report_step if report else None,
                        workers=workers, scheduler=scheduler)
