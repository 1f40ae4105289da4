"""Spin-decoupled masks end to end: the written file read back by gdstk and evaluated with Jones matrices written
out here (not metalay's decoder or mapping), the optical check of both spins, the manifest, rules and report.

Source of the relations: Mueller, Rubin, Devlin, Groever, Capasso 2017, Phys. Rev. Lett. 118, 113901 (a half-wave
cell of propagation phase delta rotated by theta gives delta + 2 theta to one spin and delta - 2 theta to the other);
in this project's convention (README "Physics conventions") spin +1 receives psi + 2 theta with
psi = arg((t_long - t_short)/2).
"""

import copy
import json

import gdstk
import numpy as np
import pytest

from metalay.api import compile_design
from metalay.cells.library import load_library
from metalay.design.phase import target_phase
from metalay.design.spec import load_design, parse_design

from conftest import write_toml

CONVERTER = {
    "design": {"name": "t-spin-orbit", "wavelength_nm": 532.0, "library": "tio2-decoupled-532"},
    "phase_spin_plus": [{"kind": "vortex", "charge": 1}],
    "phase_spin_minus": [{"kind": "vortex", "charge": 4}],
    "aperture": {"shape": "circle", "diameter_um": 40.0},
    "lattice": {"kind": "square", "period_nm": 360.0},
    "mask": {"formats": ["gds", "oas"]},
    "checks": {"rules": True, "optics": True},
}


def _rot(theta):
    c, s = np.cos(theta), np.sin(theta)
    return np.array([[c, s], [-s, c]])


def _converted(t_long, t_short, theta, sigma):
    """<-sigma| R(-theta) diag(t_long, t_short) R(theta) |sigma> per element, |sigma> = (1, i sigma)/sqrt(2)."""
    t_long, t_short, theta = np.broadcast_arrays(t_long, t_short, theta)
    diag = np.zeros(theta.shape + (2, 2), complex)
    diag[..., 0, 0], diag[..., 1, 1] = t_long, t_short
    rot = np.moveaxis(_rot(theta), (0, 1), (-2, -1))       # R(theta) per element, (..., 2, 2)
    rot_back = np.moveaxis(_rot(-theta), (0, 1), (-2, -1))
    jones = rot_back @ diag @ rot
    inp = np.array([1.0, 1j * sigma]) / np.sqrt(2)
    out = np.array([1.0, -1j * sigma]) / np.sqrt(2)
    return np.einsum("i,...ij,j->...", np.conj(out), jones, inp)


def read_elements(gds_path, library):
    """Every structure polygon of a GDSII file, read by gdstk: centre (um), long-axis angle (rad, mod pi) and the
    library cell nearest in (length, width) — computed here from the vertices, independently of metalay."""
    lib = gdstk.read_gds(str(gds_path))
    polys = [p for p in lib.top_level()[0].polygons if (p.layer, p.datatype) == (1, 0)]
    pts = np.array([p.points for p in polys])  # (n, 4, 2) um
    centre = pts.mean(axis=1)
    e1, e2 = pts[:, 1] - pts[:, 0], pts[:, 2] - pts[:, 1]
    l1, l2 = np.hypot(*e1.T), np.hypot(*e2.T)
    long_edge = np.where((l1 >= l2)[:, None], e1, e2)
    angle = np.mod(np.arctan2(long_edge[:, 1], long_edge[:, 0]), np.pi)
    size = np.stack([np.maximum(l1, l2), np.minimum(l1, l2)], axis=1) * 1000.0  # nm
    dims = np.array([[c.dim("length_nm"), c.dim("width_nm")] for c in library.cells])
    cell = np.argmin(np.abs(size[:, None, :] - dims[None, :, :]).max(axis=2), axis=1)
    return centre, angle, cell


def written_phases(gds_path, library, wavelength_nm, *, rotation_sign=1):
    """Per written element and input spin, the converted phase from the library responses (Jones matrices above)."""
    centre, angle, cell = read_elements(gds_path, library)
    tl, ts = library.response_at(wavelength_nm)
    out = {s: np.angle(_converted(tl[cell], ts[cell], rotation_sign * angle, s)) for s in (1, -1)}
    return centre, out


def _wrap(a):
    return np.angle(np.exp(1j * np.asarray(a)))


@pytest.fixture(scope="module")
def converter(tmp_path_factory):
    out = tmp_path_factory.mktemp("spin")
    path = out / "converter.toml"
    write_toml(path, CONVERTER)
    design = load_design(path)
    res = compile_design(design, out / "mask", show_progress=False)
    return design, res


def test_written_mask_gives_each_spin_its_own_target(converter):
    # End to end against the published relation, from the file: gdstk reads the polygons, the cell and rotation are
    # measured from the vertices here, the Jones matrix of each element is written out above. Each spin's phase
    # must equal its target up to the errors the manifest states (common cell-set error + rotation snapping; 0.05
    # deg of float margin), and the phase winding around the centre must be +1 for spin +1 and +4 for spin -1
    # (a flipped spin convention swaps them; the geometric-only mapping would give +1 and -1).
    design, res = converter
    lib = load_library(design.library)
    centre, phases = written_phases(res.files["gds"], lib, design.wavelength_nm)
    errs = res.manifest["errors"]["per_spin"]
    for sigma, terms in design.spin_targets():
        target = target_phase(terms, centre[:, 0], centre[:, 1], wavelength_nm=design.wavelength_nm, sigma=sigma)
        err = np.degrees(np.abs(_wrap(phases[sigma] - target)))
        bound = (errs[f"{sigma:+d}"]["worst_quantisation_phase_error_deg"]
                 + errs[f"{sigma:+d}"]["worst_snapping_phase_error_deg"] + 0.05)
        assert err.max() <= bound, (sigma, err.max(), bound)
        assert bound < 25.0  # 16 levels (8 fins, 22.5 deg apart mod pi): at most 11.25 deg + the levels' own error
    # winding of each spin's written phase on a ring of radius 12 um
    ring = np.abs(np.hypot(*centre.T) - 12.0) < 0.25
    order = np.argsort(np.arctan2(centre[ring, 1], centre[ring, 0]))
    for sigma, charge in ((1, 1), (-1, 4)):
        ph = phases[sigma][ring][order]
        winding = np.sum(_wrap(np.diff(np.concatenate([ph, ph[:1]])))) / (2 * np.pi)
        assert round(winding) == charge


def test_manifest_reports_errors_per_spin_and_the_cells_used(converter):
    design, res = converter
    m = res.manifest
    per = m["errors"]["per_spin"]
    assert set(per) == {"+1", "-1", "cell_phase_error_deg"}
    assert per["cell_phase_error_deg"] <= per["+1"]["worst_quantisation_phase_error_deg"] + 1e-9
    assert m["library"]["phase_mechanism"] == "spin_decoupled"
    used = m["counts"]["elements_per_cell"]
    assert sum(used.values()) == m["counts"]["sites"] and sum(v > 0 for v in used.values()) >= 3
    assert m["checks"]["rules"]["status"] == "clean"


def test_optics_check_reports_both_spins_and_their_crosstalk(converter):
    # Each spin's converted beam, computed from the written mask, is its own charge (purity > 0.9: a 16-level
    # profile gives sinc^2(1/16) = 0.987: Swanson 1989, MIT Lincoln Lab. Tech. Rep. 854) and holds
    # little of the other spin's charge.
    design, res = converter
    opt = res.manifest["checks"]["optics"]
    spins = opt["figures"]["spins"]
    assert spins["+1"]["oam"]["design_charge"] == 1 and spins["-1"]["oam"]["design_charge"] == 4
    for key in ("+1", "-1"):
        assert spins[key]["oam"]["purity"] > 0.9
        assert spins[key]["oam"]["weight_at_other_target"]["weight"] < 0.02
        assert spins[key]["power_budget"]["converted"] > 0.8
        assert opt["figures"]["target_crosstalk"]["isolation_db"][key] > 15.0
    out = res.out_dir / "optics"
    html = (out / "optics_report.html").read_text()
    assert "input spin +1" in html and "input spin -1" in html
    pngs = sorted(p.name for p in out.glob("*.png"))
    assert any(n.startswith("spin_plus_") for n in pngs) and any(n.startswith("spin_minus_") for n in pngs)
    assert json.loads((out / "optics.json").read_text())["spin_decoupled"] is True


def test_independent_jones_evaluation_of_the_written_file_agrees_with_the_optics_check(converter):
    # The optics check's figures of both spins against an evaluation that shares none of its code: gdstk reads the
    # written GDSII, the cell and rotation of every polygon are measured from its vertices here, and each element's
    # converted amplitude is <-sigma| R(-theta) diag(t_long, t_short) R(theta) |sigma> in plain numpy (Jones calculus,
    # Jones 1941, J. Opt. Soc. Am. 31, 488; the relation of Mueller et al. 2017, Phys. Rev. Lett. 118, 113901).
    # Compared: the target-overlap matrix F(sigma -> tau) = |sum E_sigma exp(-i phi_tau)|^2 / (S sum |E_sigma|^2)
    # (Goodman 2005, Introduction to Fourier Optics: overlap of a field with a mode) and the converted power
    # fraction mean |E_sigma|^2 of each spin. Tolerance 1e-4 relative (measured agreement ~1e-6 on the own targets,
    # ~1e-5 on the cross ones): the check computes in single precision and places elements on the ideal lattice
    # sites (the file's centres are snapped to 1 nm).
    design, res = converter
    lib = load_library(design.library)
    centre, angle, cell = read_elements(res.files["gds"], lib)
    tl, ts = lib.response_at(design.wavelength_nm)
    fields = {s: _converted(tl[cell], ts[cell], angle, s) for s in (1, -1)}
    phases = {s: target_phase(terms, centre[:, 0], centre[:, 1], wavelength_nm=design.wavelength_nm, sigma=s)
              for s, terms in design.spin_targets()}
    figs = res.manifest["checks"]["optics"]["figures"]
    ct = figs["target_crosstalk"]
    assert ct["spins"] == [1, -1]
    for a, s in enumerate((1, -1)):
        e = fields[s]
        for b, t in enumerate((1, -1)):
            f = abs(np.sum(e * np.exp(-1j * phases[t]))) ** 2 / (e.size * np.sum(np.abs(e) ** 2))
            assert abs(ct["overlap"][a][b] - f) <= 1e-4 * f + 1e-12, (s, t, ct["overlap"][a][b], f)
        converted = float(np.mean(np.abs(e) ** 2))
        assert abs(figs["spins"][f"{s:+d}"]["power_budget"]["converted"] - converted) < 1e-4 * converted
    # the own-target overlaps are high and the cross ones small, so a swapped spin label cannot pass the above
    assert min(ct["overlap"][0][0], ct["overlap"][1][1]) > 0.8 and max(ct["overlap"][0][1], ct["overlap"][1][0]) < 0.01


def test_optics_check_fails_a_mask_written_for_other_targets(converter, tmp_path):
    # A check that cannot fail is a defect: the same written mask judged against swapped targets (l = 4 for spin +1,
    # l = 1 for spin -1) must show low purities for both spins.
    from metalay.checks.spinoptics import check_spin_optics

    design, res = converter
    data = copy.deepcopy(CONVERTER)
    data["phase_spin_plus"], data["phase_spin_minus"] = data["phase_spin_minus"], data["phase_spin_plus"]
    wrong = parse_design(data, where="swapped.toml")
    r = check_spin_optics(res.files["gds"], load_library(design.library), wrong,
                          options=__import__("metalay.checks.optics", fromlist=["OpticsOptions"]).OpticsOptions(
                              make_plots=False))
    for key in ("+1", "-1"):
        assert r.figures["spins"][key]["oam"]["purity"] < 0.05
        assert r.figures["target_crosstalk"]["isolation_db"][key] < -10.0
        assert r.figures["verdicts"]["by_spin"][key] == "fail"
    # the verdict comes from the thresholds (oam_purity fails below 0.7, worst_isolation_db below 15 dB)
    failed = {i["key"] for i in r.figures["verdicts"]["items"] if i["verdict"] == "fail"}
    assert {"oam_purity", "worst_isolation_db"} <= failed and r.figures["verdicts"]["verdict"] == "fail"
    assert res.manifest["checks"]["optics"]["verdict"] == "pass"


@pytest.mark.parametrize("lit_from", ["substrate", "structures"])
def test_side_of_illumination_mirrors_the_written_element(lit_from, tmp_path):
    # Convention of metalay.design.side (design notes "Which face, which side"): lit onto the structures, the light
    # sees the file mirrored (y -> -y, theta -> -theta). Tilts are not mirror-invariant, so a design tilting spin +1
    # towards +y and spin -1 towards +x (with a charge-2 vortex) is written differently for the two sides. Evaluated
    # here from the gdstk read-back with the written-out Jones matrices: in the frame the side prescribes, each
    # spin's written phase is its target (to the manifest's error bound); in the other frame it is not.
    data = copy.deepcopy(CONVERTER)
    data["design"]["lit_from"] = lit_from
    data["phase_spin_plus"] = [{"kind": "tilt", "angle_deg": 3.0, "azimuth_deg": 90.0}]
    data["phase_spin_minus"] = [{"kind": "tilt", "angle_deg": 3.0, "azimuth_deg": 0.0}, {"kind": "vortex", "charge": 2}]
    data["checks"] = {"rules": False, "optics": False}
    path = tmp_path / "side.toml"
    write_toml(path, data)
    design = load_design(path)
    res = compile_design(design, tmp_path / "mask", show_progress=False)
    lib = load_library(design.library)
    mirrored = lit_from == "structures"
    assert res.manifest["illumination"]["mirrored_y"] is mirrored
    errs = res.manifest["errors"]["per_spin"]
    worst = {}
    for frame_mirrored in (False, True):
        centre, phases = written_phases(res.files["gds"], lib, design.wavelength_nm,
                                        rotation_sign=-1 if frame_mirrored else 1)
        bx, by = centre[:, 0], (-centre[:, 1] if frame_mirrored else centre[:, 1])
        worst[frame_mirrored] = {}
        for sigma, terms in design.spin_targets():
            target = target_phase(terms, bx, by, wavelength_nm=design.wavelength_nm, sigma=sigma)
            core = np.hypot(bx, by) > 1.0  # leave out the vortex core (its phase is aliased within a period)
            worst[frame_mirrored][sigma] = float(np.degrees(np.abs(_wrap(phases[sigma] - target))[core].max()))
    for sigma in (1, -1):
        assert worst[mirrored][sigma] <= errs[f"{sigma:+d}"]["worst_phase_error_bound_deg"] + 0.05
        assert worst[not mirrored][sigma] > 90.0


def test_optics_command_checks_both_spins(converter, tmp_path, capsys):
    # The command line (metalay optics --design) on a spin-decoupled mask: exit 0 on a passing mask, one block per
    # input spin, the isolation line and the verdict; the caution is printed.
    from metalay.cli import main

    design, res = converter
    rc = main(["optics", str(res.files["gds"]), "--design", design.source_path, "-o", str(tmp_path / "o"),
               "--no-plots"])
    cap = capsys.readouterr()
    out = cap.out
    assert rc == 0
    assert "input spin +1:" in out and "input spin -1:" in out and "OAM purity of l = 4" in out
    assert "isolation from the other spin's target" in out and "verdict: PASS" in out
    assert "design aid" in cap.err  # the one-line caution goes to standard error
