"""Build cell libraries from the RCWA solver, import responses simulated elsewhere, and plot libraries.

A build spec (TOML, our own keys, units in names) names the stack, the cell kind, the dimension sweep, the
process rules, the solver settings and the band. :func:`build_library` sweeps the dimensions at the design
wavelength, keeps only geometries that pass the rules, picks

* for ``phase_mechanism = "geometric"``: the cell with the highest conversion efficiency
  ``|(t_long - t_short)/2|^2``;
* for ``"propagation"``: ``levels`` pillars whose zeroth-order fields best cover ``0..2 pi`` in equal phase steps
  with the flattest, largest amplitude,

then computes the response spectra of the chosen cells over the band and a convergence check at higher truncation,
and returns a :class:`metalay.cells.library.CellLibrary` with full provenance (no dates, so rebuilding gives the same
bytes). Every number in the library comes from :func:`metalay.cells.rcwa.solve`.

Spec keys (see ``libraries/specs/*.toml``)::

    [library]  name, description, mode, phase_mechanism, design_wavelength_nm, period_nm, lattice,
               geometry_source, notes
    [stack]    incident_medium, exit_medium; [[stack.layers]] name, material, thickness_nm, patterned,
               background (patterned layer only)
    [rules]    min_feature_nm, min_gap_nm, max_aspect_ratio, grid_nm, source
    [sweep]    kind ("nanofin" | "slot" | "elliptic_pillar" | "round_pillar"), one {start_nm, stop_nm, step_nm} table or
               a list per dimension (length_nm/width_nm, major_nm/minor_nm, diameter_nm), optional height_nm list,
               levels (propagation only)
    [solver]   tolerance_abs_t (default 2e-3), tolerance_phase_deg (default 0.5), max_harmonics (default 20),
               optional harmonics_x, harmonics_y (sweep truncation; default: chosen from the tolerances on the
               median geometry, at most sweep_max_harmonics, default 8), n_stairs
    [band]     relative_half_width, count
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.cells.decoupled import level_report
from metalay.cells.materials import get_material
from metalay.cells.rcwa import (
    DEFAULT_TOLERANCE_ABS_T,
    DEFAULT_TOLERANCE_PHASE_DEG,
    Layer,
    Stack,
    ellipse_pattern,
    rect_pattern,
    solve,
)
from metalay.errors import CellBuildError, LibraryError, MetalayError
from metalay.validate import TomlTable, load_toml

__all__ = ["BuildSpec", "SweepResult", "load_build_spec", "sweep", "converge_points",
           "choose_sweep_harmonics", "ENERGY_TOLERANCE", "rotation_check", "pick_geometric",
           "pick_propagation", "pick_decoupled", "build_library", "import_responses", "import_template",
           "IMPORT_TEMPLATE", "plot_library", "library_table"]

_DIMS = {"nanofin": ("length_nm", "width_nm"), "slot": ("length_nm", "width_nm"),
         "elliptic_pillar": ("major_nm", "minor_nm"),
         "round_pillar": ("diameter_nm",)}


_REQUIRED = ...


@dataclass(frozen=True)
class BuildSpec:
    """A validated build spec (all lengths in nm)."""

    path: str
    name: str
    description: str
    mode: str
    phase_mechanism: str
    design_wavelength_nm: float
    period_nm: float
    lattice: str
    geometry_source: str
    notes: str
    incident_medium: str
    exit_medium: str
    layers: tuple            # dicts: name, material, thickness_nm, patterned, background
    rules: dict
    kind: str
    dims: dict               # name -> ndarray of candidate values
    heights_nm: tuple        # candidate heights of the patterned layer
    levels: int
    harmonics: tuple | None  # sweep truncation, or None: chosen from the convergence target
    n_stairs: int
    tolerance_abs_t: float
    tolerance_phase_deg: float
    max_harmonics: int
    sweep_max_harmonics: int  # cap of the sweep's truncation (the chosen cells are converged per point after)
    band_half_width: float
    band_count: int
    retardance_tolerance_deg: float = 10.0  # spin_decoupled: largest |arg(t_long / t_short) - pi| of a chosen cell


def _text(t: TomlTable, key: str, default=_REQUIRED) -> str:
    return t.string(key, default)


def _pos(t: TomlTable, key: str, default=_REQUIRED, lo=0.0, hi=1e7) -> float:
    """A finite number in ``(lo, hi]``, as float."""
    return float(t.number(key, default, lo=lo, lo_open=True, hi=hi))


def _values(t: TomlTable, key: str) -> np.ndarray:
    """Candidate values in nm: a list, or a table ``{start_nm, stop_nm, step_nm}``; 1..400 positive values."""
    v = t.raw(key, None)
    if isinstance(v, list):
        if not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
            t.fail(key, v, "expected a list of positive numbers")
        arr = np.array([float(x) for x in v])
    elif isinstance(v, dict):
        r = t.table(key)
        start, stop, step = _pos(r, "start_nm"), _pos(r, "stop_nm"), _pos(r, "step_nm")
        if stop < start:
            t.fail(key, v, "expected stop_nm >= start_nm")
        arr = start + step * np.arange(int(math.floor((stop - start) / step + 1e-9)) + 1)
    else:
        raise CellBuildError(f"{t.where}: missing key '{t.key(key)}' (a list of values in nm or a table "
                             "{start_nm, stop_nm, step_nm})")
    if arr.size == 0 or arr.size > 400 or np.any(arr <= 0) or not np.all(np.isfinite(arr)):
        t.fail(key, v, "expected 1..400 positive values")
    return arr


def _load_tables(path: Path, sections) -> TomlTable:
    """Read a TOML file that must hold the given tables; one-line CellBuildError otherwise."""
    doc = TomlTable(load_toml(path, what="TOML file", error=CellBuildError), str(path), error=CellBuildError)
    for sec in sections:
        doc.table(sec)
    return doc


def _rules(ru: TomlTable) -> dict:
    return {"min_feature_nm": _pos(ru, "min_feature_nm"), "min_gap_nm": _pos(ru, "min_gap_nm"),
            "max_aspect_ratio": _pos(ru, "max_aspect_ratio"), "grid_nm": _pos(ru, "grid_nm"),
            "source": _text(ru, "source")}


def _stack_layers(st: TomlTable, *, background: bool) -> list[dict]:
    layers = []
    for lay in st.tables("layers"):
        entry = {"name": _text(lay, "name"), "material": _text(lay, "material"),
                 "thickness_nm": _pos(lay, "thickness_nm", hi=1e5 if background else 1e7),
                 "patterned": lay.boolean("patterned", False)}
        if background:
            entry["background"] = _text(lay, "background", "air")
        layers.append(entry)
    return layers


def load_build_spec(path) -> BuildSpec:
    """Read and validate a build spec TOML file (through :class:`metalay.validate.TomlTable`).

    Raises
    ------
    CellBuildError
        Naming the file, the dotted key, the value and the allowed range.
    """
    path = Path(path)
    where = str(path)
    doc = _load_tables(path, ("library", "stack", "rules", "sweep"))
    lib, st, ru, sw = doc.table("library"), doc.table("stack"), doc.table("rules"), doc.table("sweep")
    so, bd = doc.table("solver", {}), doc.table("band", {})
    name = _text(lib, "name")
    if not name or any(c in name for c in "/\\ ") or name.startswith("."):
        lib.fail("name", name, "expected non-empty text, no spaces or slashes")
    mode = lib.string("mode", options=("transmission", "reflection"))
    mech = lib.string("phase_mechanism", options=("geometric", "propagation", "spin_decoupled"))
    lattice = lib.string("lattice", "square")
    if lattice != "square":
        lib.fail("lattice", lattice, "allowed: 'square' (the solver handles rectangular lattices only)")
    wl = _pos(lib, "design_wavelength_nm", lo=100.0, hi=20000.0)
    period = _pos(lib, "period_nm", hi=1e5)
    inc = _text(st, "incident_medium")
    ext = _text(st, "exit_medium")
    layers = _stack_layers(st, background=True)
    if sum(lay["patterned"] for lay in layers) != 1:
        raise CellBuildError(f"{where}: key 'stack.layers': exactly one layer must have patterned = true")
    checks = [(f"stack.layers[{k}].{key}", lay[key]) for k, lay in enumerate(layers)
              for key in ("material", "background")]
    for key, mat in checks + [("stack.incident_medium", inc), ("stack.exit_medium", ext)]:
        try:
            get_material(mat, base_dir=path.parent)
        except MetalayError as exc:
            raise CellBuildError(f"{where}: key '{key}': {exc}") from exc
    rules = _rules(ru)
    kind = sw.string("kind", options=tuple(_DIMS))
    if mech in ("geometric", "spin_decoupled") and kind not in ("nanofin", "elliptic_pillar"):
        sw.fail("kind", kind, f"allowed: an anisotropic kind for {mech} phase ('nanofin', 'elliptic_pillar')")
    dims = {d: _values(sw, d) for d in _DIMS[kind]}
    patterned = next(lay for lay in layers if lay["patterned"])
    heights = tuple(_values(sw, "height_nm")) if sw.has("height_nm") else (patterned["thickness_nm"],)
    if mech == "spin_decoupled" and len(heights) != 1:
        sw.fail("height_nm", [float(h) for h in heights], "a spin_decoupled set needs one height (all its cells share "
                "the film)")
    levels = int(_pos(sw, "levels", 8.0, hi=64)) if mech == "propagation" else 1
    if mech == "spin_decoupled":
        levels = int(sw.number("levels", 8, lo=2, hi=64, integer=True))
    ret_tol = float(sw.number("retardance_tolerance_deg", 10.0, lo=0.5, hi=45.0)) if mech == "spin_decoupled" else 10.0
    if so.has("convergence_extra"):
        so.fail("convergence_extra", so.raw("convergence_extra"), "no longer used: convergence is checked at "
                "every tabulated wavelength against tolerance_abs_t and tolerance_phase_deg")
    harmonics = None
    if so.has("harmonics_x") or so.has("harmonics_y"):
        hx = int(_pos(so, "harmonics_x", lo=0.5, hi=25))
        harmonics = (hx, int(_pos(so, "harmonics_y", float(hx), lo=0.5, hi=25)))
    n_stairs = int(_pos(so, "n_stairs", 8.0, lo=0.5, hi=64))
    tol_abs = _pos(so, "tolerance_abs_t", DEFAULT_TOLERANCE_ABS_T, lo=1e-5, hi=0.1)
    tol_phase = _pos(so, "tolerance_phase_deg", DEFAULT_TOLERANCE_PHASE_DEG, lo=1e-3, hi=10.0)
    max_h = int(_pos(so, "max_harmonics", 20.0, lo=1.5, hi=40))
    sweep_max = int(_pos(so, "sweep_max_harmonics", 8.0, lo=1.5, hi=40))
    half = _pos(bd, "relative_half_width", 0.15, hi=0.5)
    count = int(_pos(bd, "count", 11.0, lo=0.5, hi=201))
    return BuildSpec(where, name, _text(lib, "description", ""), mode, mech, wl,
                     period, lattice, _text(lib, "geometry_source"),
                     _text(lib, "notes", ""), inc, ext,
                     tuple(layers), rules, kind, dims, heights, levels, harmonics, n_stairs, tol_abs, tol_phase,
                     max_h, sweep_max, half,
                     count, ret_tol)


# ----------------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SweepResult:
    """Responses of all rule-passing geometries at the design wavelength.

    Attributes
    ----------
    dims : dict name -> ndarray (G,)
        Dimensions of each geometry (and ``height_nm``).
    t_long, t_short : ndarray (G,) complex
    power_long, power_short : ndarray (G,) float
    n_candidates : int
        Geometries in the sweep before the rules.
    harmonics : (int, int)
        Truncation of the sweep (chosen from the convergence target unless the spec fixes it).
    """

    dims: dict
    t_long: np.ndarray
    t_short: np.ndarray
    power_long: np.ndarray
    power_short: np.ndarray
    n_candidates: int
    harmonics: tuple = (0, 0)


def _rule_mask(spec: BuildSpec, dims: dict, height: np.ndarray) -> np.ndarray:
    """Geometries passing min feature, min gap (for any rotation) and aspect ratio."""
    r = spec.rules
    vals = [dims[d] for d in _DIMS[spec.kind]]
    smallest = np.minimum.reduce(vals)
    ok = smallest >= r["min_feature_nm"] - 1e-9
    if spec.kind in ("nanofin", "slot"):
        extent = np.hypot(dims["length_nm"], dims["width_nm"])      # circumscribed diameter: any rotation
        ok &= dims["length_nm"] > dims["width_nm"]
    elif spec.kind == "elliptic_pillar":
        extent = dims["major_nm"]
        ok &= dims["major_nm"] > dims["minor_nm"]
    else:
        extent = dims["diameter_nm"]
    ok &= extent + r["min_gap_nm"] <= spec.period_nm + 1e-9
    ok &= height / smallest <= r["max_aspect_ratio"] + 1e-9
    return ok


def _stack_for(spec: BuildSpec, dims: dict, height: np.ndarray, wavelength_nm: np.ndarray) -> Stack:
    """Solver stack for geometries/wavelengths batched over B (all arrays (B,))."""
    base = Path(spec.path).parent
    eps = lambda name: get_material(name, base_dir=base).epsilon(wavelength_nm)  # noqa: E731
    layers = []
    p = spec.period_nm
    for lay in spec.layers:
        if lay["patterned"]:
            e_in, e_out = eps(lay["material"]), eps(lay["background"])
            if spec.kind in ("nanofin", "slot"):  # a slot: material = the hole's filling, background = the film
                pat = rect_pattern(dims["length_nm"], dims["width_nm"], e_in, e_out, p, p)
            elif spec.kind == "elliptic_pillar":
                pat = ellipse_pattern(dims["major_nm"], dims["minor_nm"], e_in, e_out, p, p, n_stairs=spec.n_stairs)
            else:
                pat = ellipse_pattern(dims["diameter_nm"], dims["diameter_nm"], e_in, e_out, p, p,
                                      n_stairs=spec.n_stairs)
            layers.append(Layer(height, pat))
        else:
            layers.append(Layer(lay["thickness_nm"], eps(lay["material"])))
    return Stack(eps(spec.incident_medium), tuple(layers), eps(spec.exit_medium), p, p)


_STEP = 2   # orders added per axis between the two truncations compared


def _responses(spec: BuildSpec, dims: dict, height, wavelength_nm, harmonics, *, progress=None, chunk=16,
               other_side=False):
    """(t_long, t_short, power_long, power_short) for batched geometries, in chunks (progress callback per chunk).

    With ``other_side=True`` also the total power leaving on the other side (reflection for a transmission
    library), ``(..., other_long, other_short)``, for the energy balance of lossless stacks.
    """
    b = np.broadcast(*dims.values(), height, wavelength_nm).shape[0]
    full = {k: np.broadcast_to(v, (b,)).astype(float) for k, v in dims.items()}
    h = np.broadcast_to(height, (b,)).astype(float)
    wl = np.broadcast_to(wavelength_nm, (b,)).astype(float)
    out = [np.empty(b, complex), np.empty(b, complex), np.empty(b), np.empty(b), np.empty(b), np.empty(b)]
    for s in range(0, b, chunk):
        sl = slice(s, min(b, s + chunk))
        res = solve(_stack_for(spec, {k: v[sl] for k, v in full.items()}, h[sl], wl[sl]), wl[sl],
                    harmonics=harmonics)
        jm = res.t_jones if spec.mode == "transmission" else res.r_jones
        pw, po = (res.power_t, res.power_r) if spec.mode == "transmission" else (res.power_r, res.power_t)
        out[0][sl], out[1][sl] = jm[:, 0, 0], jm[:, 1, 1]
        out[2][sl], out[3][sl] = pw[:, 0], pw[:, 1]
        out[4][sl], out[5][sl] = po[:, 0], po[:, 1]
        if spec.kind == "round_pillar":
            # a round pillar is isotropic at normal incidence; the y-sliced staircase breaks that by ~1e-3, so
            # both columns carry the polarisation average (the contract's t_long == t_short)
            for i_l, i_s in ((0, 1), (2, 3), (4, 5)):
                avg = (out[i_l][sl] + out[i_s][sl]) / 2
                out[i_l][sl], out[i_s][sl] = avg, avg
        if progress is not None:
            progress(sl.stop - sl.start)
    return tuple(out) if other_side else tuple(out[:4])


def _change(t0l, t0s, t1l, t1s):
    """Per point (change of |t|, change of phase in deg), the larger over the two polarisations; the phase is
    compared only where |t| >= 0.1 (the phase of a vanishing amplitude carries no information)."""
    d_abs = np.maximum(np.abs(np.abs(t1l) - np.abs(t0l)), np.abs(np.abs(t1s) - np.abs(t0s)))
    ph = lambda a, b: np.where((np.abs(a) >= 0.1) & (np.abs(b) >= 0.1),  # noqa: E731
                               np.abs(np.angle(b * np.conj(a), deg=True)), 0.0)
    return d_abs, np.maximum(ph(t0l, t1l), ph(t0s, t1s))


def converge_points(spec: BuildSpec, dims: dict, height, wavelength_nm, start):
    """Responses converged point by point: the truncation of each (geometry, wavelength) point is raised by 2
    orders per axis from ``start`` until its responses change by at most the spec's tolerances.

    Parameters
    ----------
    spec : BuildSpec
    dims : dict name -> ndarray (P,)
        Geometry per point (with ``wavelength_nm`` (P,) and ``height`` scalar or (P,)).
    start : (int, int)
        First truncation.

    Returns
    -------
    dict of ndarray (P,)
        ``t_long, t_short, power_long, power_short, other_long, other_short`` at the finer truncation of the last
        comparison, ``harmonics`` (P, 2) used, ``change_abs_t``, ``change_phase_deg`` achieved, ``converged``.

    Notes
    -----
    The change is measured between truncations ``M`` and ``M + 2`` (both axes); the stored response is the one at
    ``M + 2``. A point that does not reach the tolerances by ``spec.max_harmonics`` keeps its last values and is
    flagged ``converged = False`` (the library states it).
    """
    p = np.broadcast(*dims.values(), height, wavelength_nm).shape[0]
    full = {k: np.broadcast_to(v, (p,)).astype(float) for k, v in dims.items()}
    h = np.broadcast_to(height, (p,)).astype(float)
    wl = np.broadcast_to(wavelength_nm, (p,)).astype(float)
    cur = (int(start[0]), int(start[1]))
    prev = _responses(spec, full, h, wl, cur, other_side=True)
    result = {k: np.empty(p, complex if k in ("t_long", "t_short") else float) for k in
              ("t_long", "t_short", "power_long", "power_short", "other_long", "other_short", "change_abs_t",
               "change_phase_deg")}
    result["harmonics"] = np.zeros((p, 2), int)
    result["converged"] = np.zeros(p, bool)
    todo = np.arange(p)
    while todo.size:
        nxt = (cur[0] + _STEP, cur[1] + _STEP)
        sub = {k: v[todo] for k, v in full.items()}
        new = _responses(spec, sub, h[todo], wl[todo], nxt, other_side=True)
        d_abs, d_ph = _change(prev[0], prev[1], new[0], new[1])
        ok = (d_abs <= spec.tolerance_abs_t) & (d_ph <= spec.tolerance_phase_deg)
        last = max(nxt) + _STEP > spec.max_harmonics
        done = ok | last
        for key, arr in zip(("t_long", "t_short", "power_long", "power_short", "other_long", "other_short"), new):
            result[key][todo[done]] = arr[done]
        result["change_abs_t"][todo[done]] = d_abs[done]
        result["change_phase_deg"][todo[done]] = d_ph[done]
        result["harmonics"][todo[done]] = nxt
        result["converged"][todo[done]] = ok[done]
        prev = tuple(a[~done] for a in new)
        todo = todo[~done]
        cur = nxt
    return result


def choose_sweep_harmonics(spec: BuildSpec, dims: dict, height) -> tuple:
    """Sweep truncation from the convergence target: the truncation at which a representative geometry (the
    median of the rule-passing sweep) converges at the design wavelength (:func:`converge_points`)."""
    if spec.harmonics is not None:
        return spec.harmonics
    from dataclasses import replace

    mid = {k: np.array([np.median(v)]) for k, v in dims.items()}
    capped = replace(spec, max_harmonics=min(spec.max_harmonics, spec.sweep_max_harmonics))
    res = converge_points(capped, mid, float(np.median(height)), spec.design_wavelength_nm, _start(spec))
    return tuple(int(v) for v in res["harmonics"][0])


def _start(spec: BuildSpec) -> tuple:
    """First truncation of the automatic choice: 4 orders per axis (the coarsest useful resolution)."""
    return (4, 4)


def sweep(spec: BuildSpec, *, progress=None) -> SweepResult:
    """Solve every rule-passing geometry of the spec at the design wavelength.

    Parameters
    ----------
    spec : BuildSpec
    progress : callable(int) or None
        Called with the number of geometries finished after each chunk (for a progress bar).
    """
    names = _DIMS[spec.kind]
    grids = np.meshgrid(*[spec.dims[d] for d in names], np.array(spec.heights_nm), indexing="ij")
    flat = {d: g.ravel() for d, g in zip(names, grids[:-1])}
    height = grids[-1].ravel()
    ok = _rule_mask(spec, flat, height)
    if not np.any(ok):
        raise CellBuildError(f"{spec.path}: no geometry of the sweep passes the rules {spec.rules}")
    dims = {d: v[ok] for d, v in flat.items()}
    harmonics = choose_sweep_harmonics(spec, dims, height[ok])
    tl, ts, pl, ps = _responses(spec, dims, height[ok], spec.design_wavelength_nm, harmonics, progress=progress)
    return SweepResult({**dims, "height_nm": height[ok]}, tl, ts, pl, ps, int(ok.size), harmonics)


def pick_geometric(sw: SweepResult) -> int:
    """Index of the geometry with the highest conversion efficiency ``|(t_long - t_short)/2|^2``."""
    ce = np.abs((sw.t_long - sw.t_short) / 2) ** 2
    return int(np.argmax(ce))


def pick_propagation(sw: SweepResult, levels: int) -> np.ndarray:
    """Indices of ``levels`` pillars approximating ``exp(i (phi0 + 2 pi k / levels))`` with flat, high amplitude.

    Notes
    -----
    For each global offset ``phi0`` on a 1-degree grid and each level k, take the pillar maximising the projection
    ``Re(t exp(-i(phi0 + 2 pi k/levels)))``; keep the offset whose worst projection (the flattest and largest
    amplitude set) is best. Ties resolve to the smaller offset and smaller index (deterministic).
    """
    t = sw.t_long
    offsets = np.deg2rad(np.arange(360.0))
    targets = offsets[:, None] + 2 * np.pi * np.arange(levels)[None, :] / levels       # (O, K)
    proj = np.real(t[None, None, :] * np.exp(-1j * targets)[:, :, None])              # (O, K, G)
    best = np.argmax(proj, axis=2)                                                     # (O, K)
    score = np.take_along_axis(proj, best[:, :, None], axis=2)[:, :, 0].min(axis=1)    # (O,)
    o = int(np.argmax(score))
    return best[o]


def _cell_id(kind: str, dims: dict) -> str:
    f = lambda v: (f"{v:.0f}" if abs(v - round(v)) < 1e-9 else f"{v:g}".replace(".", "p"))  # noqa: E731
    if kind == "nanofin":
        return f"fin-{f(dims['length_nm'])}x{f(dims['width_nm'])}"
    if kind == "slot":
        return f"slot-{f(dims['length_nm'])}x{f(dims['width_nm'])}"
    if kind == "elliptic_pillar":
        return f"ellipse-{f(dims['major_nm'])}x{f(dims['minor_nm'])}"
    return f"pillar-d{f(dims['diameter_nm'])}"


def build_library(spec: BuildSpec, *, progress=None):
    """Sweep, pick, compute spectra and convergence, and return a CellLibrary (not yet written).

    Parameters
    ----------
    spec : BuildSpec
    progress : callable(total: int) -> callable(int) or None
        Factory of a progress callback for the sweep (the CLI passes a tqdm bar).

    Returns
    -------
    (CellLibrary, SweepResult)
    """
    from metalay.cells.library import CellLibrary, CellSpec

    names = _DIMS[spec.kind]
    n_total = int(np.prod([spec.dims[d].size for d in names])) * len(spec.heights_nm)
    cb = progress(n_total) if progress is not None else None
    sw = sweep(spec, progress=cb)
    picked = _pick_cells(spec, sw)
    sw = picked.sweep
    ids, uniq, height = picked.ids, picked.uniq, picked.height
    cell_dims = {d: np.array([uniq[i][d] for i in ids]) for d in names}
    c = len(ids)
    wl = spec.design_wavelength_nm * np.linspace(1 - spec.band_half_width, 1 + spec.band_half_width,
                                                 spec.band_count)
    wl = np.round(wl, 6)
    rep = {d: np.repeat(v, wl.size) for d, v in cell_dims.items()}
    pts = converge_points(spec, rep, height, np.tile(wl, c), sw.harmonics)
    tl, ts, pl, ps = (_q(pts[k].reshape(c, wl.size)) for k in ("t_long", "t_short", "power_long", "power_short"))
    conv = _convergence_block(spec, ids, wl, pts)
    spin_block = _spin_block(spec, sw, picked) if picked.spin_levels is not None else None
    found = _found_note(spec, sw, picked, tl, ts, wl, spin_block)
    provenance = {"geometry_source": spec.geometry_source,
                  "responses_source": f"metalay cells build {Path(spec.path).name}",
                  "solver": _solver_block(spec, sw, conv), "materials": _materials_block(spec),
                  "notes": (spec.notes + " " if spec.notes else "") + found}
    layers = tuple({"name": lay["name"], "material": lay["material"],
                    "thickness_nm": height if lay["patterned"] else lay["thickness_nm"],
                    "patterned": lay["patterned"], **({"background": lay["background"]} if lay["patterned"] else {})}
                   for lay in spec.layers)
    patterned = next(lay["name"] for lay in spec.layers if lay["patterned"])
    cells = tuple(CellSpec(id=i, kind=spec.kind, layer=patterned,
                           dims_nm=tuple((d, float(uniq[i][d])) for d in names)) for i in ids)
    lib = CellLibrary(name=spec.name, description=spec.description, mode=spec.mode,
                      phase_mechanism=spec.phase_mechanism, design_wavelength_nm=spec.design_wavelength_nm,
                      period_nm=spec.period_nm, lattice=spec.lattice, incident_medium=spec.incident_medium,
                      exit_medium=spec.exit_medium if spec.mode == "transmission" else spec.incident_medium,
                      layers=layers, rules=dict(spec.rules), provenance=provenance, cells=cells,
                      wavelengths_nm=wl, t_long=tl, t_short=ts, power_long=pl, power_short=ps,
                      extra={"spin_decoupled": spin_block} if spin_block is not None else {})
    return lib, sw


@dataclass(frozen=True)
class _Picked:
    """The cells the builder chose: sorted unique ids, their dimensions, the common height, the spin levels."""

    sweep: "SweepResult"
    picks: np.ndarray
    ids: list
    uniq: dict
    height: float
    spin_levels: object = None


def _pick_cells(spec: BuildSpec, sw) -> _Picked:
    """Choose the library cells from the sweep by the phase mechanism; one height; de-duplicated, sorted by id."""
    names = _DIMS[spec.kind]
    spin_levels = None
    if spec.phase_mechanism == "geometric":
        picks = np.array([pick_geometric(sw)])
    elif spec.phase_mechanism == "propagation":
        picks = pick_propagation(sw, spec.levels)
    else:
        spin_levels, sw = pick_decoupled(spec, sw)
        picks = spin_levels.distinct
    heights = sw.dims["height_nm"][picks]
    if np.unique(heights).size != 1:
        raise CellBuildError(f"{spec.path}: picked cells have different heights {np.unique(heights)}; "
                             "sweep one height for propagation-phase libraries")
    chosen = [{d: float(sw.dims[d][i]) for d in names} for i in picks]
    # de-duplicate (a propagation set may pick one pillar for two neighbouring levels) and sort by id
    uniq = {}
    for c in chosen:
        uniq.setdefault(_cell_id(spec.kind, c), c)
    return _Picked(sweep=sw, picks=picks, ids=sorted(uniq), uniq=uniq, height=float(heights[0]),
                   spin_levels=spin_levels)


def _convergence_block(spec: BuildSpec, ids, wl, pts) -> dict:
    """Per-point convergence record; refuses a lossless stack whose R + T misses 1 (a solver failure)."""
    lossless = _lossless(spec, wl)
    per_point = []
    for n, (ci, wi) in enumerate((ci, wi) for ci in range(len(ids)) for wi in range(wl.size)):
        bal = (pts["power_long"][n] + pts["other_long"][n], pts["power_short"][n] + pts["other_short"][n])
        if lossless[wi] and max(abs(bal[0] - 1), abs(bal[1] - 1)) > ENERGY_TOLERANCE:
            raise CellBuildError(f"{spec.path}: cell {ids[ci]} at {wl[wi]:g} nm: R + T = {bal[0]:.9f} / {bal[1]:.9f} "
                                 f"for a lossless stack (allowed 1 +- {ENERGY_TOLERANCE:g}); solver failure")
        per_point.append({"cell_id": ids[ci], "wavelength_nm": float(wl[wi]),
                          "harmonics_x": int(pts["harmonics"][n, 0]), "harmonics_y": int(pts["harmonics"][n, 1]),
                          "change_abs_t": _rc(pts["change_abs_t"][n]),
                          "change_phase_deg": _rc(pts["change_phase_deg"][n]),
                          "converged": bool(pts["converged"][n]), "lossless": bool(lossless[wi]),
                          "r_plus_t_long": _r(bal[0]), "r_plus_t_short": _r(bal[1])})
    return {"tolerance_abs_t": spec.tolerance_abs_t, "tolerance_phase_deg": spec.tolerance_phase_deg,
            "max_harmonics": spec.max_harmonics, "energy_tolerance": ENERGY_TOLERANCE,
            "method": (f"per point, truncation raised by {_STEP} orders per axis from the sweep truncation until |t| "
                       "and phase (where |t| >= 0.1) change by at most the tolerances; the finer solve is stored"),
            "all_converged": bool(np.all(pts["converged"])),
            "max_change_abs_t": _rc(np.max(pts["change_abs_t"])),
            "max_change_phase_deg": _rc(np.max(pts["change_phase_deg"])), "points": per_point}


def _materials_block(spec: BuildSpec) -> dict:
    """Description of every material the stack names, sorted by name."""
    base = Path(spec.path).parent
    mats = {}
    for nm in {spec.incident_medium, spec.exit_medium, *[lay["material"] for lay in spec.layers],
               *[lay["background"] for lay in spec.layers if lay["patterned"]]}:
        mats[nm] = get_material(nm, base_dir=base).describe()
    return {k2: mats[k2] for k2 in sorted(mats)}


def _spin_block(spec: BuildSpec, sw, picked: _Picked) -> dict:
    """The spin-decoupled level report of the picked cells (library order)."""
    names = _DIMS[spec.kind]
    ids = picked.ids
    to_cell = {int(g): ids.index(_cell_id(spec.kind, {d: float(sw.dims[d][g]) for d in names}))
               for g in picked.spin_levels.distinct}
    geoms = np.array(sorted(to_cell, key=to_cell.get))  # sweep index of each library cell, in library order
    return level_report(ids, sw.t_long[geoms], sw.t_short[geoms], picked.spin_levels, to_cell,
                        retardance_tolerance_rad=np.deg2rad(spec.retardance_tolerance_deg),
                        wavelength_nm=spec.design_wavelength_nm)


def _found_note(spec: BuildSpec, sw, picked: _Picked, tl, ts, wl, spin_block) -> str:
    """One sentence on what the solver found, at the band centre."""
    ids, height = picked.ids, picked.height
    k = wl.size // 2
    if spec.phase_mechanism == "geometric":
        ce = np.abs((tl[:, k] - ts[:, k]) / 2) ** 2
        return (f"Solver found: best of {sw.t_long.size} rule-passing geometries ({sw.n_candidates} swept) is "
                f"{ids[0]} at height {height:g} nm: |t_long| = {abs(tl[0, k]):.4f}, |t_short| = {abs(ts[0, k]):.4f}, "
                f"phase difference {np.angle(tl[0, k] / ts[0, k], deg=True):.2f} deg, conversion efficiency "
                f"{ce[0]:.4f} at {wl[k]:g} nm.")
    if spin_block is not None:
        return _decoupled_found(spin_block, sw, height)
    ph = np.angle(tl[:, k] / tl[0, k], deg=True) % 360
    return (f"Solver found: {len(ids)} pillars from {sw.t_long.size} rule-passing diameters ({sw.n_candidates} "
            f"swept), |t| from {np.min(np.abs(tl[:, k])):.3f} to {np.max(np.abs(tl[:, k])):.3f}, relative "
            f"phases {', '.join(f'{p:.0f}' for p in np.sort(ph))} deg at {wl[k]:g} nm.")


def _solver_block(spec: BuildSpec, sw, conv: dict) -> dict:
    """``provenance.solver``: method, references, truncations, sweep, band and the convergence record."""
    names = _DIMS[spec.kind]
    return {"name": "metalay.rcwa", "method": "RCWA / Fourier modal method with scattering matrices",
            "factorization": ("li: Li 1997 inverse rule along x and y (every edge of the cell is axis-parallel; "
                              "chosen automatically per layer)"),
            "references": ["Moharam et al. 1995, J. Opt. Soc. Am. A 12, 1068",
                           "Li 1996, J. Opt. Soc. Am. A 13, 1870", "Li 1997, J. Opt. Soc. Am. A 14, 2758",
                           "Rumpf 2011, PIER B 35, 241"],
            "sweep_harmonics_x": sw.harmonics[0], "sweep_harmonics_y": sw.harmonics[1],
            "sweep_harmonics_source": "spec" if spec.harmonics is not None else
            f"convergence target on the median geometry, capped at {spec.sweep_max_harmonics} orders",
            "truncation": "rectangular",
            "n_stairs": spec.n_stairs if spec.kind not in ("nanofin", "slot") else None,
            "incidence": "normal, from the incident medium", "convergence": conv,
            "sweep": {"kind": spec.kind, **{d: [_r(v) for v in spec.dims[d]] for d in names},
                      "height_nm": [_r(v) for v in spec.heights_nm], "candidates": sw.n_candidates,
                      "passed_rules": int(sw.t_long.size),
                      "criterion": _criterion(spec)},
            "band": {"relative_half_width": spec.band_half_width, "count": spec.band_count}}


def _criterion(spec: BuildSpec) -> str:
    """How the builder chose the cells, in words (``provenance.solver.sweep.criterion``)."""
    if spec.phase_mechanism == "geometric":
        return "max conversion efficiency |(t_long - t_short)/2|^2"
    if spec.phase_mechanism == "propagation":
        return f"{spec.levels} equal phase levels, max of the worst projection Re(t exp(-i phi_k))"
    return (f"{spec.levels} equal levels of the conversion phase arg((t_long - t_short)/2) over 0..2 pi (a cell "
            "turned by 90 degrees serves its phase + pi), among cells with |arg(t_long / t_short) - pi| <= "
            f"{spec.retardance_tolerance_deg:g} deg at the design wavelength (converged re-check of every pick), "
            "max of the worst projection Re(c exp(-i phi_k)), c = (t_long - t_short)/2")


def pick_decoupled(spec: BuildSpec, sw: SweepResult, *, max_rounds: int = 24):
    """Spin-decoupled cells from a coarse sweep, each pick re-solved converged at the design wavelength.

    The levels are picked from the sweep (:func:`metalay.cells.decoupled.pick_spin_levels`); every picked geometry
    not yet re-checked is solved again with its truncation raised until converged (:func:`converge_points`) and
    its sweep responses replaced by the converged ones, then the levels are picked again, until every pick has
    been re-checked (a geometry near a resonance can move far with the truncation and is then dropped by the
    retardance tolerance).

    Returns
    -------
    (SpinLevels, SweepResult)
        The levels (sweep indices) and the sweep with the re-checked responses.

    Raises
    ------
    CellBuildError
        No geometry within the retardance tolerance, or no settled pick after ``max_rounds`` rounds.
    """
    from dataclasses import replace

    from metalay.cells.decoupled import pick_spin_levels

    tl, ts = sw.t_long.copy(), sw.t_short.copy()
    checked = np.zeros(tl.size, bool)
    tol = np.deg2rad(spec.retardance_tolerance_deg)
    for _ in range(max_rounds):
        chosen = pick_spin_levels(tl, ts, spec.levels, retardance_tolerance_rad=tol)
        if chosen is None:
            raise CellBuildError(f"{spec.path}: key 'sweep.retardance_tolerance_deg' = "
                                 f"{spec.retardance_tolerance_deg:g}: no swept geometry is a half-wave cell within it "
                                 "at the design wavelength; widen the sweep or the tolerance (allowed 0.5..45)")
        new = np.array([g for g in chosen.distinct if not checked[g]], dtype=int)
        if new.size == 0:
            return chosen, replace(sw, t_long=tl, t_short=ts)
        dims = {d: sw.dims[d][new] for d in _DIMS[spec.kind]}
        pts = converge_points(spec, dims, sw.dims["height_nm"][new], spec.design_wavelength_nm, sw.harmonics)
        tl[new], ts[new] = pts["t_long"], pts["t_short"]
        checked[new] = True
    raise CellBuildError(f"{spec.path}: the spin-decoupled pick did not settle after {max_rounds} rounds of converged "
                         "re-checks; use a finer sweep truncation ([solver] harmonics_x, harmonics_y)")


def _decoupled_found(block: dict, sw: SweepResult, height: float) -> str:
    """The build's one-paragraph result for a spin-decoupled library."""
    cells = "; ".join(f"{c['cell_id']} conversion phase {c['conversion_phase_deg']:.1f} deg, retardance error "
                      f"{c['retardance_error_deg']:+.2f} deg, conversion {c['conversion_efficiency']:.4f}, amplitude "
                      f"{100 * c['amplitude_deviation']:+.2f} % of the mean (levels {c['levels']})"
                      for c in block["cells"])
    return (f"Solver found: {len(block['cells'])} half-wave cells for {block['levels']} conversion-phase levels "
            f"from {sw.t_long.size} rule-passing geometries at height {height:g} nm, converged at "
            f"{block['wavelength_nm']:g} nm: {cells}. Amplitude spread (max - min)/mean "
            f"{block['amplitude_spread']:.4f}, worst retardance error {block['worst_retardance_error_deg']:.2f} deg, "
            f"worst level phase error {block['worst_level_phase_error_deg']:.2f} deg.")


#: Largest |R + T - 1| accepted for a lossless stack (the S-matrix solution conserves energy to rounding for
#: Hermitian permittivity operators, measured ~1e-13; 1e-6 leaves room for ill-conditioned evanescent modes).
ENERGY_TOLERANCE = 1e-6


def _lossless(spec: BuildSpec, wavelength_nm: np.ndarray) -> np.ndarray:
    """Per wavelength: every material of the stack has Im(n) = 0 there."""
    base = Path(spec.path).parent
    names = {spec.incident_medium, spec.exit_medium, *[lay["material"] for lay in spec.layers],
             *[lay["background"] for lay in spec.layers if lay["patterned"]]}
    ok = np.ones(wavelength_nm.size, bool)
    for nm in sorted(names):
        ok &= np.abs(get_material(nm, base_dir=base).index(wavelength_nm).imag) == 0
    return ok


def _r(v: float) -> float:
    """Round for the JSON metadata: 9 significant digits keep provenance byte-stable across BLAS thread counts."""
    return float(f"{float(v):.9g}")


def _rc(v: float) -> float:
    """Round a convergence change to 4 significant digits: it is a difference of nearly equal numbers, whose last
    digits vary with BLAS threading, and 4 digits are all a tolerance comparison needs."""
    return float(f"{float(v):.4g}")


def _q(a: np.ndarray) -> np.ndarray:
    """Quantise responses to 1e-10 (the solver's last bits vary ~1e-13 with BLAS threading; its accuracy is
    ~1e-3), so that rebuilding a library gives the same bytes on any machine with high probability."""
    if np.iscomplexobj(a):
        return (np.round(a.real, 10) + 0.0) + 1j * (np.round(a.imag, 10) + 0.0)   # + 0.0 turns -0.0 into 0.0
    return np.round(a, 10) + 0.0


# ----------------------------------------------------------------------------------------------------------------
# Import


_IMPORT_HEADER = ("cell_id", "wavelength_nm", "t_long_re", "t_long_im", "t_short_re", "t_short_im", "power_long",
                  "power_short")


#: The metadata example ``metalay cells import --template`` writes (documented in libraries/FORMAT.md). The values
#: are an invented example to replace with your own; the file imports as it stands once its responses file is filled.
IMPORT_TEMPLATE = """# Metadata of responses simulated elsewhere, for: metalay cells import {csv} --meta {meta} -o DIR
# Every key below is required. Units are in the key names. The values are an invented example: replace them.
# Responses: fill {csv} (header already written), one row per cell and wavelength:
#   cell_id,wavelength_nm,t_long_re,t_long_im,t_short_re,t_short_im,power_long,power_short
#   t_long / t_short: zeroth-order complex amplitude for light polarised along the cell's long / short axis,
#   normalised so that |t|^2 is the zeroth-order power ratio; power_*: total output power (all orders) or empty.
#   Every cell needs rows at the same wavelengths (at least one).

[library]
name = "my-imported-fins"           # 1-64 letters, digits, - _ . : the file becomes <name>.library.json
description = "TiO2 fins on glass, responses from my own simulation"
mode = "transmission"               # transmission | reflection
phase_mechanism = "geometric"       # geometric (rotated anisotropic cells) | propagation (cells chosen by phase)
design_wavelength_nm = 532.0        # 100..20000
period_nm = 325.0                   # lattice period the responses were computed at
geometry_source = "my design notes" # where the geometry comes from (a citation, or your own)
responses_source = "my FDTD run"    # the simulation that produced the responses (recorded as 'imported: ...')

[stack]                             # from the side the light arrives on to the side it leaves on
incident_medium = "fused_silica"    # a material name (metalay cells: fused_silica, air, TiO2, ...) or air/vacuum
exit_medium = "air"                 # ignored for reflection (= incident_medium)

[[stack.layers]]                    # one table per layer, incident side first
name = "fins"
material = "TiO2"
thickness_nm = 600.0
patterned = true                    # the layer the cells are cut from

[rules]                             # default process rules of the cells (used by the compile's design-rule check)
min_feature_nm = 60.0
min_gap_nm = 40.0
max_aspect_ratio = 10.0
grid_nm = 1.0
source = "Common practice (no source)"  # or the citation of your process

[[cells]]                           # one table per cell; its id is the cell_id of the responses file
id = "fin-270x70"
kind = "nanofin"                    # nanofin (length_nm, width_nm) | slot (length_nm, width_nm) |
layer = "fins"                      # elliptic_pillar (major_nm, minor_nm) | round_pillar (diameter_nm)
length_nm = 270.0
width_nm = 70.0
"""


def import_template(folder) -> tuple[Path, Path]:
    """Write ``meta.toml`` (:data:`IMPORT_TEMPLATE`, a filled-in metadata example) and ``responses.csv`` (the header
    only) into ``folder`` for :func:`import_responses`; existing files are not overwritten.

    Returns
    -------
    (meta_path, csv_path)

    Raises
    ------
    CellBuildError
        ``folder`` already holds one of the two files.
    """
    from metalay.util.atomic import atomic_write_text, ensure_dir

    out = ensure_dir(folder)
    meta, table = out / "meta.toml", out / "responses.csv"
    for p in (meta, table):
        if p.exists():
            raise CellBuildError(f"{p}: already exists; choose an empty folder for --template")
    atomic_write_text(meta, IMPORT_TEMPLATE.format(csv=table.as_posix(), meta=meta.as_posix()))
    atomic_write_text(table, ",".join(_IMPORT_HEADER) + "\n")
    return meta, table


def import_responses(table_path, meta_path):
    """Turn responses simulated elsewhere into a library.

    Parameters
    ----------
    table_path : path
        CSV with header ``cell_id,wavelength_nm,t_long_re,t_long_im,t_short_re,t_short_im,power_long,power_short``
        (field amplitudes normalised so that ``|t|^2`` is the zeroth-order power ratio; powers are the total output
        power, all orders, or empty when unknown).
    meta_path : path
        TOML with ``[library]`` (name, description, mode, phase_mechanism, design_wavelength_nm, period_nm,
        geometry_source, responses_source), ``[stack]`` (incident_medium, exit_medium, [[stack.layers]]),
        ``[rules]`` and ``[[cells]]`` (id, kind, layer, dimensions in nm).

    Returns
    -------
    CellLibrary

    Raises
    ------
    CellBuildError
        Bad columns, units or ranges: non-numeric, wavelength outside 100..20000 nm, a passive-cell violation
        ``|t|^2 > 1 + 1e-6`` or ``power < |t|^2 - 1e-6``, cells missing from the table or tabulated at different
        wavelengths.
    """
    from metalay.cells.library import CELL_KINDS, CellLibrary, CellSpec, check_physical

    meta_path, table_path = Path(meta_path), Path(table_path)
    where = str(meta_path)
    meta = _load_tables(meta_path, ("library", "stack", "rules"))
    lib, st, ru = meta.table("library"), meta.table("stack"), meta.table("rules")
    name = _text(lib, "name")
    mode = lib.string("mode", options=("transmission", "reflection"))
    mech = lib.string("phase_mechanism", options=("geometric", "propagation"))
    cells = []
    for cr in meta.tables("cells"):
        kind = cr.string("kind", options=tuple(CELL_KINDS))
        cells.append(CellSpec(id=_text(cr, "id"), kind=kind, layer=_text(cr, "layer"),
                              dims_nm=tuple((d, _pos(cr, d)) for d in CELL_KINDS[kind])))
    ids = [c.id for c in cells]
    if len(set(ids)) != len(ids):
        raise CellBuildError(f"{where}: duplicate cell ids")
    tw = str(table_path)
    try:
        text = table_path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise CellBuildError(f"{tw}: cannot read as UTF-8 text") from exc
    rows = list(csv.reader(io.StringIO(text)))
    if not rows or tuple(h.strip() for h in rows[0]) != _IMPORT_HEADER:
        raise CellBuildError(f"{tw}: header must be exactly {','.join(_IMPORT_HEADER)}")
    per = {i: [] for i in ids}
    for ln, row in enumerate(rows[1:], start=2):
        if not row:
            continue
        if len(row) != 8:
            raise CellBuildError(f"{tw}:{ln}: expected 8 columns, got {len(row)}")
        if row[0] not in per:
            raise CellBuildError(f"{tw}:{ln}: cell_id {row[0]!r} is not in {where} (cells: {ids})")
        try:
            v = [float(x) for x in row[1:6]] + [float(x) if x.strip() else math.nan for x in row[6:]]
        except ValueError as exc:
            raise CellBuildError(f"{tw}:{ln}: non-numeric value in {row}") from exc
        if not all(math.isfinite(x) for x in v[:5]):
            raise CellBuildError(f"{tw}:{ln}: wavelength_nm and t columns must be finite numbers")
        if not 100.0 <= v[0] <= 20000.0:
            raise CellBuildError(f"{tw}:{ln}: wavelength_nm = {v[0]:g} outside 100..20000 (values must be in nm)")
        for a, b, pcol, label in ((v[1], v[2], v[5], "long"), (v[3], v[4], v[6], "short")):
            t2 = a * a + b * b
            if t2 > 1 + 1e-6:
                raise CellBuildError(f"{tw}:{ln}: |t_{label}|^2 = {t2:.6g} > 1 (a passive cell; amplitudes must be "
                                     "normalised so that |t|^2 is a power ratio)")
            if math.isfinite(pcol) and not (t2 - 1e-6 <= pcol <= 1 + 1e-6):
                raise CellBuildError(f"{tw}:{ln}: power_{label} = {pcol:g} must be in [|t_{label}|^2, 1]")
        per[row[0]].append(v)
    wls = None
    for cid in ids:
        if not per[cid]:
            raise CellBuildError(f"{tw}: no rows for cell_id {cid!r}")
        per[cid].sort(key=lambda r: r[0])
        wl = [r[0] for r in per[cid]]
        if len(set(wl)) != len(wl):
            raise CellBuildError(f"{tw}: cell_id {cid!r} has repeated wavelength_nm")
        if wls is None:
            wls = wl
        elif wl != wls:
            raise CellBuildError(f"{tw}: cell_id {cid!r} is tabulated at different wavelengths than {ids[0]!r}")
    arr = np.array([per[i] for i in ids])
    layers = tuple(_stack_layers(st, background=False))
    rules = _rules(ru)
    inc = _text(st, "incident_medium")
    prov = {"geometry_source": _text(lib, "geometry_source"),
            "responses_source": "imported: " + _text(lib, "responses_source"),
            "solver": None, "materials": None, "notes": f"imported with metalay cells import from {table_path.name}"}
    return check_physical(CellLibrary(
        name=name, description=_text(lib, "description", ""),
                       mode=mode, phase_mechanism=mech,
                       design_wavelength_nm=_pos(lib, "design_wavelength_nm", lo=100, hi=2e4),
                       period_nm=_pos(lib, "period_nm"), lattice="square",
                       incident_medium=inc,
                       exit_medium=_text(st, "exit_medium") if mode == "transmission" else inc,
                       layers=layers, rules=rules, provenance=prov, cells=tuple(cells),
                       wavelengths_nm=np.array(wls), t_long=arr[:, :, 1] + 1j * arr[:, :, 2],
                       t_short=arr[:, :, 3] + 1j * arr[:, :, 4], power_long=arr[:, :, 5], power_short=arr[:, :, 6]))


# ----------------------------------------------------------------------------------------------------------------
# Tables and plots


def library_table(lib) -> list[dict]:
    """Rows (one per cell and wavelength) with |t_long|, |t_short|, phase difference, conversion and leakage."""
    if not lib.has_responses:
        raise LibraryError(f"{lib.source_path or lib.name}: library has no responses (geometry only)")
    rows = []
    for c, cell in enumerate(lib.cells):
        for k, wl in enumerate(lib.wavelengths_nm):
            tl, ts = lib.t_long[c, k], lib.t_short[c, k]
            rows.append({"cell_id": cell.id, "wavelength_nm": float(wl), "abs_t_long": abs(tl),
                         "abs_t_short": abs(ts), "phase_long_deg": float(np.angle(tl, deg=True)),
                         "phase_difference_deg": float(np.angle(tl * np.conj(ts), deg=True)),
                         "conversion": abs((tl - ts) / 2) ** 2, "leakage": abs((tl + ts) / 2) ** 2})
    return rows


def plot_library(lib, png_path) -> Path:
    """Write a PNG of a library's responses (atomic). Geometric: |t|, phase difference, conversion and leakage
    versus wavelength; propagation: phase and amplitude versus diameter at the design wavelength."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from metalay.util.atomic import atomic_write_bytes

    if not lib.has_responses:
        raise LibraryError(f"{lib.source_path or lib.name}: library has no responses to plot (geometry only)")
    wl = lib.wavelengths_nm
    word = "r" if lib.mode == "reflection" else "t"
    fig, axes = plt.subplots(1, 2, figsize=(10, 4), dpi=100)
    if lib.phase_mechanism in ("geometric", "spin_decoupled"):
        for c, cell in enumerate(lib.cells):
            tl, ts = lib.t_long[c], lib.t_short[c]
            axes[0].plot(wl, np.abs(tl), label=f"|{word}_long| {cell.id}")
            axes[0].plot(wl, np.abs(ts), "--", label=f"|{word}_short| {cell.id}")
            axes[0].plot(wl, np.abs((tl - ts) / 2) ** 2, "-o", ms=3, label="conversion efficiency")
            axes[0].plot(wl, np.abs((tl + ts) / 2) ** 2, "-s", ms=3, label="leakage")
            axes[1].plot(wl, np.angle(tl * np.conj(ts), deg=True) % 360, "-o", ms=3, label=cell.id)
        axes[0].set_xlabel("wavelength (nm)")
        axes[1].set_xlabel("wavelength (nm)")
        axes[1].axhline(180, color="gray", lw=0.5)
        axes[1].set_ylabel("phase difference long - short (deg)")
    else:
        k = int(np.argmin(np.abs(wl - lib.design_wavelength_nm)))
        d = np.array([c.max_extent_nm for c in lib.cells])
        order = np.argsort(d)
        t = lib.t_long[order, k]
        axes[0].plot(d[order], np.abs(t), "-o", label=f"|{word}| at {wl[k]:g} nm")
        axes[1].plot(d[order], np.unwrap(np.angle(t)) - np.angle(t[0]), "-o")
        axes[0].set_xlabel("diameter (nm)")
        axes[1].set_xlabel("diameter (nm)")
        axes[1].set_ylabel("phase relative to the smallest pillar (rad)")
    axes[0].set_ylabel("amplitude / power ratio")
    axes[0].set_ylim(0, 1.05)
    axes[0].legend(fontsize=7)
    fig.suptitle(f"{lib.name} ({lib.mode}, {lib.phase_mechanism} phase, period {lib.period_nm:g} nm)")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    plt.close(fig)
    return atomic_write_bytes(Path(png_path), buf.getvalue())


# ----------------------------------------------------------------------------------------------------------------
# Rotation model check


def _converted(j: np.ndarray, sigma: int) -> np.ndarray:
    """Converted amplitude ``<-sigma| J |sigma>`` for Jones matrices ``(..., 2, 2)`` in the (x, y) basis."""
    inp = np.array([1.0, 1j * sigma]) / np.sqrt(2)
    out = np.array([1.0, -1j * sigma]) / np.sqrt(2)
    return np.einsum("i,...ij,j->...", np.conj(out), j, inp)


def _library_stack(lib, cell, angle_deg: float, wavelength_nm: float, *, supercell: tuple | None = None):
    """Solver stack of one library cell rotated counter-clockwise by ``angle_deg``, as a polygon layer.

    With ``supercell = (p, q)`` the rotation ``atan2(q, p)`` is instead written exactly as the unrotated cell on
    the square lattice rotated by ``-atan2(q, p)``: an axis-aligned square supercell of side
    ``period sqrt(p^2 + q^2)`` holding ``p^2 + q^2`` cells (Li's rules apply; the caller rotates the Jones matrix).
    """
    from metalay.cells.cellkinds import outline_nm
    from metalay.cells.rcwa_nv import polygon_pattern

    eps = lambda name: get_material(name).epsilon(np.array([wavelength_nm]))  # noqa: E731
    period = lib.period_nm
    if supercell is None:
        a = np.deg2rad(angle_deg)
        rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
        polys = [outline_nm(cell) @ rot.T]
    else:
        pp, qq = supercell
        period = lib.period_nm * float(np.hypot(pp, qq))
        polys = [outline_nm(cell) + c for c in _rotated_lattice_sites(lib.period_nm, pp, qq)]
    layers = []
    for lay in lib.layers:
        if lay.get("patterned"):
            pat = polygon_pattern(polys, np.repeat(eps(lay["material"])[:, None], len(polys), axis=1),
                                  eps(lay.get("background", "air")), period, period)
            layers.append(Layer(float(lay["thickness_nm"]), pat))
        else:
            layers.append(Layer(float(lay["thickness_nm"]), eps(lay["material"])))
    return Stack(eps(lib.incident_medium), tuple(layers), eps(lib.exit_medium), period, period)


def _rotated_lattice_sites(period_nm: float, p: int, q: int) -> np.ndarray:
    """Sites of the square lattice rotated by ``-atan2(q, p)`` inside one period of the axis-aligned supercell
    of side ``period sqrt(p^2 + q^2)`` (there are ``p^2 + q^2`` of them), centred in ``[-S/2, S/2)``."""
    a = -np.arctan2(q, p)
    side = period_nm * np.hypot(p, q)
    k = np.arange(-(p + q) - 1, p + q + 2)
    m, n = (g.ravel() for g in np.meshgrid(k, k, indexing="ij"))
    pts = period_nm * np.stack([m * np.cos(a) - n * np.sin(a), m * np.sin(a) + n * np.cos(a)], axis=1)
    pts = (pts + side / 2) % side - side / 2
    pts = np.where(np.abs(pts - side / 2) < 1e-6, pts - side, pts)
    return np.unique(np.round(pts, 6) + 0.0, axis=0)


#: Rotations solved exactly as an axis-aligned supercell: atan2(q, p) -> (p, q). Only 45 deg (2 cells, sqrt2 larger
#: period, ~8x the cost); atan(1/2) would need 5 cells and ~100x the cost of the unrotated cell.
_EXACT_ROTATIONS = {45.0: (1, 1)}


def rotation_check(lib, angles_deg=(15.0, 30.0, 45.0), *, wavelength_nm: float | None = None,
                   tolerance_abs_t: float = DEFAULT_TOLERANCE_ABS_T,
                   tolerance_phase_deg: float = DEFAULT_TOLERANCE_PHASE_DEG, max_harmonics: int = 12) -> dict:
    """Solve each anisotropic cell rotated by ``angles_deg`` directly and measure the rotation model's error.

    The rotation model (used by the mask mapping and the optical check) takes the Jones matrix of a cell rotated
    by ``theta`` as ``R(-theta) diag(t_long, t_short) R(theta)`` of the unrotated cell: the converted part of
    spin ``sigma`` gains exactly ``2 sigma theta``. In a fixed square lattice a rotated cell also changes its
    coupling to its neighbours, so a direct solve differs. 45 deg is solved exactly: the rotated structure is the
    unrotated cell on the lattice rotated by -45 deg, an axis-aligned square supercell of 2 cells where Li's
    rules hold (method "supercell", compared with the unrotated cell solved with Li's rules). Other angles solve
    the rotated polygon with the normal-vector rule and compare with the unrotated polygon solved with the same
    rule and truncation, so that truncation errors common to both cancel (method "normal-vector"; its own
    convergence is recorded).

    Parameters
    ----------
    lib : CellLibrary
    angles_deg : sequence of float
        Rotations (counter-clockwise, degrees), each in (0, 90].
    wavelength_nm : float, optional
        Default: the design wavelength.
    tolerance_abs_t, tolerance_phase_deg, max_harmonics
        Convergence target of the truncation (:func:`metalay.cells.rcwa.solve`).

    Returns
    -------
    dict
        JSON-ready record (stored under ``rotation_check`` in the library file, ``libraries/FORMAT.md``).
    """
    from metalay.cells.cellkinds import is_rotation_invariant

    wl = float(wavelength_nm or lib.design_wavelength_nm)
    angles = [float(a) for a in angles_deg]
    if not angles or any(not 0 < a <= 90 for a in angles):
        raise CellBuildError(f"rotation check: angles_deg = {angles_deg} must be in (0, 90]")
    side = "t" if lib.mode == "transmission" else "r"
    kw = dict(tolerance_abs_t=tolerance_abs_t, tolerance_phase_deg=tolerance_phase_deg,
              max_harmonics=max_harmonics, converge_on=(side,))
    cells = []
    for cell in lib.cells:
        if is_rotation_invariant(cell):
            cells.append({"cell_id": cell.id, "rotation_invariant": True})
            continue
        rows = [_rotation_row(lib, cell, a, wl, side, kw) for a in angles]
        cells.append({"cell_id": cell.id, "rotation_invariant": False, "angles": rows})
    return {"wavelength_nm": wl, "side": "transmission" if side == "t" else "reflection",
            "model": "J(theta) = R(-theta) diag(t_long, t_short) R(theta); converted phase step 2 sigma theta",
            "methods": {"supercell": "exact: the unrotated cell on the rotated lattice, an axis-aligned supercell, "
                                     "Li 1997 rules; reference: the unrotated cell with Li's rules",
                        "normal-vector": "rotated polygon, normal-vector rule (Schuster et al. 2007, JOSA A 24, "
                                         "2880); reference: the unrotated polygon, same rule and truncation"},
            "tolerance_abs_t": float(tolerance_abs_t), "tolerance_phase_deg": float(tolerance_phase_deg),
            "max_harmonics": int(max_harmonics), "cells": cells}


def _rotation_row(lib, cell, angle_deg, wl, side, kw) -> dict:
    """One angle of :func:`rotation_check`: direct Jones matrix against the rotation model."""
    jm = lambda res: (res.t_jones if side == "t" else res.r_jones)[0]  # noqa: E731
    exact = _EXACT_ROTATIONS.get(round(angle_deg, 9))
    r = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(r), np.sin(r)], [-np.sin(r), np.cos(r)]])
    if exact is not None:
        base = solve(_library_stack(lib, cell, 0.0, wl), wl, harmonics="auto", factorization="li", **kw)
        scale = float(np.hypot(*exact))
        h = tuple(int(np.ceil(v * scale)) for v in base.harmonics)
        sup = solve(_library_stack(lib, cell, angle_deg, wl, supercell=exact), wl, harmonics=h, factorization="li")
        j, j0, conv, method = rot.T @ jm(sup) @ rot, jm(base), base.settings["convergence"], "supercell"
    else:
        big = solve(_library_stack(lib, cell, angle_deg, wl), wl, harmonics="auto", factorization="nv", **kw)
        h, conv, method = big.harmonics, big.settings["convergence"], "normal-vector"
        j = jm(big)
        j0 = jm(solve(_library_stack(lib, cell, 0.0, wl), wl, harmonics=h, factorization="nv"))
    model = rot.T @ j0 @ rot
    row = {"angle_deg": angle_deg, "method": method, "harmonics_x": int(h[0]), "harmonics_y": int(h[1]),
           "convergence_change_abs_t": _rc(conv["change_abs_t"]),
           "convergence_change_phase_deg": _rc(conv["change_phase_deg"]), "converged": bool(conv["converged"]),
           "max_abs_jones_difference": _r(np.max(np.abs(j - model))),
           "conversion_direct": _r(abs(_converted(j, 1)) ** 2), "conversion_model": _r(abs(_converted(j0, 1)) ** 2)}
    for sigma, name in ((1, "plus"), (-1, "minus")):
        step = float(np.angle(_converted(j, sigma) / _converted(j0, sigma), deg=True))
        row[f"phase_step_spin_{name}_deg"] = _r(step)
        row[f"deviation_spin_{name}_deg"] = _r((step - 2 * sigma * angle_deg + 180.0) % 360.0 - 180.0)
    return row
