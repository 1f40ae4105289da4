"""Library comparison and fabrication-tolerance studies on top of compile, the design rules and the optical check.

Two studies, each a pure library function returning data (the CLI in :mod:`metalay.cli.study` prints):

* :func:`compare_libraries` compiles one design with several cell libraries, runs the design rules and the
  optical check on each written mask, sweeps the zeroth-order power budget over each library's tabulated band and
  measures how far the tightest design rule is from failing.  Output: a table (CSV, JSON) and PNG plots.
* :func:`tolerance_study` perturbs the elements decoded from a written mask (critical-dimension bias, rotation
  error, missing elements, wavelength detuning; seeded Monte Carlo) and evaluates each sample with the same
  near-field / far-field / OAM chain as :func:`metalay.checks.optics.check_optics`, without re-writing masks.

What "efficiency" means (the same footing for transmission and reflection libraries)
------------------------------------------------------------------------------------
Every power is a fraction of the power incident on the illuminated unit cells of the aperture, for circularly
polarised input of the design's spin.  For a transmission library the output is the zeroth-order field leaving
into the exit medium (``|t|^2`` includes the exit impedance); for a reflection library it is the zeroth-order
reflected field (``r`` in the same columns).  ``converted`` is the cross-polarised (geometric-phase carrying)
power, ``leakage`` the unconverted power, ``designed_spot_efficiency`` the power in the far-field disk about the
designed direction, ``designed_mode_efficiency`` the power of the converted field projected on the ideal
designed beam (uniform amplitude, exact target phase over the illuminated aperture) -- all over incident power.
Reflection flips the propagation direction, so the handedness *name* of a circular state flips on reflection;
the Jones algebra (and hence these numbers) is the same.

Perturbation model
------------------
* Critical-dimension (CD) bias ``b`` (nm per edge, one value per sample drawn from ``N(mean, sd)``): every size
  of every element grows by ``2 b``; its response is interpolated linearly (real and imaginary parts) between
  library cells of the same kind that lie on the uniform-bias line through the nominal cell
  (:func:`biased_responses`).  A library with one size per cell (every bundled geometric-phase library) has its
  biased cells solved by metalay's RCWA on a bias grid before the samples run
  (:class:`metalay.cells.biascells.BiasedCells`, solver settings recorded in the result); only with
  ``cd_response = "nominal"`` is CD bias left out (stated in the notes).
* Rotation error: each element's angle gets an independent ``N(0, s)`` error; its converted field is multiplied
  by ``exp(2 i sigma d_theta)``.
* Missing elements: each element is absent with probability ``m``; its cell then transmits ``empty_t``
  unconverted (bare substrate), like an empty illuminated site in the optical check.
* Wavelength detuning: one ``N(0, sd)`` offset per sample; responses and propagation at the detuned wavelength.

Randomness: sample ``k`` uses ``numpy.random.default_rng`` seeded by the ``k``-th child of
``SeedSequence(seed)``, with one independent child stream per perturbation kind, so results do not depend on
the number of workers, and switching one kind off leaves the other kinds' draws unchanged.

References
----------
Ruze 1966, Proc. IEEE 54, 633 (antenna tolerance theory: gain factor ``exp(-delta^2)`` for uncorrelated phase
errors of variance ``delta^2``).
Pancharatnam 1956, Proc. Indian Acad. Sci. A 44, 247; Berry 1987, J. Mod. Opt. 34, 1401 (geometric phase).
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from metalay.checks import optics
from metalay.checks.decode import DecodedSites, cell_shape_table
from metalay.checks.openings import decode_written, written_layer
from metalay.errors import MetalayError, StudyError

__all__ = [
    "SiteModel",
    "site_model",
    "evaluate_sites",
    "biased_responses",
    "design_for_library",
    "rule_margins",
    "compare_libraries",
    "CompareResult",
    "ToleranceSettings",
    "ToleranceResult",
    "tolerance_study",
    "EFFICIENCY_NOTE",
]

EFFICIENCY_NOTE = (
    "Efficiencies are fractions of the power incident on the illuminated unit cells (circular input of the design "
    "spin). Transmission libraries: zeroth-order transmitted power into the exit medium; reflection libraries: "
    "zeroth-order reflected power. converted = cross-polarised power; leakage = unconverted power; designed spot = "
    "power in the far-field disk about the designed direction; designed mode = power of the converted field "
    "projected on the ideal designed beam.")


# ----------------------------------------------------------------------------------------------------------------
# Site model: what the optical check needs, prepared once, evaluated many times
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class SiteModel:
    """Decoded elements of a written mask plus everything the optical evaluation reuses between samples.

    Attributes
    ----------
    decoded : DecodedSites
        Elements read from the mask (nominal).
    library : CellLibrary
    design : Design
    target : OpticsTarget
        Target at the design wavelength.
    expected_ij : (ndarray, ndarray)
        Lattice indices of every aperture site (illuminated region).
    decimation : int
        Near-field block size (as :func:`metalay.checks.optics.check_optics` chooses it for ``max_side``).
    pad_factor : float
    charges : tuple of int
    empty_t : complex
    phi_site : ndarray (S,) float64 or None
        Target phase at the decoded sites' lattice positions (design wavelength).
    biased : BiasedCells or None
        Solver (and cache) of the cells grown by a CD bias, for libraries with one size per cell.
    """

    decoded: DecodedSites
    library: object
    design: object
    target: object
    expected_ij: tuple
    decimation: int
    pad_factor: float
    charges: tuple
    empty_t: complex
    phi_site: np.ndarray | None
    mask_path: str = ""
    _cache: dict = field(default_factory=dict, repr=False)
    biased: object = None  # metalay.cells.biascells.BiasedCells for CD bias of single-size libraries


def site_model(mask_path, library, design, *, max_side: int = 1024, pad_factor: float = 2.0,
               charges=range(-10, 11), size_tol_nm: float = 3.0, unmatched: str = "error",
               empty_t: complex = 1.0) -> SiteModel:
    """Read and decode a mask once (as :func:`metalay.checks.optics.check_optics` does) for repeated evaluation.

    Parameters
    ----------
    mask_path : str or Path
        GDSII or OASIS mask written by ``compile``.
    library : CellLibrary or str
    design : Design
        The design the mask was compiled from.
    max_side, pad_factor, charges, size_tol_nm, unmatched, empty_t
        As in :func:`metalay.checks.optics.check_optics` (defaults of :func:`metalay.checks.optics.quick_check`).

    Returns
    -------
    SiteModel
    """
    from metalay.cells.library import CellLibrary, load_library
    from metalay.design.lattice import sample_sites
    from metalay.design.phase import target_phase
    from metalay.io.gdsread import read_mask

    lib = library if isinstance(library, CellLibrary) else load_library(library)
    mask_settings = design.mask
    layer = mask_settings.layer("structures")
    flat = read_mask(mask_path, layers=[written_layer(design, layer)])  # structures, or the film pieces
    decoded = decode_written(flat, lib.cells, design, period_nm=design.lattice.period_nm,
                             lattice=design.lattice.kind, layer=tuple(layer), size_tol_nm=size_tol_nm,
                             bias_nm=float(mask_settings.bias_nm or 0.0), unmatched=unmatched, where=str(mask_path))
    del flat
    facing = optics.facing_of(design, lib, where=str(mask_path))
    decoded = optics.beam_frame_sites(decoded, facing)  # the frame of the light leaving the element
    target = optics.target_from_design(design)
    s = sample_sites(design.aperture, design.lattice)
    m = optics.near_field_decimation(decoded, max_side)[0]
    phi = None
    if target.terms:
        xs, ys = optics.site_xy(decoded)
        phi = target_phase(target.terms, xs, ys, wavelength_nm=target.wavelength_nm, sigma=target.sigma)
    return SiteModel(decoded=decoded, library=lib, design=design, target=target,
                     expected_ij=(s.i, -s.j if facing.mirror_y else s.j),
                     decimation=m, pad_factor=float(pad_factor), charges=tuple(charges), empty_t=complex(empty_t),
                     phi_site=phi, mask_path=str(mask_path))


def _remove_factor(model: SiteModel, near, target):
    """``exp(-i phi_removed)`` on the near-field grid (tilt, lens, axicon terms), cached per wavelength."""
    from metalay.design.phase import target_phase

    key = ("remove", target.wavelength_nm, near.designed.shape)
    got = model._cache.get(key)
    if got is None:
        ph = target_phase(target.remove_terms, near.x_um[None, :], near.y_um[:, None],
                          wavelength_nm=target.wavelength_nm, sigma=target.sigma)
        got = np.exp(-1j * ph).astype(np.complex64)
        model._cache[key] = got
    return got


def evaluate_sites(model: SiteModel, *, t_long=None, t_short=None, rotation_rad=None, keep=None,
                   wavelength_nm: float | None = None, budget_only: bool = False, workers: int = 1) -> dict:
    """Optical figures of the (possibly perturbed) elements of ``model``.

    Parameters
    ----------
    model : SiteModel
    t_long, t_short : ndarray (S,) complex, optional
        Per-element responses (default: the library's at the wavelength, by cell).
    rotation_rad : ndarray (S,), optional
        Per-element rotation (default: decoded).
    keep : ndarray (S,) bool, optional
        Elements present (default all); absent ones leave their site empty.
    wavelength_nm : float, optional
        Illumination wavelength (default the design's).
    budget_only : bool
        Only the power budget and the designed-mode efficiency (no FFT, no OAM).
    workers : int
        FFT threads.

    Returns
    -------
    dict
        ``converted``, ``leakage``, ``designed_polarization``, ``designed_mode_efficiency``, and unless
        ``budget_only``: ``designed_spot_efficiency`` (or None), ``purity`` (or None), ``oam_weights``.

    Notes
    -----
    Same operations, in the same order, as :func:`metalay.checks.optics.check_optics` (site fields, rasterisation with
    the aperture as illuminated region, power budget, padded FFT far field, spot disks of radius
    ``(2.5 + l_max/2) lambda / D``, OAM spectrum of the converted field after removing tilt/lens/axicon terms), so
    unperturbed input reproduces its figures exactly.  Designed-mode efficiency::

        eta_mode = |sum_k c_k exp(-i phi_k)|^2 / N_ill^2

    with ``c_k`` the converted field of element ``k``, ``phi_k`` the target phase at its site and ``N_ill`` the
    number of illuminated cells (the overlap of the output with the ideal beam of uniform amplitude).
    """
    d = model.decoded
    target = model.target
    wl = float(wavelength_nm) if wavelength_nm is not None else target.wavelength_nm
    if wavelength_nm is not None and abs(wl - target.wavelength_nm) > 0:
        target = optics.target_from_design(model.design, wavelength_nm=wl)
    lib = model.library
    if t_long is None or t_short is None:
        if lib.has_responses:
            tl_c, ts_c = lib.response_at(wl)
        else:
            tl_c, ts_c = optics.ideal_responses(len(lib.cells))
        t_long = tl_c[d.cell] if t_long is None else t_long
        t_short = ts_c[d.cell] if t_short is None else t_short
    rot = d.rotation_rad if rotation_rad is None else rotation_rad
    dd = d
    phi = model.phi_site
    if keep is not None and not np.all(keep):
        keep = np.asarray(keep, bool)
        dd = replace(d, i=d.i[keep], j=d.j[keep], x_um=d.x_um[keep], y_um=d.y_um[keep], cell=d.cell[keep],
                     rotation_rad=np.asarray(rot)[keep], size_error_nm=d.size_error_nm[keep])
        t_long, t_short, rot = np.asarray(t_long)[keep], np.asarray(t_short)[keep], np.asarray(rot)[keep]
        phi = phi[keep] if phi is not None else None
    if dd.i.size == 0:
        raise StudyError(f"{model.mask_path}: every element was removed by the perturbation")
    jin = optics.input_jones("design", design_sigma=target.sigma)
    ev = optics.evaluate_elements(dd, t_long, t_short, rot, target, jones_in=jin, expected_ij=model.expected_ij,
                                  decimation=model.decimation, empty_t=model.empty_t, pad_factor=model.pad_factor,
                                  charges=model.charges, far_field=not budget_only,
                                  keep_far=bool(target.channels) and not budget_only,
                                  keep_field=bool(target.channels) and not budget_only,
                                  remove_factor=lambda near, tgt: _remove_factor(model, near, tgt),
                                  workers=workers)
    budget, near = ev.budget, ev.near
    out = {"wavelength_nm": wl, "converted": budget["converted"], "leakage": budget["leakage"],
           "designed_polarization": budget["designed_polarization"]}
    if phi is not None:
        s = np.sum(ev.fields.converted.astype(np.complex128) * np.exp(-1j * phi))
        out["designed_mode_efficiency"] = float(abs(s) ** 2 / float(near.cells_illuminated) ** 2)
    else:
        out["designed_mode_efficiency"] = None
    if budget_only:
        return out
    pol = budget["designed_polarization"]
    out["designed_spot_efficiency"] = float(ev.spots["designed"] * pol) if "designed" in ev.spots else None
    out["purity"] = None if ev.oam is None else float(ev.oam.purity(target.charge))
    out["oam_weights"] = None if ev.oam is None else [float(w) for w in ev.oam.weights]
    limits = getattr(getattr(model.design, "checks", None), "limits", None)
    judged = optics.judged_figures(dd, ev, target, charges=model.charges, pad_factor=model.pad_factor,
                                   workers=workers, limits=limits)
    out.update(_judged_metrics(judged))
    return out


#: Per-sample metrics beyond the power budget, with the nominal check's names (None where a design has none).
JUDGED_KEYS = ("fringe_charge", "worst_isolation_db", "worst_channel_purity", "strehl", "spot_fwhm_um",
               "focusing_efficiency")


def _judged_metrics(judged: dict) -> dict:
    """Flat per-sample metrics and verdict from :func:`metalay.checks.optics.judged_figures`."""
    f, v = judged["figures"], judged["verdicts"]
    out = dict.fromkeys(JUDGED_KEYS)
    fr = f.get("fringe_reading")
    if fr is not None:
        out["fringe_charge"] = fr["charge"]  # None when unreadable
    ct = f.get("crosstalk")
    if ct is not None and len(ct.get("charges", [])) > 1:
        out["worst_isolation_db"] = ct["worst_isolation_db"]
    ch = f.get("oam_channels")
    if ch is not None and ch["channels"]:
        out["worst_channel_purity"] = float(min(c["purity"] for c in ch["channels"]))
    lens = f.get("lens")
    if lens is not None:
        out["strehl"] = lens.get("strehl")
        out["spot_fwhm_um"] = float(0.5 * (lens["fwhm_x_um"] + lens["fwhm_y_um"]))
        out["focusing_efficiency"] = lens.get("focusing_efficiency")
    out["verdict"] = v["verdict"]
    out["verdict_items"] = {i["key"]: i["verdict"] for i in v["items"]}
    return out


# ----------------------------------------------------------------------------------------------------------------
# Critical-dimension bias from a library with several sizes
# ----------------------------------------------------------------------------------------------------------------

def biased_responses(library, cells_used, bias_nm: float, wavelength_nm: float, *, line_tol_nm: float = 0.5):
    """Responses of the used cells after a critical-dimension bias, interpolated in size within the library.

    Parameters
    ----------
    library : CellLibrary
        Must carry responses.
    cells_used : iterable of int
        Indices of the nominal cells to bias.
    bias_nm : float
        Bias per edge (every size grows by ``2 bias_nm``).
    wavelength_nm : float
    line_tol_nm : float
        Cells whose two size changes differ by at most this much lie on the uniform-bias line.

    Returns
    -------
    (t_long, t_short, clipped) : ndarray (C,) complex, ndarray (C,) complex, bool
        Responses per library cell (only ``cells_used`` are changed); ``clipped`` is True when the bias fell
        outside the sizes the library covers and was clipped to its end.

    Raises
    ------
    StudyError
        A used cell has no other cell of its kind on its uniform-bias line (library with one size).

    Notes
    -----
    For nominal sizes ``(a_c, b_c)`` (long, short), cell ``k`` of the same kind lies on the bias line when
    ``|(a_k - a_c) - (b_k - b_c)| <= line_tol_nm``; its bias is ``d_k = ((a_k - a_c) + (b_k - b_c)) / 4``.
    Real and imaginary parts of ``t_long`` and ``t_short`` are interpolated linearly in ``d``.
    """
    if not library.has_responses:
        raise StudyError(f"{library.source_path or library.name}: library has no responses; CD bias needs them")
    tl, ts = library.response_at(wavelength_nm)
    tl, ts = tl.copy(), ts.copy()
    cs = cell_shape_table(library.cells)
    kinds = np.array([c.kind for c in library.cells])
    clipped = False
    for c in sorted(set(int(v) for v in cells_used)):  # loop over distinct cells (short axis)
        da = cs.a_nm - cs.a_nm[c]
        db = cs.b_nm - cs.b_nm[c]
        on = (kinds == kinds[c]) & (np.abs(da - db) <= line_tol_nm)
        dk = ((da + db) / 4)[on]
        idx = np.flatnonzero(on)
        order = np.argsort(dk, kind="stable")
        dk, idx = dk[order], idx[order]
        if np.unique(dk).size < 2:
            raise StudyError(f"{library.source_path or library.name}: cell {library.cells[c].id!r} has no other "
                             f"{kinds[c]} cell on its uniform-bias line: CD bias cannot be evaluated from this "
                             "library (it needs cells of several sizes)")
        if bias_nm < dk[0] or bias_nm > dk[-1]:
            clipped = True
        b = float(np.clip(bias_nm, dk[0], dk[-1]))
        tl[c] = np.interp(b, dk, tl[idx].real) + 1j * np.interp(b, dk, tl[idx].imag)
        ts[c] = np.interp(b, dk, ts[idx].real) + 1j * np.interp(b, dk, ts[idx].imag)
    return tl, ts, clipped


def _cd_available(library, cells_used) -> tuple[bool, str]:
    try:
        biased_responses(library, cells_used, 0.0, library.design_wavelength_nm
                         if library.has_responses and library.wavelengths_nm[0] <= library.design_wavelength_nm
                         <= library.wavelengths_nm[-1] else float(library.wavelengths_nm[0]))
    except StudyError as exc:
        return False, str(exc)
    except MetalayError as exc:
        return False, str(exc)
    return True, ""


# ----------------------------------------------------------------------------------------------------------------
# Design rules: margins
# ----------------------------------------------------------------------------------------------------------------

def rule_margins(mask, library, design) -> dict:
    """How far the tightest design rules are from failing on a written mask.

    The library's default rules (minimum feature, minimum gap, maximum aspect ratio) are probed with limits that
    every polygon fails, so :func:`metalay.checks.rules.check_mask` reports the measured extreme of each quantity.

    Parameters
    ----------
    mask : str, Path or FlatPolygons
    library : CellLibrary
    design : Design

    Returns
    -------
    dict
        Per rule: ``limit``, ``measured`` (smallest width / gap, largest aspect ratio), ``margin`` (in the rule's
        unit, positive = passes) and ``relative_margin`` (margin / limit); ``worst`` = the rule with the smallest
        relative margin; ``overlaps`` (touching pairs).
    """
    from metalay.checks import rules as R

    film = library.film_height_nm
    layer = design.mask.layer("structures")
    base = R.rules_from_library(dict(library.rules), layer=layer, film_height_nm=film)
    lr = base.layers[0]
    period = float(design.lattice.period_nm)
    probe = replace(lr, min_width_nm=1e7 if lr.min_width_nm else None,
                    min_spacing_nm=period if lr.min_spacing_nm else None, grid_nm=None, check_validity=False,
                    max_aspect_ratio=1e-9 if lr.max_aspect_ratio else None)
    report = R.check_mask(mask, replace(base, layers=(probe,)))
    by = {r.rule: r for r in report.results}
    out = {}
    spec = (("width", lr.min_width_nm, min, 1), ("spacing", lr.min_spacing_nm, min, 1),
            ("aspect_ratio", lr.max_aspect_ratio, max, -1))
    for rule, limit, pick, sign in spec:
        if not limit or rule not in by:
            continue
        v = by[rule].violations.value
        if v.size == 0:  # spacing: no neighbour within one period
            measured = None
            margin = period - limit
        else:
            measured = float(pick(v))
            margin = sign * (measured - limit)
        out[rule] = {"limit": float(limit), "measured": measured, "margin": float(margin),
                     "relative_margin": float(margin / limit), "unit": by[rule].unit,
                     "lower_bound": measured is None}
    overlaps = by["overlap"].count if "overlap" in by else 0
    worst = min(out, key=lambda k: out[k]["relative_margin"]) if out else None
    return {"rules": out, "worst": worst,
            "worst_relative_margin": out[worst]["relative_margin"] if worst else None, "overlaps": int(overlaps)}


# ----------------------------------------------------------------------------------------------------------------
# Comparison of libraries
# ----------------------------------------------------------------------------------------------------------------

def design_for_library(design, library, *, adapt: bool = True):
    """The same design compiled with another library.

    Parameters
    ----------
    design : Design
    library : CellLibrary
    adapt : bool
        Also set the design wavelength and lattice period (and kind) to the library's, so that each library is
        used where it was characterised; otherwise only the library changes.

    Returns
    -------
    Design
        Re-validated with :func:`metalay.design.spec.parse_design` from the design's raw table.
    """
    import copy

    from metalay.design.spec import parse_design

    raw = copy.deepcopy(design.raw) if design.raw else None
    if not raw:
        raise StudyError(f"{design.source_path}: the design carries no raw table to re-validate (load it from a file "
                         "or with parse_design)")
    ref = library.source_path or library.name
    raw.setdefault("design", {})["library"] = str(ref)
    if adapt:
        raw["design"]["wavelength_nm"] = float(library.design_wavelength_nm)
        raw.setdefault("lattice", {})["period_nm"] = float(library.period_nm)
        raw["lattice"]["kind"] = library.lattice
    mask = raw.get("mask")
    if isinstance(mask, dict) and "cell" in mask and mask["cell"] not in [c.id for c in library.cells]:
        del mask["cell"]
    src = Path(design.source_path)
    base = src.parent if src.suffix == ".toml" else Path(".")
    return parse_design(raw, where=design.source_path, base_dir=base)


def _band_table(model: SiteModel) -> list[dict]:
    lib = model.library
    if not lib.has_responses:
        return []
    rows = []
    for wl in lib.wavelengths_nm:  # tabulated wavelengths (short axis)
        r = evaluate_sites(model, wavelength_nm=float(wl), budget_only=True)
        rows.append({"wavelength_nm": float(wl), "converted": r["converted"], "leakage": r["leakage"],
                     "designed_mode_efficiency": r["designed_mode_efficiency"]})
    return rows


def _compare_one(task) -> dict:
    """Compile, check and measure one library (runs in a worker process)."""
    from metalay.cells.library import load_library
    from metalay.checks import rules as R
    from metalay.mask.compile import compile_mask

    design, lib_ref, out_dir, adapt = task
    lib = load_library(lib_ref)
    d2 = design_for_library(design, lib, adapt=adapt)
    res = compile_mask(d2, Path(out_dir) / lib.name, show_progress=False)
    man = res.manifest
    mask_path = res.files.get("gds") or res.files.get("oas")
    # the checks compile runs, called here on the written mask (same functions, same output folder)
    rules_check = R.compile_check(mask_path, lib, d2)
    optics_check = optics.quick_check(mask_path, lib, d2, out_dir=Path(mask_path).parent / "optics")
    ofig = optics_check["figures"]
    model = site_model(mask_path, lib, d2)
    margins = rule_margins(mask_path, lib, d2)
    band = _band_table(model)
    nominal = evaluate_sites(model, budget_only=True)
    files = {fmt: info["bytes"] for fmt, info in man["files"].items()}
    b = ofig["power_budget"]
    row = {
        "library": lib.name, "mode": lib.mode, "phase_mechanism": lib.phase_mechanism,
        "wavelength_nm": d2.wavelength_nm, "period_nm": d2.lattice.period_nm,
        "converted": b["converted"], "leakage": b["leakage"],
        "not_in_zeroth_order": b["not_in_zeroth_order"],
        "designed_spot_efficiency": ofig.get("designed_spot_efficiency"),
        "designed_mode_efficiency": nominal["designed_mode_efficiency"],
        "purity": ofig["oam"]["purity"] if "oam" in ofig else None,
        "design_charge": ofig["oam"]["design_charge"] if "oam" in ofig else None,
        "rule_violations": rules_check.get("violations"),
        "worst_rule": margins["worst"], "worst_rule_relative_margin": margins["worst_relative_margin"],
        "worst_rule_margin": margins["rules"][margins["worst"]]["margin"] if margins["worst"] else None,
        "elements": man["counts"]["sites"],
        "gds_bytes": files.get("gds"), "oas_bytes": files.get("oas"),
        "responses": "library" if lib.has_responses else "ideal half-wave cells (library has no responses)",
    }
    return {"row": row, "band": band, "margins": margins, "warnings": list(man["warnings"]),
            "optics_notes": optics_check.get("notes", []), "out_dir": str(res.out_dir),
            "rules_summary": rules_check.get("summary", []),
            "band_at_design": {"converted": nominal["converted"], "leakage": nominal["leakage"]}}


@dataclass(frozen=True)
class CompareResult:
    """Outcome of :func:`compare_libraries`.

    Attributes
    ----------
    rows : tuple of dict
        One row per library (same order as given): the table columns.
    bands : dict name -> list of dict
        Power budget over each library's tabulated wavelengths.
    details : dict name -> dict
        Rule margins, warnings, optics notes, compile folder.
    files : dict name -> Path
        Written table and plots.
    notes : tuple of str
    """

    rows: tuple
    bands: dict
    details: dict
    files: dict
    notes: tuple

    def __str__(self) -> str:
        lines = [f"library comparison of {len(self.rows)} libraries (fractions of the incident power):"]
        for r in self.rows:
            conv, pur = r.get("converted"), r.get("purity")
            lines.append(f"  {r.get('library')}: converted {'-' if conv is None else f'{conv:.4f}'}, purity "
                         f"{'-' if pur is None else f'{pur:.4f}'}, rule violations {r.get('rule_violations')}")
        return "\n".join(lines)

    def __repr__(self) -> str:
        return f"CompareResult(libraries={[r.get('library') for r in self.rows]}, files={sorted(self.files)})"


COMPARE_COLUMNS = ("library", "mode", "phase_mechanism", "wavelength_nm", "period_nm", "converted", "leakage",
                   "not_in_zeroth_order", "designed_spot_efficiency", "designed_mode_efficiency", "purity",
                   "design_charge", "rule_violations", "worst_rule", "worst_rule_margin",
                   "worst_rule_relative_margin", "elements", "gds_bytes", "oas_bytes", "responses")


def _csv_text(columns, rows) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    for r in rows:
        w.writerow(["" if r.get(c) is None else (repr(float(r[c])) if isinstance(r[c], float) else r[c])
                    for c in columns])
    return buf.getvalue()


def _json_bytes(obj) -> bytes:
    return (json.dumps(optics.json_ready(obj), sort_keys=True, indent=2, allow_nan=False) + "\n").encode()


def _refuse_spin_decoupled(design, study: str) -> None:
    """The studies evaluate one input spin: a spin-decoupled design (a phase per spin) is refused in one line."""
    if getattr(design, "spin_decoupled", False):
        raise StudyError(f"{design.source_path}: key 'phase_spin_plus': the {study} study evaluates one input spin; "
                         "a spin-decoupled design is checked for both spins by metalay compile / metalay optics")


def compare_libraries(design, libraries, out_dir, *, adapt: bool = True, workers: int | None = None,
                      show_progress: bool | None = None) -> CompareResult:
    """Compile ``design`` with each library, check rules and optics on each mask, tabulate and plot.

    Parameters
    ----------
    design : Design
    libraries : sequence of str
        Bundled names or paths to ``*.library.json`` (at least one; names must be distinct).
    out_dir : str or Path
        Output folder: ``compare.csv``, ``compare.json``, ``compare_band.csv``, ``compare_band.png``,
        ``compare_figures.png`` and one compile folder per library.
    adapt : bool
        Use each library's design wavelength and period (see :func:`design_for_library`).
    workers : int, optional
        Processes over libraries (default: the number of cores, at most the number of libraries).
    show_progress : bool or None

    Returns
    -------
    CompareResult
    """
    from concurrent.futures import ProcessPoolExecutor
    from multiprocessing import get_all_start_methods, get_context

    from metalay.cells.library import load_library
    from metalay.util.atomic import atomic_write_bytes, ensure_dir
    from metalay.util.progress import progress

    _refuse_spin_decoupled(design, "compare")
    libs = list(libraries)
    if not libs:
        raise StudyError("compare: give at least one library (--library NAME_OR_PATH)")
    loaded = [load_library(x) for x in libs]
    names = [lib.name for lib in loaded]
    if len(set(names)) != len(names):
        raise StudyError(f"compare: library names must be distinct; got {names}")
    out = ensure_dir(out_dir)
    n_workers = max(1, min(len(libs), workers or os.cpu_count() or 1))
    if "fork" not in get_all_start_methods():
        n_workers = 1
    tasks = [(design, ref, str(out), adapt) for ref in libs]
    bar = progress(total=len(tasks), desc="compare: libraries", enabled=show_progress, unit="library")
    results = [None] * len(tasks)
    try:
        if n_workers == 1:
            for k, t in enumerate(tasks):
                results[k] = _compare_one(t)
                bar.update(1)
        else:
            # fork: the workers inherit the loaded modules (no re-import of the caller's main script)
            with ProcessPoolExecutor(max_workers=n_workers, mp_context=get_context(_START_METHOD)) as pool:
                futs = {pool.submit(_compare_one, t): k for k, t in enumerate(tasks)}
                from concurrent.futures import as_completed

                for f in as_completed(futs):
                    results[futs[f]] = f.result()
                    bar.update(1)
    finally:
        bar.close()
    rows = tuple(r["row"] for r in results)
    bands = {r["row"]["library"]: r["band"] for r in results}
    details = {r["row"]["library"]: {k: r[k] for k in ("margins", "warnings", "optics_notes", "rules_summary",
                                                       "out_dir")}
               for r in results}
    notes = [EFFICIENCY_NOTE,
             "Design-rule margin: (measured - limit) for minimum width and gap, (limit - measured) for the aspect "
             "ratio, relative = margin / limit; the worst rule has the smallest relative margin.",
             ("each library at its own design wavelength and period" if adapt else
              "every library at the design's wavelength and period")]
    for r in rows:
        if r["responses"] != "library":
            notes.append(f"{r['library']}: no optical responses; ideal half-wave cells assumed (upper bounds)")
    band_rows = [{"library": name, **b} for name in names for b in bands[name]]
    files = {}
    table = {"format": "metalay.library-comparison", "format_version": 1, "design": design.name,
             "columns": list(COMPARE_COLUMNS), "rows": list(rows), "band": bands, "details": details,
             "notes": notes, "caution": optics.SAFETY_NOTE}
    files["compare.json"] = atomic_write_bytes(out / "compare.json", _json_bytes(table))
    files["compare.csv"] = atomic_write_bytes(out / "compare.csv", _csv_text(COMPARE_COLUMNS, rows).encode())
    files["compare_band.csv"] = atomic_write_bytes(out / "compare_band.csv", _csv_text(
        ("library", "wavelength_nm", "converted", "leakage", "designed_mode_efficiency"), band_rows).encode())
    files["compare_band.png"] = atomic_write_bytes(out / "compare_band.png", _plot_band(bands))
    files["compare_figures.png"] = atomic_write_bytes(out / "compare_figures.png", _plot_bars(rows))
    return CompareResult(rows=rows, bands=bands, details=details, files=files, notes=tuple(notes))


# ----------------------------------------------------------------------------------------------------------------
# Tolerance (Monte Carlo over fabrication errors)
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class ToleranceSettings:
    """Fabrication-error model of a tolerance study.

    Attributes
    ----------
    samples : int
        Monte Carlo samples (>= 1).
    cd_bias_mean_nm, cd_bias_sd_nm : float
        Critical-dimension bias per edge, one draw per sample from ``N(mean, sd)``.
    rotation_sd_deg : float
        Standard deviation of the per-element rotation error (degrees of element angle).
    missing_fraction : float
        Probability that an element is missing, in [0, 1).
    detune_sd_nm : float
        Standard deviation of the wavelength offset, one draw per sample.
    seed : int
        Root seed.
    purity_threshold : float or None
        Report, per error kind, the magnitude at which the 5th percentile of purity drops below it.
    sweep_levels : tuple of float
        Multiples of each requested magnitude swept for the threshold.
    sweep_samples : int
        Samples per sweep level.
    cd_response : {"solved", "nominal"}
        CD bias of a library with one size per cell: "solved" (default) computes the biased cells with metalay's
        RCWA (:class:`metalay.cells.biascells.BiasedCells`); "nominal" keeps the nominal responses, so CD bias is
        not evaluated (stated in the notes). Libraries with several sizes interpolate between their cells.
    bias_harmonics : (int, int) or None
        Truncation of those solves (default: the library's recorded truncation at each wavelength).
    bias_step_nm : float
        Bias grid of the solved cells (biases between nodes are interpolated in amplitude and phase).
    """

    samples: int = 200
    cd_bias_mean_nm: float = 0.0
    cd_bias_sd_nm: float = 0.0
    rotation_sd_deg: float = 0.0
    missing_fraction: float = 0.0
    detune_sd_nm: float = 0.0
    seed: int = 0
    purity_threshold: float | None = None
    sweep_levels: tuple = (0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0)
    sweep_samples: int = 24
    cd_response: str = "solved"
    bias_harmonics: tuple | None = None
    bias_step_nm: float = 0.5

    def validate(self, where: str = "tolerance") -> None:
        """Raise :class:`StudyError` naming the first value outside its range."""
        def bad(key, value, allowed):
            raise StudyError(f"{where}: {key} = {value!r}; allowed: {allowed}")

        if not isinstance(self.samples, (int, np.integer)) or not 1 <= self.samples <= 1_000_000:
            bad("samples", self.samples, "an integer 1..1000000")
        for key in ("cd_bias_sd_nm", "rotation_sd_deg", "detune_sd_nm"):
            v = getattr(self, key)
            if not (math.isfinite(v) and v >= 0):
                bad(key, v, "a finite number >= 0")
        if not math.isfinite(self.cd_bias_mean_nm) or abs(self.cd_bias_mean_nm) > 1000:
            bad("cd_bias_mean_nm", self.cd_bias_mean_nm, "-1000..1000 nm")
        if self.rotation_sd_deg > 90:
            bad("rotation_sd_deg", self.rotation_sd_deg, "0..90 deg")
        if not (0 <= self.missing_fraction < 1):
            bad("missing_fraction", self.missing_fraction, "0 <= m < 1")
        if self.purity_threshold is not None and not (0 < self.purity_threshold <= 1):
            bad("purity_threshold", self.purity_threshold, "0 < threshold <= 1")
        if not 1 <= self.sweep_samples <= 100_000:
            bad("sweep_samples", self.sweep_samples, "1..100000")
        if not isinstance(self.seed, (int, np.integer)) or self.seed < 0:
            bad("seed", self.seed, "an integer >= 0")
        if self.cd_response not in CD_RESPONSES:
            bad("cd_response", self.cd_response, ", ".join(CD_RESPONSES))
        if not (math.isfinite(self.bias_step_nm) and 0.01 <= self.bias_step_nm <= 10):
            bad("bias_step_nm", self.bias_step_nm, "0.01..10 nm")
        if self.bias_harmonics is not None and not (len(self.bias_harmonics) == 2 and all(
                isinstance(h, (int, np.integer)) and 0 <= h <= 40 for h in self.bias_harmonics)):
            bad("bias_harmonics", self.bias_harmonics, "two integers 0..40")

    def kinds(self) -> list[str]:
        """Error kinds switched on."""
        out = []
        if self.cd_bias_mean_nm or self.cd_bias_sd_nm:
            out.append("cd_bias")
        if self.rotation_sd_deg:
            out.append("rotation")
        if self.missing_fraction:
            out.append("missing")
        if self.detune_sd_nm:
            out.append("detune")
        return out

    def only(self, kind: str, scale: float) -> "ToleranceSettings":
        """These settings with one error kind scaled by ``scale`` and the others off."""
        z = dict(cd_bias_mean_nm=0.0, cd_bias_sd_nm=0.0, rotation_sd_deg=0.0, missing_fraction=0.0,
                 detune_sd_nm=0.0)
        if kind == "cd_bias":
            z.update(cd_bias_mean_nm=self.cd_bias_mean_nm * scale, cd_bias_sd_nm=self.cd_bias_sd_nm * scale)
        elif kind == "rotation":
            z.update(rotation_sd_deg=self.rotation_sd_deg * scale)
        elif kind == "missing":
            z.update(missing_fraction=min(0.999, self.missing_fraction * scale))
        elif kind == "detune":
            z.update(detune_sd_nm=self.detune_sd_nm * scale)
        return replace(self, **z)


_START_METHOD = "fork"
_KIND_STREAM = {"cd_bias": 0, "detune": 1, "rotation": 2, "missing": 3}
#: Values of :attr:`ToleranceSettings.cd_response`.
CD_RESPONSES = ("solved", "nominal")


def _streams(seed_seq) -> list:
    """The four child streams of a sample (what ``seed_seq.spawn(4)`` gives a fresh sequence), without changing
    ``seed_seq`` (so the draws can be repeated, e.g. to solve the needed biased cells before the samples run)."""
    return [np.random.SeedSequence(seed_seq.entropy, spawn_key=tuple(seed_seq.spawn_key) + (k,),
                                   pool_size=seed_seq.pool_size) for k in range(4)]


def _drawn_bias_and_wavelength(model: SiteModel, st: "ToleranceSettings", seed_seq) -> tuple[float, float]:
    """The CD bias (nm) and wavelength (nm) that :func:`_sample` draws for ``seed_seq`` (same streams, same order)."""
    rng = [np.random.default_rng(q) for q in _streams(seed_seq)]
    wl = model.target.wavelength_nm
    if st.detune_sd_nm:
        wl += float(rng[_KIND_STREAM["detune"]].normal(0.0, st.detune_sd_nm))
    b = float(st.cd_bias_mean_nm + st.cd_bias_sd_nm * rng[_KIND_STREAM["cd_bias"]].standard_normal())
    return b, wl


def _sample(model: SiteModel, st: ToleranceSettings, seed_seq, cd_ok: bool, budget_only: bool = False) -> dict:
    """One Monte Carlo sample: draw the errors from ``seed_seq`` and evaluate."""
    d = model.decoded
    rng = [np.random.default_rng(s) for s in _streams(seed_seq)]
    wl = model.target.wavelength_nm
    info = {"cd_bias_nm": 0.0, "detune_nm": 0.0, "missing": 0, "clipped": False}
    if st.detune_sd_nm:
        info["detune_nm"] = float(rng[_KIND_STREAM["detune"]].normal(0.0, st.detune_sd_nm))
    wl_s = wl + info["detune_nm"]
    t_long = t_short = None
    if cd_ok and (st.cd_bias_mean_nm or st.cd_bias_sd_nm):
        b = float(st.cd_bias_mean_nm + st.cd_bias_sd_nm * rng[_KIND_STREAM["cd_bias"]].standard_normal())
        info["cd_bias_nm"] = b
        if model.biased is not None:  # one size per cell: the biased cells solved (prepared before the samples)
            tl_c, ts_c = model.biased.responses_at(np.unique(d.cell), b, wl_s)
        else:
            tl_c, ts_c, info["clipped"] = biased_responses(model.library, np.unique(d.cell), b, wl_s)
        t_long, t_short = tl_c[d.cell], ts_c[d.cell]
    rot = None
    if st.rotation_sd_deg:
        rot = d.rotation_rad + rng[_KIND_STREAM["rotation"]].normal(0.0, math.radians(st.rotation_sd_deg), d.i.size)
    keep = None
    if st.missing_fraction:
        keep = rng[_KIND_STREAM["missing"]].random(d.i.size) >= st.missing_fraction
        info["missing"] = int(d.i.size - keep.sum())
    r = evaluate_sites(model, t_long=t_long, t_short=t_short, rotation_rad=rot, keep=keep,
                       wavelength_nm=wl_s if st.detune_sd_nm else None, budget_only=budget_only, workers=1)
    r.pop("oam_weights", None)
    r.update(info)
    return r


_FORKED_MODEL: list = []  # the model handed to forked worker processes (set only around a pool's lifetime)


def _sample_block(args) -> list[dict]:
    st, seeds, cd_ok, budget_only = args
    model = _FORKED_MODEL[0]
    return [_sample(model, st, s, cd_ok, budget_only) for s in seeds]


def _run_samples(model, st, seeds, cd_ok, workers, bar=None, budget_only=False) -> list[dict]:
    """Evaluate samples in order; each result depends only on its own seed, never on the worker count.

    With ``workers > 1`` the samples run in forked processes (the interpolation of the OAM resampling holds the
    GIL, so threads do not scale), in blocks of a few samples; one worker runs in this process.
    """
    from multiprocessing import get_all_start_methods, get_context

    if workers <= 1 or len(seeds) < 2 or "fork" not in get_all_start_methods():
        out = []
        for s in seeds:
            out.append(_sample(model, st, s, cd_ok, budget_only))
            if bar is not None:
                bar.update(1)
        return out
    from concurrent.futures import ProcessPoolExecutor

    size = max(1, min(8, len(seeds) // (2 * workers)))
    blocks = [seeds[k:k + size] for k in range(0, len(seeds), size)]
    out = []
    _FORKED_MODEL[:] = [model]
    try:
        with ProcessPoolExecutor(max_workers=workers, mp_context=get_context(_START_METHOD)) as pool:
            for got in pool.map(_sample_block, [(st, b, cd_ok, budget_only) for b in blocks]):
                out.extend(got)
                if bar is not None:
                    bar.update(len(got))
    finally:
        _FORKED_MODEL[:] = []
    return out


_STAT_KEYS = ("converted", "leakage", "designed_spot_efficiency", "designed_mode_efficiency", "purity",
              "worst_isolation_db", "worst_channel_purity", "strehl", "spot_fwhm_um", "focusing_efficiency")


def _stats(samples: list[dict]) -> dict:
    out = {}
    for key in _STAT_KEYS:
        v = np.array([s[key] for s in samples if s.get(key) is not None], float)
        if v.size == 0:
            out[key] = None
            continue
        p5, p50, p95 = np.percentile(v, [5, 50, 95])
        out[key] = {"median": float(p50), "p5": float(p5), "p95": float(p95), "mean": float(v.mean()),
                    "std": float(v.std(ddof=1)) if v.size > 1 else 0.0, "min": float(v.min()),
                    "max": float(v.max())}
    charges = [s["fringe_charge"] for s in samples if "fringe_charge" in s]
    if any(c is not None for c in charges):
        counts = {}
        for c in charges:
            key = "unreadable" if c is None else str(c)
            counts[key] = counts.get(key, 0) + 1
        out["fringe_charge"] = {"counts": dict(sorted(counts.items()))}
    verdicts = [s["verdict"] for s in samples if "verdict" in s]
    if verdicts:
        out["verdict"] = {"counts": {k: verdicts.count(k) for k in ("pass", "warn", "fail", "unmeasured")
                                     if verdicts.count(k)},
                          "fail_fraction": verdicts.count("fail") / len(verdicts)}
    return out


@dataclass(frozen=True)
class ToleranceResult:
    """Outcome of :func:`tolerance_study`.

    Attributes
    ----------
    nominal : dict
        Unperturbed figures (equal to the optical check of the mask).
    samples : tuple of dict
        Per-sample figures and drawn errors (sample order).
    statistics : dict
        Median, 5th and 95th percentiles (and mean, std, min, max) per figure.
    thresholds : dict
        Per error kind: the magnitude at which the 5th percentile of purity drops below the threshold, and the
        sweep it was read from (empty without a threshold).
    files : dict name -> Path
    notes : tuple of str
    settings : ToleranceSettings
    """

    nominal: dict
    samples: tuple
    statistics: dict
    thresholds: dict
    files: dict
    notes: tuple
    settings: ToleranceSettings

    def __str__(self) -> str:
        lines = [f"tolerance study: {len(self.samples)} samples, seed {self.settings.seed}; figure: nominal, median "
                 "[5th, 95th percentile]"]
        for key, st in self.statistics.items():
            if st is not None and "counts" in st:
                lines.append(f"  {key}: {self.nominal.get(key)}, samples by value {st['counts']}")
            elif st is not None:
                nom = self.nominal.get(key)
                nom = f"{nom:.4f}" if isinstance(nom, float) else str(nom)
                lines.append(f"  {key}: {nom}, {st['median']:.4f} [{st['p5']:.4f}, {st['p95']:.4f}]")
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)

    def __repr__(self) -> str:
        figures = sorted(k for k, v in self.statistics.items() if v)
        return f"ToleranceResult(samples={len(self.samples)}, figures={figures}, files={sorted(self.files)})"


_KIND_UNITS = {"cd_bias": ("cd_bias_sd_nm", "nm (sd of CD bias per edge)"),
               "rotation": ("rotation_sd_deg", "deg (sd of element angle)"),
               "missing": ("missing_fraction", "(fraction of elements)"),
               "detune": ("detune_sd_nm", "nm (sd of wavelength)")}


def _magnitude(st: ToleranceSettings, kind: str) -> float:
    if kind == "cd_bias":
        return math.hypot(st.cd_bias_mean_nm, st.cd_bias_sd_nm)
    return float(getattr(st, _KIND_UNITS[kind][0]))


def tolerance_study(design, out_dir=None, *, settings: ToleranceSettings = ToleranceSettings(), mask=None,
                    max_side: int = 1024, pad_factor: float = 2.0, workers: int | None = None,
                    show_progress: bool | None = None, make_plots: bool = True,
                    cell_cache=None) -> ToleranceResult:
    """Monte Carlo over fabrication errors of a compiled design, evaluated by the optical check.

    Parameters
    ----------
    design : Design
    out_dir : str or Path, optional
        Output folder: ``tolerance.json``, ``tolerance_samples.csv``, ``tolerance_hist.png`` and, with a
        threshold, ``tolerance_sweep.png``; the mask is compiled into ``<out_dir>/mask`` when ``mask`` is None.
    settings : ToleranceSettings
    mask : str or Path, optional
        A mask already compiled from ``design`` (default: compile it, checks off).
    max_side, pad_factor
        Optical-check resolution (the defaults of the compile-time check).
    workers : int, optional
        Processes over samples (default: the number of cores).  Results do not depend on it.
    show_progress : bool or None
    make_plots : bool
    cell_cache : str or Path, optional
        Folder that keeps solved biased cells between runs (CD bias of single-size libraries).

    Returns
    -------
    ToleranceResult

    Notes
    -----
    Rotation errors ``d_theta ~ N(0, s)`` change the converted phase by ``2 d_theta`` (geometric phase).  For
    independent Gaussian phase errors of standard deviation ``delta`` the mean coherent power into the designed
    beam falls by ``|E exp(i 2 d_theta)|^2 = exp(-(2 s)^2)`` (Ruze 1966) plus an incoherent remainder of relative
    size ``(1 - exp(-(2s)^2)) / N``.  Missing elements (probability ``m``) keep a fraction ``(1 - m)`` of the
    converted amplitude on average, so the coherent power falls by ``(1 - m)^2`` (plus ``m (1 - m) / N``): with
    ``K`` the kept count, ``E|sum_kept c|^2 = |c|^2 E K^2 = |c|^2 (N^2 (1-m)^2 + N m (1-m))`` for equal ``c``.

    References
    ----------
    Ruze 1966, Proc. IEEE 54, 633.
    """
    from metalay.cells.library import load_library
    from metalay.util.progress import progress

    _refuse_spin_decoupled(design, "tolerance")
    settings.validate()
    n_workers = max(1, int(workers or os.cpu_count() or 1))
    notes = [EFFICIENCY_NOTE]
    lib = load_library(design.library)
    refuse_unevaluable(design, lib, settings)  # before the compile and the site model: minutes saved
    mask = _mask_for_study(design, out_dir, mask)
    model = site_model(mask, lib, design, max_side=max_side, pad_factor=pad_factor)
    cd_mode = _check_tolerance_inputs(design, lib, model, settings, notes)
    cd_ok = bool(cd_mode)
    nominal = evaluate_sites(model, workers=n_workers)
    nominal.pop("oam_weights", None)
    seeds = np.random.SeedSequence(int(settings.seed)).spawn(settings.samples)
    kinds = [k for k in settings.kinds() if not (k == "cd_bias" and not cd_ok)]
    sweep_plan = []
    if settings.purity_threshold is not None:
        sweep_plan = [(k, float(s)) for k in kinds for s in settings.sweep_levels]
    if cd_mode == "solved":
        model = _with_biased_cells(model, settings, seeds, sweep_plan, cell_cache, notes)
    total = settings.samples + len(sweep_plan) * settings.sweep_samples
    bar = progress(total=total, desc="tolerance: samples", enabled=show_progress, unit="sample")
    try:
        samples = _run_samples(model, settings, seeds, cd_ok, n_workers, bar)
        sweeps = _run_sweeps(model, settings, sweep_plan, cd_ok, n_workers, bar)
    finally:
        bar.close()
    clipped = sum(1 for s in samples if s["clipped"])
    if clipped:
        notes.append(f"{clipped} samples drew a CD bias beyond the sizes the library covers: clipped to its end "
                     "(their spread is understated)")
    thresholds = {kind: _threshold_crossing(settings.purity_threshold, kind, rows) for kind, rows in sweeps.items()}
    stats = _stats(samples)
    cd_record = {"evaluated": cd_ok, "method": {"library": "interpolated between library cells of several sizes",
                                                "solved": "biased cells solved by metalay's RCWA",
                                                "": "not evaluated (see notes)"}[cd_mode]}
    if model.biased is not None:
        cd_record["solver"] = model.biased.record()
    result_json = {"format": "metalay.tolerance-study", "format_version": 1, "design": design.name,
                   "library": lib.name, "mask": Path(mask).name, "settings": settings.__dict__,
                   "nominal": nominal, "statistics": stats, "thresholds": thresholds, "notes": notes,
                   "cd_bias": cd_record, "elements": len(model.decoded), "caution": optics.SAFETY_NOTE}
    files = {}
    if out_dir is not None:
        files = _write_tolerance_files(out_dir, result_json, samples, nominal, thresholds, make_plots)
    return ToleranceResult(nominal=nominal, samples=tuple(samples), statistics=stats, thresholds=thresholds,
                           files=files, notes=tuple(notes), settings=settings)


def refuse_unevaluable(design, library, settings: ToleranceSettings) -> None:
    """Refuse, before anything is computed, an error kind the study cannot evaluate for this design and library.

    CD bias needs responses and either, for each cell the design uses, other cells of its kind on the uniform-bias
    line (:func:`biased_responses`) or, with ``cd_response = "solved"``, a library the bias solver can re-solve
    (:class:`metalay.cells.biascells.BiasedCells`: solvable cell kinds, a patterned layer, a recorded truncation or
    ``bias_harmonics``); ``cd_response = "nominal"`` leaves CD bias out on purpose (noted, not refused). Detuning
    needs responses; a purity threshold needs one topological charge.

    Raises
    ------
    StudyError
        One line naming the setting (option ``--cd-bias-nm`` / key ``cd_bias_mean_nm``, ``cd_bias_sd_nm``,
        ``detune_sd_nm``, ``purity_threshold``) and why it cannot be evaluated.
    """
    wants_cd = bool(settings.cd_bias_mean_nm or settings.cd_bias_sd_nm)
    if wants_cd and settings.cd_response != "nominal":
        opt = f"cd_bias (--cd-bias-nm {settings.cd_bias_mean_nm:g} {settings.cd_bias_sd_nm:g})"
        if not library.has_responses:
            raise StudyError(f"tolerance: {opt} cannot be evaluated for library {library.name!r}: it has no "
                             "responses; leave it at 0 0 or use a library with responses")
        if library.phase_mechanism == "geometric":
            used = [library.cell_index(design.mask.cell or library.cells[0].id)]
        else:
            used = list(range(len(library.cells)))
        if not _cd_available(library, used)[0]:
            from metalay.cells.biascells import BiasedCells

            try:  # one size per cell: the biased cells are solved; can they be?
                BiasedCells(library, harmonics=settings.bias_harmonics, bias_step_nm=settings.bias_step_nm)
            except MetalayError as exc:
                raise StudyError(f"tolerance: {opt} cannot be evaluated for library {library.name!r}: the library "
                                 f"has one size per cell and the bias solver refuses it ({str(exc).split(': ', 1)[-1]})"
                                 "; leave it at 0 0, give --cd-response nominal, or use a library with cells of "
                                 "several sizes") from exc
    if settings.detune_sd_nm and not library.has_responses:
        raise StudyError(f"tolerance: detune_sd_nm (--detune-nm {settings.detune_sd_nm:g}) needs a library with "
                         f"responses; {library.name} has none")
    if settings.purity_threshold is not None:
        if optics.target_from_design(design).charge is None:
            raise StudyError(f"{design.source_path}: purity_threshold (--purity-threshold) needs a design with one "
                             "topological charge about the beam axis")


def _mask_for_study(design, out_dir, mask):
    """The given mask, or the design compiled into ``<out_dir>/mask`` (checks off)."""
    from metalay.mask.compile import compile_mask

    if mask is None:
        if out_dir is None:
            raise StudyError("tolerance: give out_dir (the mask is compiled there) or an existing mask")
        res = compile_mask(design, Path(out_dir) / "mask", show_progress=False)
        return res.files.get("gds") or res.files.get("oas")
    if not Path(mask).is_file():
        raise StudyError(f"tolerance: mask = {str(mask)!r} not found")
    return mask


def _check_tolerance_inputs(design, lib, model: SiteModel, settings: ToleranceSettings, notes: list) -> bool:
    """Refuse what cannot be evaluated; note what is skipped.

    Returns how CD bias is evaluated: "library" (interpolated between library cells of several sizes), "solved"
    (biased cells solved by the RCWA) or "" (not evaluated, noted).
    """
    if not lib.has_responses:
        notes.append(f"library {lib.name} has no optical responses: ideal half-wave cells (t_long = 1, t_short = "
                     "-1) assumed; CD bias and detuning cannot be evaluated")
    cells_used = np.unique(model.decoded.cell)
    cd_ok, cd_msg = (_cd_available(lib, cells_used) if lib.has_responses else (False, "no responses"))
    wants_cd = bool(settings.cd_bias_mean_nm or settings.cd_bias_sd_nm)
    if wants_cd and not cd_ok and lib.has_responses and settings.cd_response == "solved":
        return "solved"  # one size per cell: the biased cells are solved (_with_biased_cells)
    if wants_cd and not cd_ok:
        why = ("nominal responses kept as asked (cd_response 'nominal')" if settings.cd_response == "nominal"
               and lib.has_responses else cd_msg)
        notes.append(f"CD bias not evaluated: {why}")
    if settings.detune_sd_nm and not lib.has_responses:
        raise StudyError(f"tolerance: detune_sd_nm = {settings.detune_sd_nm:g} needs a library with responses; "
                         f"{lib.name} has none")
    if settings.purity_threshold is not None and model.target.charge is None:
        raise StudyError(f"{design.source_path}: purity_threshold needs a design with one topological charge about "
                         "the beam axis")
    return "library" if cd_ok else ""


def _with_biased_cells(model: SiteModel, settings: ToleranceSettings, seeds, sweep_plan, cell_cache,
                       notes: list) -> SiteModel:
    """The model with a :class:`~metalay.cells.biascells.BiasedCells` holding every biased cell the samples draw.

    The draws are repeated here (same streams as :func:`_sample`) and the needed bias-grid nodes and tabulated
    wavelengths are solved in batches before any sample runs, so forked workers find them in the cache and the
    results do not depend on the worker count.
    """
    from metalay.cells.biascells import BiasedCells

    solver = BiasedCells(model.library, harmonics=settings.bias_harmonics, bias_step_nm=settings.bias_step_nm,
                         cache_dir=cell_cache)
    draws = [_drawn_bias_and_wavelength(model, settings, q) for q in seeds]
    sweep_seeds = np.random.SeedSequence([int(settings.seed), 1]).spawn(settings.sweep_samples)
    for kind, scale in sweep_plan:
        if kind == "cd_bias":
            st = settings.only(kind, scale)
            draws += [_drawn_bias_and_wavelength(model, st, q) for q in sweep_seeds]
    biases, wavelengths = solver.nodes_for([d[0] for d in draws], [d[1] for d in draws])
    solver.prepare(np.unique(model.decoded.cell), biases, wavelengths)
    rec = solver.record()
    trunc = rec["truncation"]
    notes.append(f"CD bias: the library has one size per cell, so the biased cells were solved with metalay's RCWA "
                 f"on a {settings.bias_step_nm:g} nm bias grid ({len(biases)} biases x {len(wavelengths)} "
                 f"wavelengths; truncation: {trunc if isinstance(trunc, str) else trunc}); "
                 f"{rec['points_loaded_from_cache']} points from the cache folder")
    return replace(model, biased=solver)


def _run_sweeps(model: SiteModel, settings: ToleranceSettings, sweep_plan, cd_ok: bool, n_workers: int,
                bar) -> dict:
    """Purity percentiles per error kind and scale (the same seeds at every scale)."""
    sweeps = {}
    if not sweep_plan:
        return sweeps
    sweep_seeds = np.random.SeedSequence([int(settings.seed), 1]).spawn(settings.sweep_samples)
    for kind, scale in sweep_plan:
        st = settings.only(kind, scale)
        got = _run_samples(model, st, sweep_seeds, cd_ok, n_workers, bar)
        pur = np.array([g["purity"] for g in got], float)
        sweeps.setdefault(kind, []).append({"scale": scale, "magnitude": _magnitude(st, kind),
                                           "purity_p5": float(np.percentile(pur, 5)),
                                           "purity_median": float(np.median(pur))})
    return sweeps


def _threshold_crossing(thr: float, kind: str, rows: list) -> dict:
    """Error magnitude at which the 5th percentile of purity falls below ``thr`` (linear between sweep points)."""
    mags = [r["magnitude"] for r in rows]
    p5 = [r["purity_p5"] for r in rows]
    at = None
    for k in range(1, len(rows)):
        if p5[k] < thr <= p5[k - 1]:
            f = (p5[k - 1] - thr) / (p5[k - 1] - p5[k])
            at = mags[k - 1] + f * (mags[k] - mags[k - 1])
            break
    if at is None and p5 and p5[0] < thr:
        at = 0.0
    return {"threshold": thr, "unit": _KIND_UNITS[kind][1], "tolerance": at, "beyond_sweep": at is None,
            "sweep_max": max(mags) if mags else None, "criterion": "5th percentile of purity", "sweep": rows}


def _write_tolerance_files(out_dir, result_json: dict, samples, nominal, thresholds, make_plots: bool) -> dict:
    """``tolerance.json``, ``tolerance_samples.csv`` and the histograms (and sweep plot) in ``out_dir``."""
    from metalay.util.atomic import atomic_write_bytes, ensure_dir

    out = ensure_dir(out_dir)
    files = {"tolerance.json": atomic_write_bytes(out / "tolerance.json", _json_bytes(result_json))}
    cols = ("sample", "cd_bias_nm", "detune_nm", "missing", "converted", "leakage", "designed_spot_efficiency",
            "designed_mode_efficiency", "purity", *JUDGED_KEYS, "verdict")
    rows = [{"sample": k, **s} for k, s in enumerate(samples)]
    files["tolerance_samples.csv"] = atomic_write_bytes(out / "tolerance_samples.csv", _csv_text(cols, rows).encode())
    if make_plots:
        files["tolerance_hist.png"] = atomic_write_bytes(out / "tolerance_hist.png", _plot_hist(samples, nominal))
        if thresholds:
            files["tolerance_sweep.png"] = atomic_write_bytes(out / "tolerance_sweep.png", _plot_sweep(thresholds))
    return files


# ----------------------------------------------------------------------------------------------------------------
# Plots (deterministic PNG bytes)
# ----------------------------------------------------------------------------------------------------------------

def _fig(w, h):
    from metalay.checks.plots import new_figure

    return new_figure(w, h)


def _render(fig) -> bytes:
    from metalay.checks.plots import png_bytes

    return png_bytes(fig)


def _styled(fn):
    """:func:`metalay.checks.plots.styled`, imported when a plot is drawn (workers need no matplotlib)."""
    def wrapper(*a, **k):
        from metalay.checks.plots import styled

        return styled(fn)(*a, **k)

    return wrapper


@_styled
def _plot_band(bands: dict) -> bytes:
    fig = _fig(7.0, 3.6)
    ax1, ax2 = fig.subplots(1, 2)
    for name, rows in bands.items():
        if not rows:
            continue
        wl = [r["wavelength_nm"] for r in rows]
        ax1.plot(wl, [r["converted"] for r in rows], marker="o", ms=3, label=name)
        ax2.plot(wl, [r["leakage"] for r in rows], marker="o", ms=3, label=name)
    ax1.set(xlabel="wavelength (nm)", ylabel="converted / incident", title="conversion efficiency")
    ax2.set(xlabel="wavelength (nm)", ylabel="leakage / incident", title="unconverted leakage")
    for ax in (ax1, ax2):
        ax.grid(alpha=0.3)
    ax1.legend(fontsize=7)
    fig.tight_layout()
    return _render(fig)


@_styled
def _plot_bars(rows) -> bytes:
    fig = _fig(9.0, 3.4)
    axes = fig.subplots(1, 4)
    names = [r["library"] for r in rows]
    x = np.arange(len(rows))
    panels = (("designed_spot_efficiency", "designed spot / incident"), ("purity", "OAM purity"),
              ("worst_rule_relative_margin", "worst rule margin (relative)"), ("oas_bytes", "OASIS file (MB)"))
    for ax, (key, label) in zip(axes, panels):
        vals = [r.get(key) for r in rows]
        if key == "oas_bytes" and all(v is None for v in vals):
            key, label = "gds_bytes", "GDSII file (MB)"
            vals = [r.get(key) for r in rows]
        v = np.array([np.nan if a is None else float(a) for a in vals])
        if key.endswith("bytes"):
            v = v / 1e6
        ax.bar(x, np.nan_to_num(v), color="#3b6e8f")
        ax.set_xticks(x, names, rotation=30, ha="right", fontsize=7)
        ax.set_title(label, fontsize=8)
        ax.grid(axis="y", alpha=0.3)
    fig.tight_layout()
    return _render(fig)


@_styled
def _plot_hist(samples, nominal) -> bytes:
    keys = [k for k in ("designed_spot_efficiency", "designed_mode_efficiency", "purity", "worst_isolation_db",
                        "strehl", "spot_fwhm_um") if any(s.get(k) is not None for s in samples)]
    fig = _fig(3.2 * max(1, len(keys)), 3.2)
    axes = np.atleast_1d(fig.subplots(1, max(1, len(keys))))
    for ax, key in zip(axes, keys):
        v = np.array([s[key] for s in samples if s.get(key) is not None], float)
        ax.hist(v, bins=min(40, max(5, v.size // 5)), color="#3b6e8f")
        if nominal.get(key) is not None:
            ax.axvline(nominal[key], color="#d9822b", label="nominal")
        for q in np.percentile(v, [5, 50, 95]):
            ax.axvline(q, color="k", ls=":", lw=0.8)
        unit = "dB" if key.endswith("_db") else "um" if key.endswith("_um") else "fraction"
        ax.set(title=key.replace("_", " "), xlabel=unit, ylabel="samples")
        ax.legend(fontsize=7)
    fig.tight_layout()
    return _render(fig)


@_styled
def _plot_sweep(thresholds) -> bytes:
    fig = _fig(3.4 * len(thresholds), 3.2)
    axes = np.atleast_1d(fig.subplots(1, len(thresholds)))
    for ax, (kind, t) in zip(axes, thresholds.items()):
        m = [r["magnitude"] for r in t["sweep"]]
        ax.plot(m, [r["purity_median"] for r in t["sweep"]], marker="o", ms=3, label="median")
        ax.plot(m, [r["purity_p5"] for r in t["sweep"]], marker="s", ms=3, label="5th percentile")
        ax.axhline(t["threshold"], color="#d9822b", ls="--", label="threshold")
        if t["tolerance"] is not None:
            ax.axvline(t["tolerance"], color="k", ls=":", lw=0.8)
        ax.set(xlabel=f"{kind} {t['unit']}", ylabel="OAM purity", title=kind)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7)
    fig.tight_layout()
    return _render(fig)

