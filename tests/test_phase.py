"""Phase terms and the geometric-phase mapping, checked against published relations."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from metalay.cells.library import load_library
from metalay.design.lattice import Aperture, Lattice, sample_sites
from metalay.design.phase import Axicon, Channel, Lens, Multiplex, QPlate, Tilt, Vortex, target_phase
from metalay.mask.mapping import assign_cells, geometric_rotation, quantise_rotation, wrap_pi


def rot(t):
    c, s = np.cos(t), np.sin(t)
    return np.array([[c, s], [-s, c]])  # R(theta) in the README's convention J = R(-t) D R(t)


def jones_cell(theta, t_long, t_short):
    return rot(-theta) @ np.diag([t_long, t_short]) @ rot(theta)


def spin(sigma):
    return np.array([1.0, 1j * sigma]) / np.sqrt(2)


@pytest.mark.parametrize("sigma", [1, -1])
@pytest.mark.parametrize("theta", np.linspace(0, np.pi, 7))
def test_converted_phase_is_twice_sigma_theta(sigma, theta):
    # Source: Bomzon, Biener, Kleiner, Hasman 2002, Opt. Lett. 27, 1141 (space-variant Pancharatnam-Berry phase:
    # the cross-polarised output of a rotated retarder carries phase 2*sigma*theta)
    t_long, t_short = 0.9 * np.exp(0.3j), 0.8 * np.exp(0.3j + 3.0j)
    out = jones_cell(theta, t_long, t_short) @ spin(sigma)
    converted = np.vdot(spin(-sigma), out)
    leaked = np.vdot(spin(sigma), out)
    expected_conv = (t_long - t_short) / 2 * np.exp(2j * sigma * theta)
    assert converted == pytest.approx(expected_conv, abs=1e-12)
    assert leaked == pytest.approx((t_long + t_short) / 2, abs=1e-12)


@pytest.mark.parametrize("sigma", [1, -1])
def test_mapping_writes_target_phase(sigma):
    # Converted phase 2*sigma*theta with theta = sigma*phi/2 reproduces phi (mod 2 pi). Same source as above.
    phi = np.linspace(-20, 20, 1001)
    theta = geometric_rotation(phi, sigma)
    assert np.all((theta >= 0) & (theta < np.pi))
    assert np.max(np.abs(wrap_pi(2 * sigma * theta - phi))) < 1e-12


@pytest.mark.parametrize("levels", [2, 4, 8, 16, 32])
def test_quantisation_error_bound(levels):
    # Common practice (no source): rounding to K levels of pi/K gives at most pi/(2K) of rotation,
    # i.e. pi/K of geometric phase.
    theta = np.linspace(0, np.pi, 10001, endpoint=False)
    tq, lv = quantise_rotation(theta, levels)
    assert lv.min() >= 0 and lv.max() < levels
    err = np.abs(wrap_pi(2 * (tq - theta)))
    assert err.max() <= np.pi / levels + 1e-12
    assert err.max() > 0.9 * np.pi / levels


def winding(phase_on_loop):
    d = wrap_pi(np.diff(np.concatenate([phase_on_loop, phase_on_loop[:1]])))
    return d.sum() / (2 * np.pi)


@given(charge=st.integers(-12, 12).filter(lambda l: l != 0), r_um=st.floats(3.0, 9.0))
def test_winding_number_equals_charge(charge, r_um):
    # Source: definition of topological charge (winding of the phase = 2 pi l), e.g. Allen et al. 1992,
    # Phys. Rev. A 45, 8185. Sampled on lattice sites of a square ring, as the mask samples it.
    sites = sample_sites(Aperture("circle", diameter_um=30.0), Lattice("square", 325.0))
    r = np.hypot(sites.x_um, sites.y_um)
    ring = np.abs(r - r_um) < 0.2
    order = np.argsort(np.arctan2(sites.y_um[ring], sites.x_um[ring]))
    phi = target_phase((Vortex(charge), Tilt(0.5)), sites.x_um[ring][order], sites.y_um[ring][order],
                       wavelength_nm=532.0)
    theta = geometric_rotation(phi, 1)
    written = 2 * theta  # converted-field phase written by the mask (sigma = +1)
    assert round(winding(written)) == charge
    assert winding(written) == pytest.approx(charge, abs=1e-9)


@pytest.mark.parametrize("q", [0.5, 1.0, 1.5, -1.0, 2.5])
@pytest.mark.parametrize("sigma", [1, -1])
def test_qplate_carries_charge_2q(q, sigma):
    # Source: Marrucci, Manzo, Paparo 2006, Phys. Rev. Lett. 96, 163905 (a q-plate gives OAM 2q per unit of
    # spin flipped: output charge 2*sigma*q for input spin sigma)
    ang = np.linspace(-np.pi, np.pi, 721, endpoint=False)
    x, y = 5 * np.cos(ang), 5 * np.sin(ang)
    term = QPlate(q, 10.0)
    phi = target_phase((term,), x, y, wavelength_nm=633.0, sigma=sigma)
    theta = geometric_rotation(phi, sigma)
    orient = q * np.arctan2(y, x) + np.deg2rad(10.0)
    assert np.max(np.abs(wrap_pi(2 * (theta - orient)))) < 1e-9  # the written pattern is the q-plate pattern
    converted = np.exp(2j * sigma * theta)
    assert winding(np.angle(converted)) == pytest.approx(2 * sigma * q, abs=1e-9)


def test_lens_equal_optical_path():
    # Source: Aieta et al. 2012, Nano Lett. 12, 4932 (hyperbolic lens phase). Independent check by Fermat's
    # principle: lens phase + k * (distance to focus) is the same for every point of the aperture.
    f_um, wl = 500.0, 532.0
    r = np.linspace(0, 200, 101)
    phi = target_phase((Lens(f_um),), r, 0 * r, wavelength_nm=wl)
    k = 2 * np.pi / (wl * 1e-3)
    total = phi + k * np.hypot(r, f_um)
    assert np.ptp(total) < 1e-9 * k * f_um
    # paraxial limit -k r^2 / (2 f) for r << f (Source: Goodman, Introduction to Fourier Optics, thin lens)
    rs = np.linspace(0, 5, 11)
    assert target_phase((Lens(f_um),), rs, 0 * rs, wavelength_nm=wl) == pytest.approx(
        -k * rs ** 2 / (2 * f_um), rel=1e-4, abs=1e-12)


@pytest.mark.parametrize("angle_deg,azimuth_deg", [(4.0, 0.0), (10.0, 30.0), (25.0, -120.0)])
def test_tilt_matches_grating_equation(angle_deg, azimuth_deg):
    # Source: Born & Wolf, Principles of Optics, grating equation sin(theta) = lambda / Lambda (first order,
    # normal incidence, in air): the phase advances 2 pi over one carrier period along the azimuth.
    wl = 532.0
    period_um = wl * 1e-3 / np.sin(np.deg2rad(angle_deg))
    az = np.deg2rad(azimuth_deg)
    s = np.array([0.0, period_um])
    phi = target_phase((Tilt(angle_deg, azimuth_deg),), s * np.cos(az), s * np.sin(az), wavelength_nm=wl)
    assert phi[1] - phi[0] == pytest.approx(2 * np.pi, rel=1e-12)
    perp = target_phase((Tilt(angle_deg, azimuth_deg),), np.array([-np.sin(az)]), np.array([np.cos(az)]),
                        wavelength_nm=wl)
    assert perp[0] == pytest.approx(0.0, abs=1e-12)


def test_axicon_cone_angle():
    # Source: McLeod 1954, J. Opt. Soc. Am. 44, 592 (axicon): radial phase gradient k sin(beta).
    wl, beta = 1064.0, 2.0
    r = np.array([0.0, 100.0])
    phi = target_phase((Axicon(beta),), r, 0 * r, wavelength_nm=wl)
    assert -(phi[1] - phi[0]) / 100.0 == pytest.approx(2 * np.pi / (wl * 1e-3) * np.sin(np.deg2rad(beta)))


def test_multiplex_single_channel_is_vortex_plus_tilt():
    # Argument encoding of one channel is exactly that channel's phase (definition of the encoding).
    x = np.linspace(-10, 10, 41)[:, None] + 0 * np.linspace(-10, 10, 41)[None, :]
    y = x.T.copy()
    m = target_phase((Multiplex((Channel(2, 3.0, 45.0),)),), x, y, wavelength_nm=800.0)
    ref = target_phase((Vortex(2), Tilt(3.0, 45.0)), x, y, wavelength_nm=800.0)
    assert np.max(np.abs(wrap_pi(m - ref))) < 1e-9


def test_multiplex_two_channels_equal_weight_field():
    # For two equal-weight channels exp(ia) + exp(ib) the argument is (a + b)/2 (mod pi): closed form.
    x = np.linspace(1, 9, 9)
    y = np.linspace(-3, 5, 9)
    ch = (Channel(1, 2.0, 0.0), Channel(-2, 2.0, 180.0))
    m = target_phase((Multiplex(ch),), x, y, wavelength_nm=600.0)
    a = target_phase((Vortex(1), Tilt(2.0, 0.0)), x, y, wavelength_nm=600.0)
    b = target_phase((Vortex(-2), Tilt(2.0, 180.0)), x, y, wavelength_nm=600.0)
    assert np.max(np.abs(wrap_pi(2 * m - (a + b)))) < 1e-9


def test_assign_cells_geometric_levels():
    lib = load_library("tio2-nanofin-532")
    phi = np.linspace(-np.pi, np.pi, 1000)
    a = assign_cells(phi, lib, sigma=1, rotation_levels=8)
    assert a.quantisation_error_rad <= np.pi / 8 + 1e-12
    assert set(np.unique(a.level)) == set(range(8))
    assert np.all(a.cell_index == 0)


def test_imported_map_bilinear_is_exact_for_linear_phase(tmp_path):
    # Common practice (no source): bilinear interpolation reproduces a linear function exactly, so a map sampled
    # from a tilt gives the tilt's phase at every site (to rounding)
    from metalay.design.phase import load_phase_map

    xs = np.linspace(-12.0, 12.0, 7)
    ys = np.linspace(-10.0, 14.0, 9)
    X, Y = np.meshgrid(xs, ys)
    tilt = Tilt(3.0, 30.0)
    values = target_phase((tilt,), X, Y, wavelength_nm=633.0)
    np.save(tmp_path / "m.npy", values)
    np.savetxt(tmp_path / "m.csv", values, delimiter=",")
    rng = np.random.default_rng(4)
    x = rng.uniform(-12, 12, 500)
    y = rng.uniform(-10, 14, 500)
    want = target_phase((tilt,), x, y, wavelength_nm=633.0)
    for name in ("m.npy", "m.csv"):
        pm = load_phase_map(tmp_path / name, extent_um=[-12.0, 12.0, -10.0, 14.0], where="test")
        got = target_phase((pm,), x, y, wavelength_nm=633.0)
        assert np.max(np.abs(got - want)) < 1e-9


def _map_design(tmp_path, name, values, extent):
    np.save(tmp_path / f"{name}.npy", values)
    return {"design": {"name": name, "wavelength_nm": 532.0, "input_spin": 1, "library": "tio2-nanofin-532"},
            "phase": [{"kind": "map", "file": f"{name}.npy", "extent_um": list(extent)}],
            "aperture": {"shape": "circle", "diameter_um": 24.0},
            "lattice": {"kind": "square", "period_nm": 325.0},
            "mask": {"formats": ["gds"], "label": False}, "checks": {"rules": False, "optics": False}}


def _fin_angles(gds_path):
    import gdstk

    (top,) = gdstk.read_gds(str(gds_path)).top_level()
    pts = np.array([p.points for p in top.polygons if p.layer == 1])
    c = pts.mean(axis=1)
    e0, e1 = pts[:, 1] - pts[:, 0], pts[:, 2] - pts[:, 1]
    edge = np.where((np.hypot(*e0.T) >= np.hypot(*e1.T))[:, None], e0, e1)
    order = np.lexsort((c[:, 0], c[:, 1]))
    return c[order], np.mod(np.arctan2(edge[:, 1], edge[:, 0]), np.pi)[order]


def test_wrapped_and_unwrapped_map_give_the_same_mask(tmp_path):
    # Issue 11 part 2. Source: Itoh 1982, Appl. Opt. 21, 2470: a sampled phase whose neighbouring samples differ
    # by less than pi is determined modulo 2 pi by its wrapped samples. A smooth map (a lens plus a tilt, about
    # 60 rad across, 0.9 rad per grid step at most) given wrapped to (-pi, pi] and unwrapped must write the same
    # mask within 0.5 deg RMS of geometric phase (2 x the fin angle); interpolating the wrapped numbers straight
    # across their 2 pi jumps put 6 % of sites more than 10 deg off.
    from metalay.api import compile_design
    from metalay.design.spec import load_design

    from conftest import write_toml

    g = np.linspace(-13.0, 13.0, 105)
    X, Y = np.meshgrid(g, g)
    smooth = target_phase((Lens(80.0), Tilt(6.0, 20.0)), X, Y, wavelength_nm=532.0)
    assert np.ptp(smooth) > 40 and np.max(np.abs(np.diff(smooth, axis=1))) < 1.0
    wrapped = np.angle(np.exp(1j * smooth))
    extent = (-13.0, 13.0, -13.0, 13.0)
    out = {}
    for name, values in (("unwrapped", smooth), ("wrapped", wrapped)):
        path = write_toml(tmp_path / f"{name}.toml", _map_design(tmp_path, name, values, extent))
        res = compile_design(load_design(path), tmp_path / name, show_progress=False)
        out[name] = _fin_angles(res.files["gds"])
    (ca, ta), (cb, tb) = out["unwrapped"], out["wrapped"]
    assert np.array_equal(ca, cb)
    err_deg = np.degrees(np.angle(np.exp(2j * (ta - tb))))
    assert np.sqrt(np.mean(err_deg ** 2)) < 0.5 and np.max(np.abs(err_deg)) < 1.5
    # and both are the smooth target (bilinear interpolation error of a 0.25 um grid, plus snapping)
    want = target_phase((Lens(80.0), Tilt(6.0, 20.0)), ca[:, 0], ca[:, 1], wavelength_nm=532.0) / 2
    assert np.degrees(np.sqrt(np.mean(np.angle(np.exp(2j * (tb - want))) ** 2))) < 1.0


def test_map_keeps_a_vortex_core_and_a_phase_step():
    # A real discontinuity stays what it is: a charge-2 vortex sampled wrapped keeps winding 2 (Source: the
    # winding of l atan2(y, x) around the core is 2 pi l, Allen et al. 1992, Phys. Rev. A 45, 8185) and equals the
    # analytic vortex away from its core cell; a 2 rad step keeps both values exactly beyond one grid cell.
    from metalay.design.phase import PhaseMap

    g = np.linspace(-10.0, 10.0, 41)  # 0.5 um grid; the core sits at a grid node
    X, Y = np.meshgrid(g, g)
    vortex = PhaseMap(np.angle(np.exp(2j * np.arctan2(Y, X))), -10.0, 10.0, -10.0, 10.0, source="test")
    t = np.linspace(0, 2 * np.pi, 721)
    for r in (2.0, 6.0):
        ph = vortex.phase(r * np.cos(t), r * np.sin(t), wavelength_nm=532.0, sigma=1)
        d = np.angle(np.exp(1j * np.diff(ph)))
        assert round(d.sum() / (2 * np.pi), 6) == 2.0
    rng = np.random.default_rng(3)
    x, y = rng.uniform(-9, 9, 4000), rng.uniform(-9, 9, 4000)
    far = np.hypot(x, y) > 1.5
    err = np.angle(np.exp(1j * (vortex.phase(x, y, wavelength_nm=532.0, sigma=1) - 2 * np.arctan2(y, x))))
    # bilinear sampling of a 2-turn spiral on a 0.5 um grid: error ~ (0.5 um)^2 |curvature| / 8
    assert np.max(np.abs(err[far])) < 0.06
    step = PhaseMap(np.where(X > 0.1, 2.0, 0.0), -10.0, 10.0, -10.0, 10.0, source="test")
    got = step.phase(x, y, wavelength_nm=532.0, sigma=1)
    assert np.allclose(got[x > 0.5 + 1e-9], 2.0, atol=1e-12) and np.allclose(got[x < 0.0], 0.0, atol=1e-12)
