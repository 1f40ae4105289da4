"""RCWA solver against outside references (tmm, grcwa) and physical invariants."""

import numpy as np
import pytest

from metalay.cells.rcwa import Layer, Stack, ellipse_pattern, jones_circular, rect_pattern, solve, uniform_pattern

tmm = pytest.importorskip("tmm")


def _tmm_stack(n_list, d_list, wl, theta_deg, pol):
    r = tmm.coh_tmm(pol, n_list, d_list, np.deg2rad(theta_deg), wl)
    n_in, n_out = n_list[0], n_list[-1]
    cos_out = r["th_list"][-1]
    # power-normalised amplitude: |t|^2 = T (tmm's T = |t|^2 Re(n_out cos_out) / Re(n_in cos_in))
    fac = (n_out * np.cos(cos_out)).real / (n_in * np.cos(np.deg2rad(theta_deg))).real
    return r["t"] * np.sqrt(fac), r["r"], r["R"], r["T"]


@pytest.mark.parametrize("theta_deg", [0.0, 35.0])
@pytest.mark.parametrize("patterned_path", [False, True])
def test_multilayer_matches_tmm(theta_deg, patterned_path):
    # Source: Byrnes 2016, tmm package (arXiv:1603.02720), transfer matrices for thin films
    wl = 633.0
    n_list = [1.0, 2.1, 1.38, 3.5 + 0.01j, 1.5]
    d_list = [np.inf, 120.0, 80.0, 50.0, np.inf]
    p = 300.0
    layers = []
    for n, d in zip(n_list[1:-1], d_list[1:-1]):
        eps = np.array([n**2])
        layers.append(Layer(d, uniform_pattern(eps, p, p) if patterned_path else eps))
    st = Stack(np.array([1.0]), tuple(layers), np.array([1.5**2]), p, p)
    res = solve(st, wl, harmonics=(2, 2), theta_deg=theta_deg, phi_deg=20.0)
    for i, pol in enumerate("ps"):
        t, r, big_r, big_t = _tmm_stack(n_list, d_list, wl, theta_deg, pol)
        assert abs(res.t_jones[0, i, i] - t) < 1e-8
        # tmm's r_p has the opposite sign to our tangential-field convention for p (Byrnes 2016, sec. on r_p)
        assert abs(res.r_jones[0, i, i] - (-r if pol == "p" else r)) < 1e-8
        assert abs(res.power_t[0, i] - big_t) < 1e-8 and abs(res.power_r[0, i] - big_r) < 1e-8
        assert abs(res.t_jones[0, 1 - i, i]) < 1e-10       # no polarisation conversion in isotropic films


def test_single_slab_airy():
    # Source: Born and Wolf, Principles of Optics, sec. 1.6.4: slab transmission
    # t = t12 t23 e^{i b}/(1 + r12 r23 e^{2ib})
    wl, n, d = 800.0, 2.0, 173.0
    b = 2 * np.pi * n * d / wl
    r12, r23 = (1 - n) / (1 + n), (n - 1.5) / (n + 1.5)
    t12, t23 = 2 / (1 + n), 2 * n / (n + 1.5)
    t = t12 * t23 * np.exp(1j * b) / (1 + r12 * r23 * np.exp(2j * b)) * np.sqrt(1.5)
    res = solve(Stack(np.array([1.0]), (Layer(d, np.array([n**2])),), np.array([2.25]), 500.0, 500.0), wl,
                harmonics=(1, 1))
    assert abs(res.t_jones[0, 0, 0] - t) < 1e-10 and abs(res.t_jones[0, 1, 1] - t) < 1e-10


def _pillar(length, width, eps_in=4.0, h=300.0, p=400.0, eps_sub=1.45**2):
    return Stack(np.array([1.0]), (Layer(h, rect_pattern(length, width, eps_in, 1.0, p, p)),),
                 np.array([eps_sub]), p, p)


def test_energy_conservation_lossless():
    # Source: Poynting's theorem; R + T = 1 for lossless media (all orders counted)
    st = _pillar(np.array([250.0, 120.0]), np.array([120.0, 300.0]), eps_in=2.45**2)
    for theta in (0.0, 25.0):
        res = solve(st, 532.0, harmonics=(4, 4), theta_deg=theta, phi_deg=10.0)
        assert np.max(np.abs(res.power_t + res.power_r - 1)) < 1e-6


def test_symmetry_square_and_swap():
    # Source: symmetry of Maxwell's equations under the mirror x <-> y (Common practice (no source))
    res = solve(_pillar(np.array([180.0, 250.0, 110.0]), np.array([180.0, 110.0, 250.0])), 633.0, harmonics=(4, 4))
    t = res.t_jones
    assert abs(t[0, 0, 0] - t[0, 1, 1]) < 1e-10
    assert abs(t[1, 0, 0] - t[2, 1, 1]) < 1e-10 and abs(t[1, 1, 1] - t[2, 0, 0]) < 1e-10
    assert abs(t[1, 0, 0] - t[1, 1, 1]) > 1e-2        # the rectangle really is birefringent


def test_batch_equals_loop():
    lengths = np.array([150.0, 250.0, 200.0])
    batch = solve(_pillar(lengths, 100.0), 633.0, harmonics=(3, 3), batch_chunk=2).t_jones
    for i, length in enumerate(lengths):
        one = solve(_pillar(length, 100.0), 633.0, harmonics=(3, 3)).t_jones[0]
        assert np.max(np.abs(batch[i] - one)) < 1e-12


def test_absorbing_layer_reduces_power():
    st = Stack(np.array([1.0]), (Layer(200.0, rect_pattern(200.0, 100.0, (0.4 + 3j) ** 2, 1.0, 400.0, 400.0)),),
               np.array([2.25]), 400.0, 400.0)
    res = solve(st, 800.0, harmonics=(3, 3))
    tot = res.power_t + res.power_r
    assert np.all(tot < 1 - 1e-3) and np.all(tot > 0)


grcwa = pytest.importorskip("grcwa")


def _grcwa_zero_order(length, width, eps_in, m, wl=633.0, p=400.0, h=300.0, eps_sub=1.45**2, ng=600):
    """Zeroth-order E_x (p input) and E_y (s input) at the top of the substrate, from grcwa."""
    grcwa.set_backend("numpy")
    obj = grcwa.obj((2 * m + 1) ** 2, [p / 1000, 0], [0, p / 1000], 1000 / wl, 0.0, 0.0, verbose=0)
    obj.Add_LayerUniform(0.1, 1.0)
    obj.Add_LayerGrid(h / 1000, ng, ng)
    obj.Add_LayerUniform(0.1, eps_sub)
    obj.Init_Setup(Gmethod=1)
    x = (np.arange(ng) + 0.5) / ng * p - p / 2
    xx, yy = np.meshgrid(x, x, indexing="ij")
    obj.GridLayer_geteps(np.where((np.abs(xx) < length / 2) & (np.abs(yy) < width / 2), eps_in, 1.0).ravel())
    out = []
    for pa, sa, comp in ((1, 0, 0), (0, 1, 1)):
        obj.MakeExcitationPlanewave(pa, 0, sa, 0, order=0)
        e, _ = obj.Solve_FieldFourier(2, 0.0)
        out.append(e[comp][0])
    return np.array(out)


@pytest.mark.parametrize("eps_in", [2.0**2, 2.45**2])
def test_rect_pillar_matches_grcwa(eps_in):
    # Source: Liu and Fan 2012, Comput. Phys. Commun. 183, 2233 (S4) / grcwa (Jin et al. 2020, ACS Photonics 7, 2350)
    # Reference-plane conventions cancel in the ratio to a uniform film computed by each code.
    # With Laurent's rule at matched truncation the two codes solve the same truncated problem; the residual is
    # grcwa's FFT of a 600 x 600 sampled permittivity (aliasing of O(M/600)) -> tolerance 3e-3.
    m = 3
    g = _grcwa_zero_order(260.0, 120.0, eps_in, m)
    g0 = _grcwa_zero_order(260.0, 120.0, 1.0 + 1e-9, m)
    ours = solve(_pillar(260.0, 120.0, eps_in), 633.0, harmonics=(m, m), factorization="laurent").t_jones[0]
    ours0 = solve(_pillar(260.0, 120.0, 1.0), 633.0, harmonics=(m, m)).t_jones[0]
    ratio_ours = np.array([ours[0, 0] / ours0[0, 0], ours[1, 1] / ours0[1, 1]])
    assert np.max(np.abs(ratio_ours - g / g0)) < 3e-3
    # Li's factorisation converges to the same limit much faster (Li 1997, JOSA A 14, 2758): the gap between our
    # Li result and grcwa shrinks when the truncation grows from 3 to 5 (grcwa still moves ~2e-2 there, measured).
    gaps = []
    for mm in (3, 5):
        g = _grcwa_zero_order(260.0, 120.0, eps_in, mm) / _grcwa_zero_order(260.0, 120.0, 1.0 + 1e-9, mm)
        li = solve(_pillar(260.0, 120.0, eps_in), 633.0, harmonics=(mm, mm)).t_jones[0]
        gaps.append(np.max(np.abs(np.array([li[0, 0] / ours0[0, 0], li[1, 1] / ours0[1, 1]]) - g)))
    assert gaps[1] < gaps[0] < 0.25


def test_li_converges_faster_than_laurent():
    # Source: Li 1996, JOSA A 13, 1870; Lalanne and Morris 1996, JOSA A 13, 779 (faster convergence of TM-like
    # field with the correct factorisation). Reference: Li at (9, 9) harmonics.
    st = _pillar(250.0, 85.0, 2.45**2, h=600.0, p=325.0)
    ref = solve(st, 532.0, harmonics=(9, 9)).t_jones[0, 1, 1]
    err_li = abs(solve(st, 532.0, harmonics=(5, 5)).t_jones[0, 1, 1] - ref)
    err_la = abs(solve(st, 532.0, harmonics=(5, 5), factorization="laurent").t_jones[0, 1, 1] - ref)
    assert err_li < 0.3 * err_la


def test_convergence_monotone_in_amplitude():
    # The error against a finer truncation shrinks monotonically over doubling steps (Li factorisation),
    # dielectric TiO2-like fin of the bundled visible library; the (6, 6) default is converged to 1e-3 in |t|.
    st = Stack(np.array([1.4607**2]), (Layer(600.0, rect_pattern(250.0, 85.0, 2.45**2, 1.0, 325.0, 325.0)),),
               np.array([1.0]), 325.0, 325.0)
    ts = {m: np.diagonal(solve(st, 532.0, harmonics=(m, m)).t_jones[0]) for m in (2, 4, 6, 8)}
    err = [np.max(np.abs(np.abs(ts[m]) - np.abs(ts[8]))) for m in (2, 4, 6)]
    assert err[0] > err[1] > err[2]
    assert err[2] < 1e-3


def test_ellipse_staircase_circle_converges_to_isotropic():
    # A circle has t_xx = t_yy at normal incidence (C4 symmetry). Our staircase slices along y only, so the
    # anisotropy it introduces must vanish as the number of stairs grows (measured 9e-3, 3e-3, 1e-3 for 4, 8, 16).
    p = 400.0
    gaps = []
    for n in (4, 8, 16):
        st = Stack(np.array([2.25]), (Layer(400.0, ellipse_pattern(200.0, 200.0, 4.0, 1.0, p, p, n_stairs=n)),),
                   np.array([1.0]), p, p)
        t = solve(st, 800.0, harmonics=(4, 4)).t_jones[0]
        gaps.append(abs(t[0, 0] - t[1, 1]))
    assert gaps[0] > gaps[1] > gaps[2] and gaps[2] < 2e-3


def test_half_wave_plate_jones_algebra():
    # Source: Jones calculus (Jones 1941, JOSA 31, 488): for J = R(-theta) diag(tl, ts) R(theta) and circular input,
    # the cross-polarised power equals |(tl - ts)/2|^2 (design notes). Checked against explicit matrix algebra.
    res = solve(_pillar(250.0, 85.0, 2.45**2, h=600.0, p=325.0), 532.0, harmonics=(4, 4))
    tl, ts = res.t_jones[0, 0, 0], res.t_jones[0, 1, 1]
    conv, leak = jones_circular(tl, ts)
    theta = 0.37
    rot = np.array([[np.cos(theta), np.sin(theta)], [-np.sin(theta), np.cos(theta)]])
    j = rot.T @ np.diag([tl, ts]) @ rot
    sig = np.array([1, 1j]) / np.sqrt(2)
    out = j @ sig
    cross = np.vdot(np.array([1, -1j]) / np.sqrt(2), out)
    assert abs(abs(cross) ** 2 - abs(conv) ** 2) < 1e-12
    assert abs(cross - conv * np.exp(2j * theta)) < 1e-12
    # energy: converted + leakage = (|tl|^2 + |ts|^2)/2
    assert abs(abs(conv) ** 2 + abs(leak) ** 2 - (abs(tl) ** 2 + abs(ts) ** 2) / 2) < 1e-12
