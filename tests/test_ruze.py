"""Ruze check of the tolerance Monte Carlo (metalay.studies.study): random rotation errors and missing elements.

Source: Ruze 1966, Proc. IEEE 54, 633 ("Antenna tolerance theory - a review"): uncorrelated Gaussian phase errors
of variance delta^2 keep a fraction exp(-delta^2) of the coherent (on-axis, designed-order) power; the rest is
scattered incoherently. A rotation error s of a geometric-phase element is a phase error 2 s (Bomzon et al. 2002,
Opt. Lett. 27, 1141: converted phase 2 sigma theta), so the factor is exp(-(2 s)^2). Missing elements (probability
m, left as bare substrate that does not convert) keep (1 - m) of the coherent amplitude, so (1 - m)^2 of the
power (the thinned-array result, Ruze 1966 sec. on random element failures; derived in
metalay.studies.study.tolerance_study). The design is an invented test scenario (a blazed grating, 8 deg at 532 nm).

Tolerances come from the sample count: the mean of K samples is compared with the law within 4 standard errors
(measured from the K samples themselves; the seed is fixed, so the outcome is deterministic), and the test
also shows that the wrong laws (exp(-s^2) without the geometric-phase factor 2; 1 - m instead of (1 - m)^2) lie
many standard errors away at the larger errors, so it can fail.
"""

import copy
import math

import numpy as np
import pytest

from metalay.api import compile_design
from metalay.cells.library import load_library
from metalay.design.spec import parse_design
from metalay.studies import study

DESIGN = {
    "design": {"name": "t-ruze", "wavelength_nm": 532.0, "input_spin": 1, "library": "tio2-nanofin-532"},
    "phase": [{"kind": "tilt", "angle_deg": 8.0}],
    "aperture": {"shape": "circle", "diameter_um": 30.0},
    "lattice": {"kind": "square", "period_nm": 325.0},
    "mask": {"formats": ["gds"]},
    "checks": {"rules": False, "optics": False},
}
SAMPLES = 40
SEED = 20260519
K_SEM = 4.0


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    root = tmp_path_factory.mktemp("ruze")
    design = parse_design(copy.deepcopy(DESIGN), where=str(root / "d.toml"))
    res = compile_design(design, root / "mask", show_progress=False, run_rules=False, run_optics=False)
    return study.site_model(res.files["gds"], load_library("tio2-nanofin-532"), design)


def _incoherent(model):
    """Sum |c_k|^2 / N_ill^2 (mode) and the per-cell incoherent power landing in the designed spot disk."""
    tl, ts = model.library.response_at(532.0)
    c2 = np.abs(0.5 * (tl - ts)[model.decoded.cell]) ** 2
    n_ill = model.expected_ij[0].size
    nominal = study.evaluate_sites(model)
    # incoherently scattered light fills the lattice's Brillouin zone, (lambda / p)^2 in direction cosines,
    # uniformly for uncorrelated errors; the spot disk of radius (2.5 lambda / D) catches its share
    lam_over_p = 532.0 / 325.0
    d_um = 2 * math.sqrt(n_ill * 0.325 ** 2 / math.pi)
    r_u = 2.5 * 0.532 / d_um
    share = math.pi * r_u ** 2 / lam_over_p ** 2
    return nominal, float(c2.sum()) / n_ill ** 2, float(c2.sum()) / n_ill * share


def _run(model, settings):
    seeds = np.random.SeedSequence(SEED).spawn(SAMPLES)
    rows = [study._sample(model, settings, q, False) for q in seeds]
    mode = np.array([r["designed_mode_efficiency"] for r in rows])
    spot = np.array([r["designed_spot_efficiency"] for r in rows])
    return mode, spot, rows


def _sem(v):
    return v.std(ddof=1) / math.sqrt(v.size)


@pytest.mark.parametrize("s_rad", [0.05, 0.1, 0.2, 0.3])
def test_rotation_errors_follow_ruze(model, s_rad):
    nominal, incoh_mode, incoh_spot = _incoherent(model)
    rho = math.exp(-(2 * s_rad) ** 2)
    mode, spot, _ = _run(model, study.ToleranceSettings(samples=SAMPLES, rotation_sd_deg=math.degrees(s_rad)))
    eta0, spot0 = nominal["designed_mode_efficiency"], nominal["designed_spot_efficiency"]
    exp_mode = rho * eta0 + (1 - rho) * incoh_mode
    exp_spot = rho * spot0 + (1 - rho) * incoh_spot
    assert abs(mode.mean() - exp_mode) < K_SEM * _sem(mode) + 1e-5
    assert abs(spot.mean() - exp_spot) < K_SEM * _sem(spot) + 1e-5
    # the mean relative efficiency of the designed order is the Ruze factor (N large: the remainder is < 1e-3)
    assert abs(spot.mean() / spot0 - rho) < K_SEM * _sem(spot) / spot0 + 2e-3
    if s_rad >= 0.2:  # the law without the geometric-phase factor 2 is rejected
        wrong = math.exp(-s_rad ** 2) * eta0
        assert abs(mode.mean() - wrong) > 10 * K_SEM * _sem(mode)


@pytest.mark.parametrize("m", [0.05, 0.15, 0.3, 0.5])
def test_missing_elements_follow_the_thinned_array_law(model, m):
    nominal, incoh_mode, incoh_spot = _incoherent(model)
    mode, spot, rows = _run(model, study.ToleranceSettings(samples=SAMPLES, missing_fraction=m))
    eta0, spot0 = nominal["designed_mode_efficiency"], nominal["designed_spot_efficiency"]
    # E|sum_kept c|^2 = (1 - m)^2 |sum c|^2 + m (1 - m) sum |c|^2; the bare substrate adds only unconverted light
    exp_mode = (1 - m) ** 2 * eta0 + m * (1 - m) * incoh_mode
    assert abs(mode.mean() - exp_mode) < K_SEM * _sem(mode) + 1e-5
    assert abs(spot.mean() / spot0 - (1 - m) ** 2) < K_SEM * _sem(spot) / spot0 + m * (1 - m) * incoh_spot / spot0 \
        + 2e-3
    assert abs(mode.mean() - (1 - m) * eta0) > 10 * K_SEM * _sem(mode)  # not 1 - m
    frac = np.mean([r["missing"] for r in rows]) / len(model.decoded)
    assert frac == pytest.approx(m, abs=4 * math.sqrt(m * (1 - m) / (len(model.decoded) * SAMPLES)))
