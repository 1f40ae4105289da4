"""Optical check of a spin-decoupled mask: each input spin's converted field, from the written mask, on its own.

A spin-decoupled design (``[[phase_spin_plus]]``, ``[[phase_spin_minus]]``) writes one element per site whose
converted light carries ``phi_+`` for input spin +1 and ``phi_-`` for input spin -1 (:mod:`metalay.cells.decoupled`).
The check reads and decodes the written mask once (cell and rotation per site, as :mod:`metalay.checks.optics`
does), then for each input spin ``sigma`` evaluates the elements with the library's responses for input
``|sigma>`` (:func:`metalay.checks.optics.evaluate_elements`): converted and leaked power, far field, the OAM
spectrum and purity about the spin's own axis and charge, the charge read from a simulated interferogram, the focal
spot of a lens term, and the figures of the report, all against that spin's own target. Then the crosstalk between
the two targets:

* target overlap ``F(sigma -> tau) = |sum_s E_sigma(s) exp(-i phi_tau(s))|^2 / (S sum_s |E_sigma(s)|^2)`` over the S
  written elements, ``E_sigma`` the converted field of input spin ``sigma``: 1 when spin sigma's converted light is
  exactly its target, and the share a detector matched to target tau would see. The isolation of spin ``sigma`` is
  ``10 log10(F(sigma -> sigma) / F(sigma -> -sigma))`` dB, reported beside the same figure for the ideal targets
  (``E_sigma = exp(i phi_sigma)`` on the same sites), which is what the two targets themselves allow;
* for two single-axis vortex targets also the OAM weight of each spin's converted beam at the other spin's charge.

References
----------
Mueller, Rubin, Devlin, Groever, Capasso 2017, Phys. Rev. Lett. 118, 113901; Devlin, Ambrosio, Rubin, Mueller,
Capasso 2017, Science 358, 896 (independent phase per spin). Goodman 2005, Introduction to Fourier Optics (mode
overlap of a field with a target field).
"""

from __future__ import annotations

import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from metalay.checks import optics
from metalay.errors import MetalayError

__all__ = ["spin_view", "target_overlaps", "spin_verdicts", "check_spin_optics", "compile_spin_check", "SPIN_LABELS"]

#: Label of each input spin in file names, figure keys and the report.
SPIN_LABELS = {1: "spin_plus", -1: "spin_minus"}


def spin_view(design, sigma: int, terms):
    """The design as seen by one input spin: its phase terms and spin, as a single-target design.

    The view is what the single-spin optical check expects (``design.terms``, ``design.sigma``); it is never
    compiled.
    """
    return replace(design, terms=tuple(terms), sigma=int(sigma), spin_terms=())


def target_overlaps(converted: dict, x_um, y_um, spin_targets, wavelength_nm: float) -> dict:
    """Overlap of each spin's converted field with each spin's target, and the isolation it gives.

    Parameters
    ----------
    converted : dict sigma -> ndarray (S,) complex
        Converted field of input spin ``sigma`` at each written element.
    x_um, y_um : ndarray (S,)
        Element positions in the leaving light's frame (lattice sites).
    spin_targets : sequence of (sigma, terms)
        The design's targets (:meth:`metalay.design.spec.Design.spin_targets`).
    wavelength_nm : float

    Returns
    -------
    dict
        ``spins`` (order), ``overlap`` and ``ideal_overlap`` (``[input][target]``), ``isolation_db`` and
        ``ideal_isolation_db`` per input spin (``"+1"``, ``"-1"``), ``worst_isolation_db``, ``method``.

    Notes
    -----
    ``F(sigma -> tau) = |sum E_sigma exp(-i phi_tau)|^2 / (S sum |E_sigma|^2)``; by the Cauchy-Schwarz inequality
    ``0 <= F <= 1`` with 1 only for ``E_sigma`` proportional to ``exp(i phi_tau)``.
    """
    from metalay.design.phase import target_phase

    spins = [int(s) for s, _ in spin_targets]
    phases = {s: target_phase(terms, x_um, y_um, wavelength_nm=wavelength_nm, sigma=s) for s, terms in spin_targets}
    n = max(1, int(np.asarray(x_um).size))

    def overlap(field, tau):
        e = np.asarray(field, dtype=np.complex128)
        den = n * float(np.sum(np.abs(e) ** 2))
        return float(abs(np.sum(e * np.exp(-1j * phases[tau]))) ** 2 / den) if den > 0 else 0.0

    measured = [[overlap(converted[s], t) for t in spins] for s in spins]
    ideal = [[overlap(np.exp(1j * phases[s]), t) for t in spins] for s in spins]

    def iso(m):
        out = {}
        for a, s in enumerate(spins):
            own, other = m[a][a], max(m[a][b] for b in range(len(spins)) if b != a)
            out[f"{s:+d}"] = float(10 * np.log10(max(own, 1e-300) / max(other, 1e-300)))
        return out

    iso_m, iso_i = iso(measured), iso(ideal)
    return {"spins": spins, "overlap": measured, "ideal_overlap": ideal, "isolation_db": iso_m,
            "ideal_isolation_db": iso_i, "worst_isolation_db": min(iso_m.values()),
            "method": ("F(sigma -> tau) = |sum_s E_sigma exp(-i phi_tau)|^2 / (S sum_s |E_sigma|^2) over the S written "
                       "elements (E_sigma: converted field of input spin sigma, from the library's responses and the "
                       "decoded rotation); isolation = 10 log10(F(sigma -> sigma) / F(sigma -> other)); ideal: the "
                       "targets exp(i phi_sigma) themselves on the same sites")}


def _one_spin(dec0, design, sigma: int, terms, opt, timings: dict):
    """Figures, images and notes of one input spin (the single-spin check on its view of the design)."""
    view = spin_view(design, sigma, terms)
    target = optics.target_from_design(view, wavelength_nm=opt.wavelength_nm)
    dec = replace(dec0, design=view, target=target)
    notes: list = []
    ev = optics._evaluate(dec, opt, notes, timings)
    figures, fringe = optics._figures(dec, ev, opt, notes, timings)
    images = optics._images(dec, ev, figures, fringe, opt) if opt.make_plots else {}
    return dec, ev, figures, images, notes


def _spin_images(images: dict, sigma: int) -> dict:
    """Image names of one spin: ``a1_spin_plus_target_phase`` (spin +1 first in the report)."""
    lead = "a" if sigma == 1 else "b"
    return {f"{lead}{name.split('_', 1)[0]}_{SPIN_LABELS[sigma]}_{name.split('_', 1)[1]}":
            (f"input spin {sigma:+d}: {caption}", png) for name, (caption, png) in images.items()}


def _crosstalk_image(overlaps: dict) -> bytes:
    """Bar chart: each input spin's overlap with each target (log scale), measured and ideal."""
    from metalay.checks import plots

    fig = plots.new_figure(5.6, 3.6)
    ax = fig.add_subplot()
    spins = overlaps["spins"]
    labels, measured, ideal = [], [], []
    for a, s in enumerate(spins):
        for b, t in enumerate(spins):
            labels.append(f"in {s:+d}\nto target {t:+d}")
            measured.append(max(overlaps["overlap"][a][b], 1e-12))
            ideal.append(max(overlaps["ideal_overlap"][a][b], 1e-12))
    x = np.arange(len(labels))
    ax.bar(x - 0.2, measured, width=0.4, color=plots.BAR_COLOUR, label="written mask")
    ax.bar(x + 0.2, ideal, width=0.4, color=plots.HIGHLIGHT_COLOUR, label="ideal targets")
    ax.set_xticks(x, labels, fontsize=8)
    ax.set_yscale("log")
    ax.set_ylim(1e-8, 1.5)
    ax.set_ylabel("target overlap F")
    ax.set_title("each spin's converted light against each target")
    ax.legend(fontsize=8)
    fig.subplots_adjust(bottom=0.2, left=0.13, right=0.97)
    return plots.png_bytes(fig)


def _oam_cross(figures: dict) -> None:
    """For two single-axis vortex targets: each spin's OAM weight at the other spin's charge."""
    spins = figures["spins"]
    if not all("oam" in spins[k] for k in ("+1", "-1")):
        return
    for own, other in (("+1", "-1"), ("-1", "+1")):
        o = spins[own]["oam"]
        l_other = spins[other]["oam"]["design_charge"]
        if l_other in o["charges"]:
            w = o["weights"][o["charges"].index(l_other)]
            o["weight_at_other_target"] = {"charge": l_other, "weight": w,
                                           "crosstalk_db": float(10 * np.log10(max(w, 1e-300)
                                                                               / max(o["purity"], 1e-300)))}


def check_spin_optics(mask_path, library, design, *, out_dir=None,
                      options: optics.OpticsOptions | None = None) -> optics.OpticsResult:
    """Check a spin-decoupled mask for both input spins (module docstring).

    Parameters
    ----------
    mask_path : str or Path
        GDSII or OASIS file written for ``design``.
    library : CellLibrary or str
        The spin-decoupled library (its responses at the check wavelength are used).
    design : Design
        The spin-decoupled design (``design.spin_decoupled``).
    out_dir : str or Path, optional
        Write ``optics.json``, the PNG figures of both spins and ``optics_report.html`` here.
    options : OpticsOptions
        As for :func:`metalay.checks.optics.check_optics`; the input polarisation is each spin in turn.

    Returns
    -------
    OpticsResult
        ``figures["spins"]["+1"]`` and ``["-1"]`` hold the single-spin figures, ``figures["target_crosstalk"]``
        the overlaps (:func:`target_overlaps`).
    """
    from metalay.cells.library import CellLibrary, load_library
    from metalay.util._memory import keep_freed_memory

    if not getattr(design, "spin_decoupled", False):
        raise MetalayError(f"{getattr(design, 'source_path', mask_path)}: not a spin-decoupled design (no "
                           "[[phase_spin_plus]] / [[phase_spin_minus]])")
    opt = replace(options or optics.OpticsOptions(), polarization="design")
    t_all = time.perf_counter()
    keep_freed_memory()
    timings, notes = {}, []
    mask_path = Path(mask_path)
    lib = library if isinstance(library, CellLibrary) else load_library(library)
    targets = design.spin_targets()
    first = spin_view(design, *targets[0])
    dec0 = optics._read_and_decode(mask_path, lib, first, None, opt, notes, timings)
    spins, images, converted = {}, {}, {}
    xs, ys = optics.site_xy(dec0.decoded)
    for sigma, terms in targets:  # the two input spins (a short axis)
        _, ev, figs, imgs, spin_notes = _one_spin(dec0, design, sigma, terms, opt, timings)
        spins[f"{sigma:+d}"] = figs
        images.update(_spin_images(imgs, sigma))
        notes.extend(f"input spin {sigma:+d}: {n}" for n in spin_notes)
        converted[sigma] = ev.fields.converted
        del ev  # one spin's near and far fields at a time (the memory admission counts one evaluation)
    figures = {"spin_decoupled": True, "spins": spins,
               "target_crosstalk": target_overlaps(converted, xs, ys, targets, dec0.target.wavelength_nm)}
    _oam_cross(figures)
    if opt.make_plots:
        images["c9_target_crosstalk"] = ("target overlap of each input spin's converted light with each spin's "
                                         "target, written mask against ideal targets", _crosstalk_image(
                                             figures["target_crosstalk"]))
    return _finish(mask_path, lib, design, dec0, opt, figures, images, notes, timings, t_all, out_dir)


def spin_verdicts(figures: dict, limits=None) -> dict:
    """Verdicts of both spins: each spin's figures judged as a single-spin check would judge them
    (:func:`metalay.checks.optics.optics_verdicts`: converted efficiency, OAM purity, fringe charge, Strehl ratio)
    plus each spin's isolation from the other spin's target against ``worst_isolation_db``.

    Returns
    -------
    dict
        ``verdict`` (the worst item), ``items`` (each with ``spin``), ``summary``, ``by_spin`` (verdict per spin).
    """
    from metalay.design.limits import Limits, judge, worst_verdict

    limits = limits or Limits()
    items, by_spin = [], {}
    for key, figs in figures["spins"].items():  # the two input spins
        own = optics.optics_verdicts(figs, limits)["items"]
        iso = judge(figures["target_crosstalk"]["isolation_db"][key], limits.get("worst_isolation_db"))
        iso = {**iso, "what": "isolation of this spin's converted light from the other spin's target"}
        spin_items = [{**i, "spin": int(key), "text": f"spin {key}: {i['text']}"} for i in own + [iso]]
        by_spin[key] = worst_verdict(i["verdict"] for i in spin_items)
        items.extend(spin_items)
    return {"verdict": worst_verdict(i["verdict"] for i in items), "items": items, "by_spin": by_spin,
            "summary": "; ".join(i["text"] for i in items)}


def _finish(mask_path, lib, design, dec0, opt, figures, images, notes, timings, t_all, out_dir):
    """Inputs, report, files (the single-spin check's writer) and the result."""
    figures = optics.json_ready(figures)
    limits = opt.limits if opt.limits is not None else getattr(getattr(design, "checks", None), "limits", None)
    figures["verdicts"] = spin_verdicts(figures, limits)
    inputs = {"mask": {"path": mask_path.name, "sha256": optics._sha256(mask_path),
                       "bytes": mask_path.stat().st_size},
              "library": {"name": lib.name, "sha256": lib.sha256}, "design": design.name,
              "wavelength_nm": dec0.target.wavelength_nm, "polarization": "spin +1 and spin -1 in turn",
              "layer": list(dec0.layer), "bias_nm": dec0.bias_nm, "size_tol_nm": opt.size_tol_nm,
              "empty_t": str(opt.empty_t), "pad_factor": opt.pad_factor, "max_side": opt.max_side,
              "lit_from": dec0.facing.lit_from, "illumination": dec0.facing.describe(),
              "verdict": figures["verdicts"]["verdict"]}
    figures["inputs"] = optics.json_ready(inputs)
    html_text = None
    if opt.make_plots:
        from metalay.checks.report import render_html

        verdict = figures["verdicts"]
        html_text = render_html(title=(opt.title or f"Optical check of {mask_path.name} (both input spins)")
                                + f": verdict {verdict['verdict'].upper()}", caution=optics.SAFETY_NOTE,
                                inputs=inputs, figures={k: v for k, v in figures.items() if k != "inputs"},
                                images=images, notes=[f"verdict {verdict['verdict'].upper()}: {verdict['summary']}",
                                                      *notes])
    files = optics._write_outputs(Path(out_dir), figures, images, html_text) if out_dir is not None else {}
    timings["total_s"] = time.perf_counter() - t_all
    return optics.OpticsResult(figures=figures, images=images, html=html_text, files=files, timings=timings,
                               notes=tuple(notes))


def compile_spin_check(path, library, design) -> dict:
    """Hook for ``metalay compile`` of a spin-decoupled design: both spins, written to ``<mask folder>/optics``.

    Returns
    -------
    dict
        ``status`` and ``verdict`` (the worst verdict of :func:`spin_verdicts`), ``verdict_items``,
        ``verdict_summary``, ``summary`` (one part per spin), ``figures``, ``files`` (relative to the mask folder),
        ``notes``, ``timings_s``.
    """
    import os

    out_dir = Path(path).parent / "optics"
    res = check_spin_optics(path, library, design, out_dir=out_dir,
                            options=optics.OpticsOptions(max_side=1024, pad_factor=2.0, workers=2))
    f = res.figures
    parts = []
    for key, figs in f["spins"].items():
        bits = [f"converted {figs['power_budget']['converted']:.3f}"]
        if "oam" in figs:
            bits.append(f"OAM purity l={figs['oam']['design_charge']}: {figs['oam']['purity']:.4f}")
        if "lens" in figs and figs["lens"]["strehl"] is not None:
            bits.append(f"Strehl {figs['lens']['strehl']:.3f}")
        iso = f["target_crosstalk"]["isolation_db"][key]
        bits.append(f"isolation from the other target {iso:.1f} dB (ideal targets "
                    f"{f['target_crosstalk']['ideal_isolation_db'][key]:.1f} dB)")
        parts.append(f"spin {key}: " + ", ".join(bits))
    files = {k: {"path": os.path.relpath(v["path"], Path(path).parent), "sha256": v["sha256"], "bytes": v["bytes"]}
             for k, v in res.files.items()}
    v = f["verdicts"]
    return {"status": v["verdict"], "verdict": v["verdict"], "verdict_items": v["items"],
            "verdict_summary": v["summary"], "summary": "; ".join(parts), "figures": f, "files": files,
            "notes": list(res.notes), "timings_s": res.timings}
