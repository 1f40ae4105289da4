"""The optical check of a log-polar mode sorter made of written masks: elements decoded from the mask files, the
two- (or four-) element propagation of :func:`metalay.measure.sorter.sorter_check`, a verdict from thresholds and a
report (JSON, PNG, HTML with the safety caution).

A sorter is a set of design files, one per element, each with a ``[[phase]]`` table of kind ``mode_sorter``
carrying the same set-up keys and its own ``element`` number (:mod:`metalay.design.logpolar`).  Each element is
compiled on its own (``metalay.api.compile_design``: its own mask file, design rules and manifest; two files rather
than two regions of one mask, because the elements sit in different planes ``f`` apart).  The check then reads the
written masks back:

1. every structure polygon is decoded to a lattice site, cell and rotation (:func:`metalay.checks.decode.decode_sites`,
   the same decoder as ``metalay optics``);
2. the cell responses of the library at the design wavelength give each site's converted (cross-polarised) field
   ``((t_long - t_short) / 2) exp(2 i s theta)`` for input of the spin ``s`` that reaches it
   (:func:`metalay.checks.optics.site_fields`); placed on the lattice grid (:func:`metalay.checks.optics.rasterize`),
   this is the element's screen, 0 outside the written elements;
3. OAM beams are propagated through the screens and a bulk Fourier lens (:func:`metalay.measure.sorter.sorter_check`).

Model and its limits (stated in every report): scalar propagation of the converted component only (the
co-polarised leakage of each element is assumed removed by a circular analyser, as usual behind a geometric-phase
element); element 1 illuminated in its design spin and each later element in the spin the one before sends
(opposite: a geometric-phase element converts ``|s>`` into ``|-s>``), so element 2 must be written for the
opposite input spin of element 1 (or a half-wave plate put between them: ``wave_plates=True``); a unit cell
transmits its response uniformly over its area (local periodic approximation); every element centred on the
common axis and seen as in the mask's top view, light travelling along +z of that view (through the substrate
first).  An element mounted the other way round (light onto the patterned face) is mirrored in its own frame,
theta -> -theta and y -> -y, so it applies ``-phi(x, -y)``; both sorter phases are even in y, so that is ``-phi``:
like the wrong spin, the sorter no longer sorts (unlike a vortex plate, whose charge survives the flip).

References
----------
Berkhout, Lavery, Courtial, Beijersbergen & Padgett 2010, Phys. Rev. Lett. 105, 153601 (the sorter, the linear
spot relation ``t = lambda F l / (2 pi a)``).
O'Sullivan, Mirhosseini, Malik & Boyd 2012, Opt. Express 20, 24444 (fan-out copies).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.design.logpolar import SorterDesign, SorterElement
from metalay.errors import DesignError, MetalayError
from metalay.measure.sorter import ElementScreen, SorterCheck, sorter_check, window_fraction_sinc2

__all__ = ["SorterThresholds", "SorterReport", "sorter_setup", "written_element", "arriving_spins", "check_sorter",
           "write_sorter_report", "SORTER_SAFETY_NOTE"]

#: The caution every sorter report and command carries.
SORTER_SAFETY_NOTE = (
    "This is a design aid. Verify every mask with full-wave simulation and with your facility's process rules "
    "before fabrication; making the elements involves lithography, etching and hazardous chemicals (resists, "
    "developers, solvents, hydrofluoric acid): follow your site's chemical-safety rules. Testing a sorter needs "
    "lasers: follow your site's laser-safety rules (laser class, eyewear, interlocks, beam enclosures) and your "
    "local codes.")


@dataclass(frozen=True)
class SorterThresholds:
    """Pass/fail limits of the sorter check (units in the names).

    Attributes
    ----------
    max_slope_error_pct : float
        Largest ``|slope / (lambda F / (2 pi a)) - 1|`` in percent (default 2 %; measured on the ideal 1550 nm
        example: 0.23 %).
    max_position_error_spacings : float
        Largest distance of a spot from ``l lambda F / (2 pi a)``, in spacings (default 0.1).
    min_own_window : float
        Smallest fraction of each charge's detected power inside its own window (default 0.5; a uniform strip
        puts 0.79 of the power of the C windows into its own, Goodman 2005, sec. 4.4.1).
    """

    max_slope_error_pct: float = 2.0
    max_position_error_spacings: float = 0.1
    min_own_window: float = 0.5


@dataclass(frozen=True, eq=False)
class SorterReport:
    """Result of :func:`check_sorter`.

    Attributes
    ----------
    setup : SorterDesign
    check : SorterCheck
    figures : dict
        JSON-ready numbers (what ``sorter.json`` holds).
    status : {"pass", "fail"}
        From :class:`SorterThresholds`.
    failed : tuple of str
        One line per failed threshold.
    notes : tuple of str
        Model, sampling and set-up notes.
    elements_from : {"written masks", "ideal phase"}
    images : dict name -> (caption, png bytes)
    """

    setup: SorterDesign
    check: SorterCheck
    figures: dict
    status: str
    failed: tuple
    notes: tuple
    elements_from: str
    images: dict


def _sorter_term(design) -> SorterElement:
    terms = [t for t in design.terms if isinstance(t, SorterElement)]
    if len(terms) != 1:
        raise DesignError(f"{design.source_path}: a sorter element needs exactly one [[phase]] table of kind "
                          f"'mode_sorter' (found {len(terms)})")
    return terms[0]


def sorter_setup(designs) -> SorterDesign:
    """The sorter the element designs make up; refuses a set that is not elements 1..N of one sorter, in order.

    Parameters
    ----------
    designs : sequence of Design
        One validated design per element, in the order the light meets them.

    Returns
    -------
    SorterDesign

    Raises
    ------
    DesignError
        One line naming the file and what differs.
    """
    designs = list(designs)
    if not designs:
        raise DesignError("sorter: give the element design files (2, or 4 with n_copies > 1)")
    first = _sorter_term(designs[0])
    n = len(first.setup.element_terms())
    if len(designs) != n:
        raise DesignError(f"sorter: {len(designs)} element files given; this sorter (n_copies = "
                          f"{first.setup.n_copies}) has {n} elements, give them in order 1..{n}")
    for k, d in enumerate(designs, start=1):
        term = _sorter_term(d)
        if term.element != k:
            raise DesignError(f"{d.source_path}: mode_sorter element = {term.element}, but it is file {k} of the "
                              f"set; give the element files in order 1..{n}")
        if term.setup != first.setup:
            raise DesignError(f"{d.source_path}: its mode_sorter set-up keys differ from those of "
                              f"{designs[0].source_path}; every element of one sorter needs the same values")
    return first.setup


def _phase_error_deg(field: np.ndarray, phi_t: np.ndarray) -> dict:
    """RMS and worst error (degrees) of the converted field's phase against the target, global offset removed."""
    ok = np.abs(field) > 0
    if not ok.any():
        return {"rms": None, "max": None}
    err = np.angle(field[ok].astype(np.complex128) * np.exp(-1j * phi_t[ok]))
    g = np.angle(np.sum(np.exp(1j * err)))
    e = np.angle(np.exp(1j * (err - g)))
    return {"rms": float(np.degrees(np.sqrt(np.mean(e * e)))), "max": float(np.degrees(np.max(np.abs(e))))}


def written_element(mask_path, design, *, library=None, size_tol_nm: float = 3.0,
                    arriving_spin: int | None = None) -> tuple[ElementScreen, dict]:
    """Decode one written sorter element into its screen (converted field on the lattice grid).

    Parameters
    ----------
    mask_path : str or Path
        GDSII or OASIS file compiled from ``design``.
    design : Design
        The element's design (lattice, aperture, input spin, structure layer, bias, library).
    library : CellLibrary or str, optional
        Default: the design's library.
    size_tol_nm : float
        Size tolerance for matching library cells (:func:`metalay.checks.decode.decode_sites`).
    arriving_spin : {+1, -1}, optional
        Spin of the light that reaches the element (default: its design spin).  The screen is the converted field
        for that input, ``conv exp(2 i s theta)``: an element written for the other spin applies ``-phi``.

    Returns
    -------
    (ElementScreen, dict)
        The screen and its figures: sites, decode statistics, mean converted power per element, written phase
        error against the design phase at the decoded sites (for the design spin), mask name and SHA-256.
    """
    from metalay.cells.library import CellLibrary, load_library
    from metalay.checks.decode import decode_sites
    from metalay.checks.optics import beam_frame_sites, facing_of, ideal_responses, input_jones, rasterize, site_fields
    from metalay.design.lattice import sample_sites
    from metalay.design.phase import target_phase
    from metalay.io.gdsread import read_mask

    mask_path = Path(mask_path)
    if not mask_path.is_file():
        raise MetalayError(f"{mask_path}: mask file not found")
    if design.mask.tone != "structures":
        raise MetalayError(f"{mask_path}: mask.tone = {design.mask.tone!r}; the sorter check reads structure "
                           "polygons and supports tone 'structures' only")
    lib = library if isinstance(library, CellLibrary) else load_library(library or design.library)
    layer = design.mask.layer("structures")
    flat = read_mask(mask_path, layers=[tuple(layer)])
    decoded = decode_sites(flat, lib.cells, period_nm=design.lattice.period_nm, lattice=design.lattice.kind,
                           layer=tuple(layer), size_tol_nm=size_tol_nm, bias_nm=design.mask.bias_nm,
                           unmatched="error", where=str(mask_path))
    facing = facing_of(design, lib, where=str(mask_path))
    decoded = beam_frame_sites(decoded, facing)  # the frame of the light leaving the element (design.side)
    if lib.has_responses:
        t_long, t_short = lib.response_at(design.wavelength_nm)
        responses = f"library {lib.name} at {design.wavelength_nm:g} nm"
    else:
        t_long, t_short = ideal_responses(len(lib.cells))
        responses = f"library {lib.name} has no responses: ideal half-wave cells"
    spin = int(design.sigma if arriving_spin is None else arriving_spin)
    if spin not in (1, -1):
        raise MetalayError(f"arriving_spin = {arriving_spin!r}; allowed 1, -1")
    tl, ts = t_long[decoded.cell], t_short[decoded.cell]
    jin = input_jones("design", design_sigma=spin)
    sf = site_fields(tl, ts, decoded.rotation_rad, jin, sigma=spin)
    s = sample_sites(design.aperture, design.lattice)
    near = rasterize(decoded, sf, jones_in=jin, expected_ij=(s.i, -s.j if facing.mirror_y else s.j))
    phi_t = target_phase(design.terms, decoded.x_um, decoded.y_um, wavelength_nm=design.wavelength_nm,
                         sigma=design.sigma)
    as_designed = sf if spin == design.sigma else site_fields(
        tl, ts, decoded.rotation_rad, input_jones("design", design_sigma=design.sigma), sigma=design.sigma)
    info = {"design": design.name, "mask": mask_path.name,
            "mask_sha256": hashlib.sha256(mask_path.read_bytes()).hexdigest(), "input_spin": int(design.sigma),
            "arriving_spin": spin, "illumination": facing.as_dict(),
            "sites": int(len(decoded)), "aperture_sites": int(len(s)),
            "decode": {k: decoded.stats[k] for k in ("polygons", "unmatched", "off_lattice", "duplicates")},
            "converted_power_per_element": float(np.mean(np.abs(sf.converted.astype(np.complex128)) ** 2)),
            "written_phase_error_deg": _phase_error_deg(as_designed.converted, phi_t), "responses": responses}
    screen = ElementScreen(near.converted, near.x_um, near.y_um,
                           source=f"{mask_path.name} ({len(decoded):,} decoded elements, {responses})")
    return screen, info


def arriving_spins(designs, *, wave_plates: bool = False) -> tuple[list, list]:
    """Spin of the light reaching each element, and notes.

    Element 1 receives its design spin; each element converts ``|s>`` into ``|-s>`` (geometric phase), so element
    ``k + 1`` receives the opposite of what reached element ``k``.  With ``wave_plates`` a half-wave plate is
    assumed wherever an element is written for the other spin (each element then receives its design spin).
    """
    spins, notes = [int(designs[0].sigma)], []
    for k in range(1, len(designs)):
        s = -spins[-1]
        if designs[k].sigma != s:
            if wave_plates:
                notes.append(f"element {k + 1} is written for spin {designs[k].sigma:+d} but element {k} sends spin "
                             f"{s:+d}: a half-wave plate between them is assumed (wave plates on)")
                s = int(designs[k].sigma)
            else:
                notes.append(f"element {k + 1} is written for spin {designs[k].sigma:+d} but receives spin {s:+d} "
                             f"from element {k}: it applies the opposite of its phase (write it for input_spin = "
                             f"{s:+d}, or put a half-wave plate between them and check with wave plates on)")
        spins.append(s)
    return spins, notes


def _setup_figures(setup: SorterDesign) -> dict:
    return {"wavelength_nm": setup.wavelength_nm, "a_um": setup.a_um, "b_um": setup.b_um,
            "element_spacing_f_mm": setup.focal_length_mm, "fourier_focal_length_F_mm": setup.fourier_focal_length_mm,
            "n_copies": setup.n_copies, "copier_focal_length_mm": setup.copier_focal_length_mm,
            "input_diameter_um": 2 * setup.input_outer_radius_um,
            "inner_diameter_um": 2 * setup.input_inner_radius_um, "corrector_waves": setup.corrector_waves,
            "spot_spacing_um": setup.spot_spacing_um, "spot_sign": setup.spot_sign,
            "strip_x2_um": list(setup.strip_x2_um), "max_local_frequency_per_um": setup.max_local_frequency_per_um()}


def _verdict(chk: SorterCheck, setup: SorterDesign, th: SorterThresholds) -> tuple[dict, list]:
    """Figures of merit and the failed thresholds (each with its unit)."""
    s = setup.spot_spacing_um
    pos_err = np.abs(chk.positions_um - chk.predicted_um) / s
    slope_err = 100.0 * (chk.slope_um / chk.predicted_slope_um - 1.0) if chk.charges.size > 1 else float("nan")
    own = chk.diagonal
    off = np.where(np.eye(own.size, dtype=bool), 0.0, chk.crosstalk)
    failed = []
    if not abs(slope_err) <= th.max_slope_error_pct:
        failed.append(f"spacing per unit charge {chk.slope_um:.4f} um is {slope_err:+.3f} % from lambda F / (2 pi a) "
                      f"= {chk.predicted_slope_um:.4f} um (allowed +-{th.max_slope_error_pct:g} %)")
    if not pos_err.max() <= th.max_position_error_spacings:
        k = int(np.argmax(pos_err))
        failed.append(f"spot of l = {int(chk.charges[k])} is {pos_err[k]:.3f} spacings from its predicted position "
                      f"(allowed {th.max_position_error_spacings:g})")
    if not own.min() >= th.min_own_window:
        k = int(np.argmin(own))
        failed.append(f"l = {int(chk.charges[k])} keeps {own[k]:.3f} of its detected power in its own window "
                      f"(allowed >= {th.min_own_window:g})")
    figs = {"charges": chk.charges.tolist(), "positions_um": chk.positions_um.tolist(),
            "predicted_um": chk.predicted_um.tolist(), "position_error_spacings": pos_err.tolist(),
            "slope_um_per_charge": chk.slope_um, "predicted_slope_um_per_charge": chk.predicted_slope_um,
            "slope_error_pct": slope_err, "intercept_um": chk.intercept_um,
            "own_window_fraction": own.tolist(), "largest_leakage_to_another_window": float(off.max(initial=0.0)),
            "crosstalk_row_normalised": chk.crosstalk.tolist(), "window_power_of_input": chk.window_power.tolist(),
            "detected_fraction_of_input": chk.detected.tolist(),
            "reference_uniform_strip_own_window": window_fraction_sinc2(0.5 * setup.n_copies),
            "window_half_height_um": chk.window_half_height_um, "sample_um": chk.sample_um,
            "grid_side": chk.grid_side}
    return figs, failed


def check_sorter(designs, masks=None, *, libraries=None, charges=range(-5, 6), beam: str = "ring",
                 thresholds: SorterThresholds = SorterThresholds(), max_side: int = 4096, pad_factor: float = 2.0,
                 size_tol_nm: float = 3.0, wave_plates: bool = False, workers: int = 2,
                 make_plots: bool = True) -> SorterReport:
    """Check a sorter from its written masks (or, with ``masks=None``, from the ideal phase elements).

    Parameters
    ----------
    designs : sequence of Design
        The element designs, in order (:func:`sorter_setup` validates the set).
    masks : sequence of path, optional
        The written mask of each element (GDSII or OASIS), same order.  None: the ideal phase elements of
        :func:`metalay.measure.sorter.sorter_check` (no lattice, no cell responses; the report says so).
    libraries : sequence, optional
        Cell library per element (default: each design's).
    charges : iterable of int
        Input charges (at most 41 of them, ``|l| <= 50``).
    beam : {"ring", "lg"}
        Input beam (see :func:`metalay.measure.sorter.sorter_check`).
    thresholds : SorterThresholds
    max_side, pad_factor, workers
        Grid limit, angular-spectrum padding and FFT threads.
    size_tol_nm : float
        Cell matching tolerance of the decoder.
    wave_plates : bool
        Assume a half-wave plate wherever an element is written for the spin the previous one does not send
        (:func:`arriving_spins`); default off: the light keeps the spin the elements give it.
    make_plots : bool
        Render the PNG figure.

    Returns
    -------
    SorterReport
    """
    designs = list(designs)
    setup = sorter_setup(designs)
    charges = [int(c) for c in charges]
    if not charges or len(charges) > 41 or len(set(charges)) != len(charges) or max(map(abs, charges)) > 50:
        raise MetalayError(f"sorter check: charges {charges}; allowed 1 to 41 distinct integers with |l| <= 50")
    notes = [f"model: scalar angular-spectrum propagation over f = {setup.focal_length_mm:g} mm"
             + (f" and f_c = {setup.copier_focal_length_mm:g} mm" if setup.n_copies > 1 else "")
             + f"; an ideal bulk Fourier lens F = {setup.fourier_focal_length_mm:.4g} mm after the last element",
             "every element centred on the common axis, light along +z of the mask's top view (through the "
             "substrate first); an element mounted patterned face first applies -phi and breaks the sorter"]
    elements = None
    infos = []
    if masks is None:
        elements_from = "ideal phase"
        notes.append("elements from the ideal phase (continuous, unit amplitude): NOT from written masks")
    else:
        masks = list(masks)
        if len(masks) != len(designs):
            raise MetalayError(f"sorter check: {len(masks)} masks for {len(designs)} element designs; give one "
                               "mask per element, in order")
        libs = list(libraries) if libraries is not None else [None] * len(designs)
        spins, spin_notes = arriving_spins(designs, wave_plates=wave_plates)
        elements = []
        for mask, design, lib, spin in zip(masks, designs, libs, spins):  # 2 or 4 elements
            screen, info = written_element(mask, design, library=lib, size_tol_nm=size_tol_nm, arriving_spin=spin)
            elements.append(screen)
            infos.append(info)
        elements_from = "written masks"
        notes.append("elements decoded from the written masks: converted (cross-polarised) field of each cell, "
                     "co-polarised leakage assumed removed by a circular analyser after each element")
        notes.extend(spin_notes)
    chk = sorter_check(setup, charges, beam=beam, pad_factor=pad_factor, max_side=max_side, workers=workers,
                       elements=elements)
    notes.extend(chk.notes)
    figs, failed = _verdict(chk, setup, thresholds)
    figures = {"elements_from": elements_from, "setup": _setup_figures(setup), "elements": infos,
               "beam": beam, **figs,
               "verdict": {"status": "pass" if not failed else "fail", "failed": failed,
                           "thresholds": {"max_slope_error_pct": thresholds.max_slope_error_pct,
                                          "max_position_error_spacings": thresholds.max_position_error_spacings,
                                          "min_own_window": thresholds.min_own_window}}}
    from metalay.checks.optics import json_ready

    figures = json_ready(figures)
    images = {"1_sorter": ("detector profiles, spot positions against l lambda F / (2 pi a), crosstalk "
                           "(row-normalised)", _sorter_png(chk, setup, elements_from))} if make_plots else {}
    return SorterReport(setup, chk, figures, "pass" if not failed else "fail", tuple(failed), tuple(notes),
                        elements_from, images)


def _sorter_png(chk: SorterCheck, setup: SorterDesign, elements_from: str) -> bytes:
    """Three panels: detector profiles with the windows, positions against the linear relation, crosstalk."""
    from metalay.checks.plots import new_figure, png_bytes, styled

    @styled
    def draw() -> bytes:
        fig = new_figure(13.5, 4.2)
        ax1, ax2, ax3 = fig.subplots(1, 3)
        s = setup.spot_spacing_um
        for k, lc in enumerate(chk.charges):  # one line per input charge (short axis)
            ax1.plot(chk.profile_ty_um, chk.profiles[k], lw=1.0, label=f"l={int(lc)}")
        for c in chk.predicted_um:
            ax1.axvspan(c - s / 2, c + s / 2, color="0.85" if int(round(c / s)) % 2 else "0.93", lw=0, zorder=0)
        ax1.set_xlabel("detector y (um)")
        ax1.set_ylabel("power density (fraction of input per um)")
        ax1.set_title(f"detector plane (windows one spacing wide); {elements_from}")
        if chk.charges.size <= 11:
            ax1.legend(fontsize=7, ncol=2)
        lq = np.linspace(chk.charges.min(), chk.charges.max(), 2)
        ax2.plot(lq, chk.predicted_slope_um * lq, color="#d9822b", label="l lambda F / (2 pi a)")
        ax2.plot(chk.charges, chk.positions_um, "o", color="#3b6e8f", label="measured centroid")
        ax2.set_xlabel("input charge l")
        ax2.set_ylabel("spot position y (um)")
        ax2.set_title(f"slope {chk.slope_um:.3f} um vs {chk.predicted_slope_um:.3f} um per unit l")
        ax2.legend(fontsize=8)
        m = chk.crosstalk
        im = ax3.imshow(m, cmap="cividis", vmin=0.0, vmax=1.0)
        if m.shape[0] <= 11:
            for (r, c), val in np.ndenumerate(m):
                ax3.text(c, r, f"{val:.2f}", ha="center", va="center", fontsize=7,
                         color="white" if val < 0.5 else "black")
        labels = [str(int(q)) for q in chk.charges]
        ax3.set_xticks(range(len(labels)), labels)
        ax3.set_yticks(range(len(labels)), labels)
        ax3.set_xlabel("window of charge")
        ax3.set_ylabel("input charge")
        ax3.set_title("crosstalk (fraction of detected power)")
        fig.colorbar(im, ax=ax3)
        fig.tight_layout()
        return png_bytes(fig)

    return draw()


def write_sorter_report(report: SorterReport, out_dir, *, title: str | None = None) -> dict:
    """Write ``sorter.json``, ``sorter.png`` and ``sorter_report.html`` (atomic, same input same bytes).

    Returns
    -------
    dict
        File name -> ``{"path", "sha256", "bytes"}``.
    """
    from metalay.checks.report import render_html
    from metalay.util.atomic import atomic_write_bytes, ensure_dir

    out = ensure_dir(out_dir)
    figures = dict(report.figures, notes=list(report.notes), caution=SORTER_SAFETY_NOTE)
    files = {}

    def put(name: str, data: bytes):
        path = atomic_write_bytes(out / name, data)
        files[name] = {"path": str(path), "sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}

    put("sorter.json", (json.dumps(figures, sort_keys=True, indent=2, allow_nan=False) + "\n").encode())
    for name in sorted(report.images):
        put("sorter.png", report.images[name][1])
    inputs = {"elements_from": report.elements_from,
              "elements": [{k: e[k] for k in ("design", "mask", "mask_sha256", "input_spin", "arriving_spin")}
                           for e in report.figures["elements"]],
              "setup": report.figures["setup"], "beam": report.figures["beam"]}
    status = report.status.upper()
    html = render_html(title=title or f"Mode sorter check ({report.elements_from}): {status}",
                       caution=SORTER_SAFETY_NOTE, inputs=inputs,
                       figures={k: v for k, v in report.figures.items() if k not in ("setup", "elements")}
                       | {"elements": {str(i + 1): e for i, e in enumerate(report.figures["elements"])}},
                       images=report.images, notes=report.notes)
    put("sorter_report.html", html.encode("utf-8"))
    return files
