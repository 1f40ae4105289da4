"""The log-polar mode sorter as masks: the design kind mode_sorter, the written elements against the paper's phase
formulas (read back with gdstk, an independent reader), the two-element check from the written masks, the spin and
mounting conventions, four elements through sampled screens, and the `metalay sorter` command line."""

import copy
import json
from pathlib import Path

import gdstk
import numpy as np
import pytest

from metalay.api import compile_design
from metalay.cli import main
from metalay.design.logpolar import SorterElement, element_aperture, sorter_element, sorter_parameters
from metalay.design.spec import load_design, parse_design
from metalay.errors import DesignError
from metalay.measure.sorter import ElementScreen, sorter_check
from metalay.measure.sortermask import check_sorter, written_element

from conftest import write_toml

ROOT = Path(__file__).resolve().parent.parent
E1 = ROOT / "examples" / "sorter-1550-unwrapper.toml"
E2 = ROOT / "examples" / "sorter-1550-corrector.toml"


# --- independent formulas (written here from the papers, not calling metalay's terms) -------------------------
def paper_phi1(x, y, a, b, f_um, lam_um):
    # Source: Berkhout et al. 2010, Phys. Rev. Lett. 105, 153601, the unwrapper
    # phi_1 = (2 pi a / (lambda f)) [y arctan(y/x) - x ln(sqrt(x^2 + y^2) / b) + x], arctan read four-quadrant
    return 2 * np.pi * a / (lam_um * f_um) * (y * np.arctan2(y, x) - x * np.log(np.hypot(x, y) / b) + x)


def paper_phi2(x, y, a, b, f_um, lam_um):
    # Source: Berkhout et al. 2010, the phase corrector phi_2 = -(2 pi a b / (lambda f)) exp(-u/a) cos(v/a)
    return -2 * np.pi * a * b / (lam_um * f_um) * np.exp(-x / a) * np.cos(y / a)


def hyperbolic_lens(x, y, f_um, lam_um):
    # Source: Aieta et al. 2012, Nano Lett. 12, 4932 (flat-lens phase -k (sqrt(r^2 + f^2) - f))
    return -2 * np.pi / lam_um * (np.sqrt(x * x + y * y + f_um * f_um) - f_um)


def example_parameters():
    """a, b, f (um) of the 1550 nm example from its keys: d = 400 um, inner 80 um, 3 waves."""
    d, r_in, r_out, lam = 400.0, 40.0, 200.0, 1.55
    a = d / (2 * np.pi)  # Source: Berkhout et al. 2010: a = d / (2 pi) spreads the full azimuth over d
    b = np.sqrt(r_in * r_out)  # our choice (b only translates the strip): centres it on x2 = 0
    f_um = np.floor(a * b / (lam * 3.0))  # our choice: the longest f with a b / (lambda f) >= 3 waves, whole um
    return a, b, f_um, lam


@pytest.fixture(scope="module")
def compiled_pair(tmp_path_factory):
    out = tmp_path_factory.mktemp("sorter-pair")
    designs = [load_design(E1), load_design(E2)]
    masks = [compile_design(d, out / d.name, show_progress=False).files["gds"] for d in designs]
    return designs, masks, out


def test_mode_sorter_term_is_the_papers_phase_plus_the_lens():
    designs = [load_design(E1), load_design(E2)]
    a, b, f_um, lam = example_parameters()
    term1, term2 = (next(t for t in d.terms if isinstance(t, SorterElement)) for d in designs)
    assert term1.setup.a_um == pytest.approx(a, rel=1e-12) and term1.setup.b_um == pytest.approx(b, rel=1e-12)
    assert term1.setup.focal_length_mm * 1e3 == pytest.approx(f_um, abs=1e-9)
    # Source: Berkhout et al. 2010: spot displacement lambda F l / (2 pi a) -> F = spacing 2 pi a / lambda
    assert term1.setup.fourier_focal_length_mm * 1e3 == pytest.approx(40.0 * 2 * np.pi * a / lam, rel=1e-12)
    rng = np.random.default_rng(7)
    r, t = rng.uniform(40, 200, 50), rng.uniform(-np.pi, np.pi, 50)
    x, y = r * np.cos(t), r * np.sin(t)
    got1 = term1.phase(x, y, wavelength_nm=1550.0, sigma=1)
    want1 = paper_phi1(x, y, a, b, f_um, lam) + hyperbolic_lens(x, y, f_um, lam)
    assert np.max(np.abs(got1 - want1)) < 1e-9 * np.max(np.abs(want1))
    u, v = rng.uniform(-55, 55, 50), rng.uniform(-200, 200, 50)
    got2 = term2.phase(u, v, wavelength_nm=1550.0, sigma=-1)
    want2 = paper_phi2(u, v, a, b, f_um, lam) + hyperbolic_lens(u, v, f_um, lam)
    assert np.max(np.abs(got2 - want2)) < 1e-9 * np.max(np.abs(want2))


def _fin_centres_and_angles(path, n_pick, seed):
    """Centres (um) and long-axis angles (rad, mod pi) of randomly picked fins, read with gdstk."""
    lib = gdstk.read_gds(str(path))
    polys = [p for p in lib.top_level()[0].polygons if p.layer == 1 and p.datatype == 0]
    pick = np.random.default_rng(seed).choice(len(polys), n_pick, replace=False)
    pts = np.array([polys[k].points for k in pick])  # (n, 4, 2) um
    centre = pts.mean(axis=1)
    e1, e2 = pts[:, 1] - pts[:, 0], pts[:, 2] - pts[:, 1]
    long_edge = np.where((np.hypot(*e1.T) >= np.hypot(*e2.T))[:, None], e1, e2)
    return centre, np.mod(np.arctan2(long_edge[:, 1], long_edge[:, 0]), np.pi), len(polys)


def test_written_elements_follow_the_phase_formula_at_sites(compiled_pair):
    # End to end: the compiled masks, read back by gdstk (not metalay's reader), carry at every picked site a fin
    # rotated by theta = sigma phi / 2 (mod pi) with phi from the paper's formulas above (Bomzon et al. 2002,
    # Opt. Lett. 27, 1141: geometric phase 2 sigma theta).  Tolerance 0.5 deg of phase: the manifest's worst
    # snapping error is 0.33 deg (1 nm grid, 425 x 240 nm fin).  Element 2 is written for spin -1, so a flipped
    # spin convention (theta = +phi / 2 there) fails by up to 90 deg.
    designs, masks, _ = compiled_pair
    a, b, f_um, lam = example_parameters()
    formulas = [lambda x, y: paper_phi1(x, y, a, b, f_um, lam) + hyperbolic_lens(x, y, f_um, lam),
                lambda x, y: paper_phi2(x, y, a, b, f_um, lam) + hyperbolic_lens(x, y, f_um, lam)]
    for design, mask, phi in zip(designs, masks, formulas):
        centre, theta, count = _fin_centres_and_angles(mask, 400, seed=design.sigma + 5)
        assert count > 90_000
        want = np.mod(design.sigma * phi(centre[:, 0], centre[:, 1]) / 2, np.pi)
        diff = np.angle(np.exp(2j * (theta - want))) / 2  # wrapped to (-pi/2, pi/2]
        assert np.degrees(np.max(np.abs(2 * diff))) < 0.5


def test_check_from_written_masks_follows_the_linear_relation(compiled_pair):
    # Source: Berkhout et al. 2010: after the two elements a state l is a tilted plane wave l v / a, which the
    # Fourier lens F focuses to t = lambda F l / (2 pi a): linear in l, 40 um per unit charge here.  Sign: a phase
    # growing along +y sends light to +y (metalay.checks.grid), so l > 0 lands at t_y > 0.  Tolerances: slope
    # within 1 % and spots within 3 % of a spacing (measured on these masks: -0.26 % and 0.5 % for |l| <= 2).
    designs, masks, _ = compiled_pair
    rep = check_sorter(designs, masks, charges=range(-2, 3), make_plots=False)
    f = rep.figures
    assert f["elements_from"] == "written masks" and rep.status == "pass"
    assert f["slope_um_per_charge"] == pytest.approx(40.0, rel=0.01)
    pos, ch = np.array(f["positions_um"]), np.array(f["charges"])
    assert np.all(np.sign(pos[ch != 0]) == np.sign(ch[ch != 0]))
    assert max(f["position_error_spacings"]) < 0.03
    # each state keeps most of its detected power in its own window (sinc^2 of a uniform strip: 0.77 in one
    # spacing, Goodman 2005, Introduction to Fourier Optics, sec. 4.4.1); measured 0.74-0.82
    assert min(f["own_window_fraction"]) > 0.65
    # the written elements (325 k fins, snapped, responses of the library) behave as the ideal phase elements
    ideal = check_sorter(designs, None, charges=range(-2, 3), make_plots=False).figures
    assert np.allclose(f["own_window_fraction"], ideal["own_window_fraction"], atol=0.03)
    assert all(e["written_phase_error_deg"]["rms"] < 0.3 for e in f["elements"])


def test_element_written_for_the_wrong_spin_fails_the_check(compiled_pair, tmp_path):
    # Convention pin: a geometric-phase element sends |s> to |-s> (Bomzon et al. 2002), so element 2 receives
    # spin -1 and must be written for it; written for +1 it applies -phi_2 and the sorter stops sorting (measured:
    # 4 % of the light detected, slope -3 %).  The verdict must say so; with wave plates assumed it passes.
    designs, masks, _ = compiled_pair
    raw = copy.deepcopy(designs[1].raw)
    raw["design"]["input_spin"] = 1
    raw["design"]["name"] = "wrong-spin"
    wrong = parse_design(raw, where="wrong.toml")
    mask = compile_design(wrong, tmp_path / "w", run_rules=False, show_progress=False).files["gds"]
    bad = check_sorter([designs[0], wrong], [masks[0], mask], charges=(-1, 0, 1), make_plots=False)
    assert bad.status == "fail" and max(bad.figures["detected_fraction_of_input"]) < 0.2
    assert any("receives spin -1" in n for n in bad.notes)
    plates = check_sorter([designs[0], wrong], [masks[0], mask], charges=(-1, 0, 1), wave_plates=True,
                          make_plots=False)
    assert plates.status == "pass"


def test_mounting_an_element_patterned_face_first_breaks_it_but_a_y_mirror_alone_does_not(compiled_pair):
    # Light arriving onto the patterned face sees the element mirrored: theta -> -theta, y -> -y (geometric phase
    # 2 sigma theta, Bomzon et al. 2002).  Both sorter phases are even in y (the formulas above: y atan2(y, x) and
    # cos(v / a)), so the y-mirror alone changes nothing while theta -> -theta negates the phase.
    designs, masks, _ = compiled_pair
    s1, _ = written_element(masks[0], designs[0])
    s2, _ = written_element(masks[1], designs[1])
    setup = next(t for t in designs[0].terms if isinstance(t, SorterElement)).setup
    kw = {"charges": (-1, 0, 1), "max_side": 4096}
    base = sorter_check(setup, elements=[s1, s2], **kw)
    y_flip = ElementScreen(s2.field[::-1], s2.x_um, -s2.y_um[::-1], "y-mirrored")
    face = ElementScreen(np.conj(s2.field[::-1]), s2.x_um, -s2.y_um[::-1], "patterned face first")
    mirrored = sorter_check(setup, elements=[s1, y_flip], **kw)
    flipped = sorter_check(setup, elements=[s1, face], **kw)
    assert np.allclose(mirrored.crosstalk, base.crosstalk, atol=0.02)
    assert flipped.detected.max() < 0.3 * base.detected.min()


def test_four_elements_through_sampled_screens():
    # Source: O'Sullivan et al. 2012, Opt. Express 20, 24444: N copies side by side make the spots N times
    # narrower at the same spacing; the copier's two transforms invert the strip (l > 0 at -y).  Here the four
    # elements are sampled on grids of the suggested apertures and propagated as ElementScreens (the path of the
    # written-mask check); measured: slope -0.11 %, own window 0.88-0.92, as the ideal elements.
    setup = sorter_parameters(300.0, wavelength_nm=532.0, spot_spacing_um=20.0, n_copies=3)
    p = 1.5
    screens = []
    for k in range(1, 5):
        ap = element_aperture(setup, k)
        hw = ap.get("width_um", ap.get("diameter_um")) / 2
        hh = ap.get("height_um", ap.get("diameter_um")) / 2
        x = np.arange(-np.floor(hw / p), np.floor(hw / p) + 1) * p
        y = np.arange(-np.floor(hh / p), np.floor(hh / p) + 1) * p
        xx, yy = np.meshgrid(x, y)
        field = np.exp(1j * sorter_element(setup, k).phase(xx, yy, wavelength_nm=532.0, sigma=1))
        if ap["shape"] == "annulus":
            r = np.hypot(xx, yy)
            field = field * ((r <= hw) & (r >= ap["inner_diameter_um"] / 2))
        screens.append(ElementScreen(field, x, y, f"element {k}"))
    chk = sorter_check(setup, charges=(-1, 0, 1), elements=screens, max_side=4096)
    assert chk.slope_um == pytest.approx(-20.0, rel=5e-3)
    assert chk.positions_um[2] < 0 < chk.positions_um[0]
    assert np.all(chk.diagonal > 0.85)
    assert "element 1" in chk.notes[0]


@pytest.mark.parametrize("change, text", [
    ({"element": 3}, "phase[0].element"),
    ({"n_copies": 2}, "phase[0].n_copies"),
    ({"inner_diameter_um": 500.0}, "phase[0].inner_diameter_um"),
    ({"spot_spacing_um": -1.0}, "phase[0].spot_spacing_um"),
    ({"max_ray_angle_deg": 5.0}, "max_ray_angle_deg"),
    ({"a_um": 3.0}, "phase[0].a_um"),
])
def test_bad_mode_sorter_keys_are_one_line_errors(tmp_path, capsys, change, text):
    data = {"design": {"name": "s", "wavelength_nm": 1550.0, "input_spin": 1, "library": "asi-nanofin-1550"},
            "phase": [{"kind": "mode_sorter", "element": 1, "input_diameter_um": 400.0, "spot_spacing_um": 40.0,
                       "min_waves": 3.0, "max_ray_angle_deg": 25.0, **change}],
            "aperture": {"shape": "circle", "diameter_um": 20.0}, "lattice": {"kind": "square", "period_nm": 700.0}}
    path = write_toml(tmp_path / "bad.toml", data)
    assert main(["compile", str(path), "-o", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "bad.toml" in err and text in err
    assert not (tmp_path / "out").exists()


def test_a_set_of_elements_must_be_one_sorter_in_order(tmp_path):
    from metalay.measure.sortermask import sorter_setup

    d1, d2 = load_design(E1), load_design(E2)
    with pytest.raises(DesignError, match="order 1..2"):
        sorter_setup([d2, d1])
    raw = copy.deepcopy(d2.raw)
    raw["phase"][0]["spot_spacing_um"] = 41.0
    with pytest.raises(DesignError, match="differ"):
        sorter_setup([d1, parse_design(raw, where="other.toml")])
    with pytest.raises(DesignError, match="2 elements"):
        sorter_setup([d1])


def test_cli_plan_writes_element_files_that_compile(tmp_path, capsys):
    code = main(["sorter", "plan", "--wavelength-nm", "532", "--input-diameter-um", "120", "--spot-spacing-um", "10",
                 "--min-waves", "2", "--max-ray-angle-deg", "30", "--write", str(tmp_path / "plan"), "--name", "tiny",
                 "--library", "tio2-nanofin-532"])
    out = capsys.readouterr().out
    assert code == 0 and "a = 19.0986 um" in out  # 120 / (2 pi)
    files = sorted((tmp_path / "plan").glob("*.toml"))
    assert [f.name for f in files] == ["tiny-corrector.toml", "tiny-unwrapper.toml"]
    d1, d2 = load_design(tmp_path / "plan" / "tiny-unwrapper.toml"), load_design(files[0])
    assert (d1.sigma, d2.sigma) == (1, -1) and d1.aperture.shape == "annulus" and d2.aperture.shape == "rectangle"


def test_cli_check_ideal_writes_json_png_html_and_exit_codes(tmp_path, capsys):
    out = tmp_path / "chk"
    code = main(["sorter", "check", str(E1), str(E2), "--ideal", "--charges=-1..1", "-o", str(out)])
    captured = capsys.readouterr()
    text = captured.out
    # the result on stdout, the one-line caution on stderr (the full text is in sorter.json and the report)
    assert code == 0 and "elements from: ideal phase" in text and "laser" in captured.err
    assert "laser-safety" in (out / "sorter_report.html").read_text()
    data = json.loads((out / "sorter.json").read_text())
    assert data["elements_from"] == "ideal phase" and data["verdict"]["status"] == "pass"
    assert any("NOT from written masks" in n for n in data["notes"])
    assert (out / "sorter.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    html = (out / "sorter_report.html").read_text()
    assert "Caution" in html and "laser-safety" in html
    # a threshold the check cannot meet: exit 1, and the failure named with its unit
    code = main(["sorter", "check", str(E1), str(E2), "--ideal", "--charges=-1..1", "--min-own-window", "0.99",
                 "-o", str(tmp_path / "chk2"), "--json"])
    data = json.loads(capsys.readouterr().out)
    assert code == 1 and data["verdict"]["status"] == "fail" and "allowed >= 0.99" in data["verdict"]["failed"][0]


@pytest.mark.parametrize("argv, text", [
    (["--ideal", "--charges", "5..1"], "--charges"),
    (["--ideal", "--min-own-window", "2"], "--min-own-window"),
    ([], "--mask"),
    (["--mask", "x.gds"], "1 --mask for 2"),
    (["--mask", "missing1.gds", "--mask", "missing2.gds"], "missing1.gds"),
])
def test_cli_check_bad_input_is_one_line(tmp_path, capsys, argv, text):
    code = main(["sorter", "check", str(E1), str(E2), "-o", str(tmp_path / "o"), *argv])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and text in err
