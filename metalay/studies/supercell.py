"""Which side, proved by the solver: a geometric-phase blazed grating as the compiler writes it, solved whole.

The mapping (:mod:`metalay.mask.compile` with :mod:`metalay.design.side`) and the optical check
(:mod:`metalay.checks.optics`) both rest on the local-periodic model: every written element answers like its
library cell, rotated. This study checks the side convention without that model. A blazed grating of ``N``
elements (a tilt whose carrier period is ``N`` lattice periods, written with ``N`` rotation levels, so the written
fins turn in steps of ``pi / N``) is compiled for the requested side; ``N`` consecutive written polygons of one row
are read back from the mask file and solved as one supercell by the RCWA solver
(:func:`metalay.cells.rcwa_nv.solve_polygon_cell`, normal-vector factorisation for their oblique edges). The solver
knows nothing of the mapping: it is given the polygons in the frame of the arriving light (the file's polygons for
light through the substrate; mirrored ``y -> -y`` for light onto the structures, reflection included) and the
stack in the order the light meets it. Per input spin the diffraction order carrying the power and its efficiency
are compared with the optical check's prediction from the written mask (the order of its brightest far-field
direction and its converted power, the local-periodic prediction).

The design tilts towards +x in the frame of the leaving light, whose x axis is the file's x axis for every side,
so the design spin must go to order ``m = +1`` and the other spin to ``m = -1`` (conjugate phase).

References
----------
Bomzon, Biener, Kleiner & Hasman 2002, Opt. Lett. 27, 1141 (space-variant subwavelength gratings: the converted
order of spin sigma carries 2 sigma theta; blazed geometric-phase gratings).
Hasman, Kleiner, Biener & Niv 2003, Appl. Phys. Lett. 82, 328 (opposite spins go to opposite orders / focus and
diverge).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.errors import StudyError

__all__ = ["SupercellCase", "SupercellRow", "CASES", "grating_design", "supercell_polygons", "solve_supercell",
           "check_prediction", "supercell_rows"]


@dataclass(frozen=True)
class SupercellCase:
    """One way of lighting a written grating: library, wavelength, period and side."""

    name: str
    library: str
    wavelength_nm: float
    period_nm: float
    lit_from: str


#: The three cases of the proof: transmission through the substrate, transmission onto the structures, reflection.
CASES = (SupercellCase("through substrate", "tio2-nanofin-532", 532.0, 325.0, "substrate"),
         SupercellCase("onto structures", "tio2-nanofin-532", 532.0, 325.0, "structures"),
         SupercellCase("reflection", "au-antenna-825-reflect", 825.0, 300.0, "structures"))


def grating_design(case: SupercellCase, *, n_elements: int = 8, width_um: float = 12.0, spin: int = 1):
    """The blazed grating design of ``case``: a tilt of carrier period ``N p`` towards +x, ``N`` rotation levels.

    Returns
    -------
    metalay.design.spec.Design
    """
    from metalay.design.spec import parse_design

    data = {"design": {"name": "supercell", "wavelength_nm": case.wavelength_nm, "input_spin": spin,
                       "library": case.library, "lit_from": case.lit_from},
            "phase": [{"kind": "tilt", "carrier_period_um": n_elements * case.period_nm / 1000.0,
                       "azimuth_deg": 0.0}],
            "aperture": {"shape": "square", "width_um": float(width_um)},
            "lattice": {"kind": "square", "period_nm": case.period_nm},
            "mask": {"formats": ["gds"], "label": False, "rotation_levels": int(n_elements)},
            "checks": {"rules": False, "optics": False}}
    return parse_design(data, where=f"supercell study ({case.name})")


def supercell_polygons(mask_path, *, period_nm: float, n_elements: int = 8, layer=(1, 0)) -> list[np.ndarray]:
    """``N`` consecutive written polygons of the row through the origin, starting at x = 0, as the file holds them.

    Returns
    -------
    list of ndarray (V, 2) float
        Vertices in nm, shifted so that the supercell ``[-N p / 2, N p / 2] x [-p / 2, p / 2]`` is centred on them.
    """
    from metalay.io.gdsread import read_mask

    flat = read_mask(mask_path, layers=[tuple(layer)])
    nm = flat.db_unit_nm
    polys = [flat.xy_db[flat.start[k]:flat.start[k + 1]].astype(np.float64) * nm for k in range(flat.count)]
    centre = np.array([p.mean(axis=0) for p in polys])
    x_sites = np.arange(n_elements) * period_nm
    picked = []
    for xs in x_sites:  # N elements (short axis)
        k = int(np.argmin(np.hypot(centre[:, 0] - xs, centre[:, 1])))
        if np.hypot(centre[k, 0] - xs, centre[k, 1]) > 0.25 * period_nm:
            raise StudyError(f"{mask_path}: no written element at ({xs:g}, 0) nm; the grating is too small")
        picked.append(polys[k])
    shift = np.array([(n_elements - 1) / 2 * period_nm, 0.0])
    return [p - shift for p in picked]


def _stack(case: SupercellCase, library):
    """(pattern layer materials, thickness, superstrate, substrate, layers before, layers after) in the order the
    arriving light meets them (the library lists them from its own incident side)."""
    from metalay.cells.materials import get_material
    from metalay.cells.rcwa import Layer

    wl = case.wavelength_nm

    def eps(name):
        return complex(get_material(name).epsilon(wl))

    layers = list(library.layers)
    inc, ext = library.incident_medium, library.exit_medium
    if library.mode == "transmission" and case.lit_from != library.side:
        layers, inc, ext = layers[::-1], ext, inc
    k = next(i for i, lay in enumerate(layers) if lay.get("patterned"))
    pat = layers[k]

    def uniform(lays):
        return tuple(Layer(float(lay["thickness_nm"]), np.atleast_1d(eps(lay["material"]))) for lay in lays)

    return (eps(pat["material"]), eps(pat.get("background", "air")), float(pat["thickness_nm"]), eps(inc), eps(ext),
            uniform(layers[:k]), uniform(layers[k + 1:]))


def solve_supercell(case: SupercellCase, polygons_nm, *, harmonics=(16, 2), n_elements: int = 8) -> dict:
    """Solve the written polygons as one supercell for light arriving as ``case`` says.

    Returns
    -------
    dict
        ``orders`` (m, n) and per spin (+1, -1) ``powers`` of every order (transmitted for transmission
        libraries, reflected for reflection ones), ``best_order`` and ``best_efficiency``; ``total``; ``harmonics``;
        ``factorization`` per layer.
    """
    from metalay.cells.library import load_library
    from metalay.cells.rcwa import order_powers
    from metalay.cells.rcwa_nv import solve_polygon_cell

    lib = load_library(case.library)
    e_in, e_bg, thick, e_sup, e_sub, before, after = _stack(case, lib)
    # the solver's frame is that of the arriving light: the file's frame through the substrate, mirrored otherwise
    mirror = case.lit_from == "structures"
    polys = [np.asarray(p, float) * (np.array([1.0, -1.0]) if mirror else 1.0) for p in polygons_nm]
    res = solve_polygon_cell(polys, e_in, e_bg, thick, case.wavelength_nm, period_x_nm=n_elements * case.period_nm,
                             period_y_nm=case.period_nm, eps_superstrate=e_sup, eps_substrate=e_sub,
                             layers_before=before, layers_after=after, harmonics=tuple(harmonics))
    m = np.asarray(res.order_fields["m"]).reshape(-1)
    n = np.asarray(res.order_fields["n"]).reshape(-1)
    side = "r" if lib.mode == "reflection" else "t"
    out = {"orders": list(zip(m.tolist(), n.tolist())), "harmonics": list(res.harmonics),
           "factorization": res.settings.get("factorization_per_layer")}
    for spin in (1, -1):
        pw = order_powers(res, np.array([1.0, 1j * spin]) / np.sqrt(2), side=side)[0]
        k = int(np.argmax(pw))
        out[spin] = {"powers": pw, "best_order": (int(m[k]), int(n[k])), "best_efficiency": float(pw[k]),
                     "total": float(pw.sum())}
    return out


def check_prediction(mask_path, design, *, spin: int, n_elements: int = 8) -> dict:
    """The optical check's prediction for input ``spin``: the order of its brightest far-field direction of the
    converted light, and its converted power (local-periodic model: the library cell at every element)."""
    from dataclasses import replace

    from metalay.checks.optics import OpticsOptions, OpticsTarget, check_optics

    target = OpticsTarget(wavelength_nm=design.wavelength_nm, sigma=int(spin), charge=None)
    res = check_optics(mask_path, design.library, design=replace(design, sigma=int(spin)), target=target,
                       options=OpticsOptions(make_plots=False, keep_arrays=True, pad_factor=4.0))
    ff = res.far
    r, c = np.unravel_index(np.argmax(ff.power), ff.power.shape)
    pitch_um = n_elements * design.lattice.period_nm * 1e-3
    order = int(np.rint(ff.u[c] * pitch_um / (design.wavelength_nm * 1e-3)))
    return {"order": order, "u": float(ff.u[c]), "v": float(ff.v[r]),
            "converted": float(res.figures["power_budget"]["converted"])}


def supercell_rows(out_dir, *, cases=CASES, harmonics=((16, 2),), n_elements: int = 8, width_um: float = 12.0):
    """Compile each case's grating, solve its written supercell at each truncation, and compare with the check.

    Returns
    -------
    list of :class:`SupercellRow`
    """
    from metalay.checks.steps import default_checks
    from metalay.mask.compile import compile_mask

    rows = []
    for case in cases:  # three cases (short axis)
        design = grating_design(case, n_elements=n_elements, width_um=width_um)
        res = compile_mask(design, Path(out_dir) / case.name.replace(" ", "-"), checks=default_checks(
            rules=False, optics=False), show_progress=False)
        polys = supercell_polygons(res.files["gds"], period_nm=case.period_nm, n_elements=n_elements)
        predicted = {s: check_prediction(res.files["gds"], design, spin=s, n_elements=n_elements) for s in (1, -1)}
        for h in harmonics:  # a few truncations
            sol = solve_supercell(case, polys, harmonics=h, n_elements=n_elements)
            for s in (1, -1):
                rows.append(SupercellRow(case.name, s, predicted[s]["order"], sol[s]["best_order"][0],
                                         sol[s]["best_order"][1], sol[s]["best_efficiency"], predicted[s]["converted"],
                                         tuple(sol["harmonics"]), sol[s]["total"]))
    return rows


@dataclass(frozen=True)
class SupercellRow:
    """One line of the proof's table (one case, spin and truncation)."""

    case: str
    spin: int
    predicted_order: int
    rcwa_order: int
    rcwa_order_y: int
    rcwa_efficiency: float
    predicted_efficiency: float
    harmonics: tuple
    rcwa_total: float

    def markdown(self) -> str:
        return (f"| {self.case} | {self.spin:+d} | {self.predicted_order:+d} | {self.rcwa_order:+d} | "
                f"{self.rcwa_efficiency:.4f} | {self.predicted_efficiency:.4f} | "
                f"{self.rcwa_efficiency - self.predicted_efficiency:+.4f} | {self.harmonics} |")
