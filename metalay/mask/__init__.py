"""Mask stage: phase -> cell and rotation -> snapped polygons -> process -> GDSII/OASIS + manifest.

===============  =======================================================================  ========================
module           stage                                                                    public entry
===============  =======================================================================  ========================
``mapping.py``   phase -> cell + rotation per site (theta = sigma phi / 2 mod pi)         ``assign_cells``
``spinmap.py``   two target phases (one per input spin) -> cell + rotation per site          ``assign_spin_cells``
                 (spin-decoupled libraries)
``layout.py``    rotated outlines snapped to the database grid, shape grouping, frame,    ``element_offsets``,
                 label                                                                    ``group_shapes``
``process.py``   bias, tone inversion (band by band, hole-free pieces), write fields,     ``bias_outline_nm``,
                 alignment marks, dose datatypes, Babinet slot estimate                   ``complement_tile``,
                                                                                          ``fit_write_fields``
``steps.py``     what a compile hands to its checks                                       ``MaskCheck``,
                                                                                          ``WrittenMask``
``compile.py``   the pipeline tile by tile in named stages (plan, tiles written as they    ``compile_mask``
                 come, checks handed in, manifest)
``_emit.py``     one tile -> encoded GDSII/OASIS parts (flat, levels, fields, tone);      (internal)
                 the sink that writes them in tile order
``cluster.py``   the tiles (and streamed checks) as tasks on a Dask cluster, parts        ``tile_runner``
                 merged in order
``checkrun.py``  the checks one after another, side by side (child processes) or on the   ``run_jobs``,
                 cluster                                                                  ``side_by_side``
===============  =======================================================================  ========================

Imports: design, cells, io, util. Never the checks: :func:`compile_mask` receives them as ``MaskCheck`` steps
(the standard set: :func:`metalay.checks.steps.default_checks`, passed by :func:`metalay.api.compile_design`).
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "assign_cells": "mapping",
    "assign_spin_cells": "spinmap",
    "element_offsets": "layout",
    "group_shapes": "layout",
    "bias_outline_nm": "process",
    "complement_tile": "process",
    "fit_write_fields": "process",
    "MaskCheck": "steps",
    "WrittenMask": "steps",
    "compile_mask": "compile",
    "CompileResult": "compile",
    "SAFETY_CAUTION": "compile",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
