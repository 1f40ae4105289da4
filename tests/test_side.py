"""Which face, which side: the sign of the written element for light arriving through the substrate or onto the
structures, and for reflection, checked by a computation that shares no code with the compiler's mapping.

The independent model (written here from the sources, not from metalay): the mask file shows the patterned face
seen from above, +z_m out of that face. Light through the substrate travels +z_m; light onto the structures
travels -z_m, and its own right-handed frame is (x_m, -y_m, -z_m); a reflected beam travels +z_m again. A circular
state of spin s is (x + i s y)/sqrt(2) in the frame of its own travel. An element whose long axis makes the angle
theta with x_m (read from the polygon's longest edge) is the Jones matrix R(-theta) diag(1, -1) R(theta) in the
fixed (x_m, y_m) basis of the transverse field (transmission and reflection alike). The far field of the elements
is the Fraunhofer sum over the written element centres; the focus of a lens is the Rayleigh-Sommerfeld phase sum.

Sources: Bomzon, Biener, Kleiner & Hasman 2002, Opt. Lett. 27, 1141 (the converted wave carries 2 s theta);
Hasman, Kleiner, Biener & Niv 2003, Appl. Phys. Lett. 82, 328 (a geometric-phase lens focuses one spin and diverges
the other); Goodman 2005, Introduction to Fourier Optics, sec. 4.2 (Fraunhofer sum) and sec. 3.5
(Rayleigh-Sommerfeld).
"""

import copy

import gdstk
import numpy as np
import pytest

from metalay.api import compile_design
from metalay.cells.library import load_library
from metalay.design.spec import load_design
from metalay.errors import DesignError

from conftest import write_toml

TRANSMISSION = {"library": "tio2-nanofin-532", "wavelength_nm": 532.0, "period_nm": 325.0}
REFLECTION = {"library": "au-antenna-825-reflect", "wavelength_nm": 825.0, "period_nm": 300.0}


def _design(lib, terms, spin, lit_from, diameter_um, optics=False):
    d = {"design": {"name": "side", "wavelength_nm": lib["wavelength_nm"], "input_spin": spin,
                    "library": lib["library"]},
         "phase": terms, "aperture": {"shape": "circle", "diameter_um": diameter_um},
         "lattice": {"kind": "square", "period_nm": lib["period_nm"]},
         "mask": {"formats": ["gds"], "label": False}, "checks": {"rules": False, "optics": optics}}
    if lit_from is not None:
        d["design"]["lit_from"] = lit_from
    return d


def _compile(tmp_path, data, name):
    design = load_design(write_toml(tmp_path / f"{name}.toml", data))
    return compile_design(design, tmp_path / name, show_progress=False)


def _elements(gds_path):
    """Centres (um) and long-axis angles (rad, [0, pi)) of the written fins, from the polygons alone."""
    (top,) = gdstk.read_gds(str(gds_path)).top_level()
    pts = np.array([p.points for p in top.polygons if p.layer == 1 and p.datatype == 0])  # (N, 4, 2) um
    centre = pts.mean(axis=1)
    e0 = pts[:, 1] - pts[:, 0]
    e1 = pts[:, 2] - pts[:, 1]
    long_edge = np.where((np.hypot(*e0.T) >= np.hypot(*e1.T))[:, None], e0, e1)
    return centre, np.mod(np.arctan2(long_edge[:, 1], long_edge[:, 0]), np.pi)


def _jones_out(theta, spin, arrives_along_plus_z):
    """Output field (N, 2) in the mask basis of ideal half-wave elements for circular input of ``spin``."""
    s = spin if arrives_along_plus_z else -spin  # (x + i s y) in the arriving frame (x, -y) is (x - i s y) here
    e_in = np.array([1.0, 1j * s]) / np.sqrt(2)
    c, d = np.cos(2 * theta), np.sin(2 * theta)
    jones = np.stack([np.stack([c, d], -1), np.stack([d, -c], -1)], -2)  # R(-t) diag(1, -1) R(t)
    return jones @ e_in


def _leaving_frame(case):
    """y sign of the leaving light's frame relative to the mask frame, and whether it arrives along +z_m."""
    return {"substrate": (1.0, True), "structures": (-1.0, False), "reflection": (1.0, False)}[case]


def _far_power(centre_um, field, u_m, v_m, wavelength_nm):
    k = 2 * np.pi / (wavelength_nm * 1e-3)
    ph = np.exp(-1j * k * (np.outer(u_m, centre_um[:, 0]) + np.outer(v_m, centre_um[:, 1])))
    amp = ph @ field  # (P, 2)
    return np.sum(np.abs(amp) ** 2, axis=1), amp


CASES = [("substrate", TRANSMISSION), ("structures", TRANSMISSION), ("reflection", REFLECTION)]


@pytest.mark.parametrize("case,lib", CASES, ids=[c for c, _ in CASES])
@pytest.mark.parametrize("spin", [1, -1])
def test_tilt_deflects_to_the_designed_side_for_each_face_and_spin(tmp_path, case, lib, spin):
    # A tilt of 12 deg towards azimuth 30 deg in the leaving light's frame. The designed spin must come out at
    # azimuth 30 deg, the other spin at 210 deg (the conjugate phase), with the polarisation the geometric phase
    # predicts: helicity flipped in transmission, kept by the converted part in reflection (in the frame of travel).
    lit = "structures" if case == "reflection" else case
    data = _design(lib, [{"kind": "tilt", "angle_deg": 12.0, "azimuth_deg": 30.0}], spin, lit, 14.0)
    res = _compile(tmp_path, data, "tilt")
    assert res.manifest["illumination"]["lit_from"] == lit
    centre, theta = _elements(res.files["gds"])
    y_sign, plus_z = _leaving_frame(case)
    az = np.radians(np.arange(0.0, 360.0, 1.0))
    s = np.sin(np.radians(12.0))
    u_b, v_b = s * np.cos(az), s * np.sin(az)
    for probe_spin, want_deg in ((spin, 30.0), (-spin, 210.0)):
        field = _jones_out(theta, probe_spin, plus_z)
        power, amp = _far_power(centre, field, u_b, y_sign * v_b, lib["wavelength_nm"])
        k = int(np.argmax(power))
        assert abs((np.degrees(az[k]) - want_deg + 180) % 360 - 180) <= 1.0, (case, spin, probe_spin)
        # polarisation of the peak in the leaving frame: (E_x, y_sign E_y) -> helicity components
        ex, ey = amp[k, 0], y_sign * amp[k, 1]
        hel = {h: abs(ex - 1j * h * ey) ** 2 / 2 for h in (1, -1)}
        expect = probe_spin if case == "reflection" else -probe_spin
        assert hel[expect] > 0.99 * (hel[1] + hel[-1])


@pytest.mark.parametrize("case,lib", CASES, ids=[c for c, _ in CASES])
def test_lens_focuses_the_designed_spin_and_diverges_the_other(tmp_path, case, lib):
    # Hasman et al. 2003: the geometric-phase lens written for spin s focuses s and diverges -s. The focus is
    # probed at distance f along the light's travel by the Rayleigh-Sommerfeld phase sum over the written elements.
    f_um, d_um = 60.0, 24.0
    lit = "structures" if case == "reflection" else case
    res = _compile(tmp_path, _design(lib, [{"kind": "lens", "focal_length_um": f_um}], 1, lit, d_um), "lens")
    centre, theta = _elements(res.files["gds"])
    _, plus_z = _leaving_frame(case)
    k = 2 * np.pi / (lib["wavelength_nm"] * 1e-3)
    kernel = np.exp(1j * k * np.sqrt(np.sum(centre ** 2, axis=1) + f_um ** 2))
    ratio = {}
    for probe_spin in (1, -1):
        field = _jones_out(theta, probe_spin, plus_z)
        focus = np.sum(np.abs(kernel @ field) ** 2)
        ratio[probe_spin] = focus / len(centre) ** 2  # 1 = every element in phase at the focus
    assert ratio[1] > 0.8, (case, ratio)
    assert ratio[-1] < 0.05, (case, ratio)


@pytest.mark.parametrize("case,lib", CASES, ids=[c for c, _ in CASES])
def test_optics_check_agrees_with_the_independent_sign(tmp_path, case, lib):
    # The optical check (decode -> frame of the leaving light -> Jones -> FFT) must find the tilt where the
    # independent model above puts it: towards azimuth 30 deg in the leaving light's frame.
    lit = "structures" if case == "reflection" else case
    data = _design(lib, [{"kind": "tilt", "angle_deg": 12.0, "azimuth_deg": 30.0}], 1, lit, 14.0, optics=True)
    res = _compile(tmp_path, data, "tiltcheck")
    f = res.manifest["checks"]["optics"]["figures"]
    pu, pv = f["designed_spot_position"]["measured"]
    assert np.degrees(np.arctan2(pv, pu)) == pytest.approx(30.0, abs=1.0)
    assert f["illumination"]["lit_from"] == lit
    assert f["far_field"]["fractions_of_designed_polarization"]["designed"] > 0.8  # small aperture: wide lobes


def test_vortex_mask_is_the_same_from_either_face_but_a_tilt_is_mirrored(tmp_path):
    # The winding of theta is mirror-invariant (a vortex writes the same mask for either side); a tilt is not.
    def fins(terms, lit, name):
        res = _compile(tmp_path, _design(TRANSMISSION, terms, 1, lit, 10.0), name)
        centre, theta = _elements(res.files["gds"])
        order = np.lexsort((centre[:, 0], centre[:, 1]))
        return centre[order], theta[order]

    vortex = [{"kind": "vortex", "charge": 3}]
    (ca, ta), (cb, tb) = fins(vortex, "substrate", "va"), fins(vortex, "structures", "vb")
    assert np.array_equal(ca, cb)
    assert np.max(np.abs(np.angle(np.exp(2j * (ta - tb))))) < np.radians(1.0)
    tilt = [{"kind": "tilt", "angle_deg": 5.0, "azimuth_deg": 30.0}]
    (ca, ta), (cb, tb) = fins(tilt, "substrate", "ta"), fins(tilt, "structures", "tb")
    # structures side: theta_m(x, y) = -theta_substrate(x, -y) (mirrored element)
    index_a = {(round(x * 1000), round(y * 1000)): k for k, (x, y) in enumerate(ca)}
    mirror = np.array([index_a[(round(x * 1000), round(-y * 1000))] for x, y in cb])
    assert np.max(np.abs(np.angle(np.exp(2j * (tb + ta[mirror]))))) < np.radians(1.5)
    assert np.max(np.abs(np.angle(np.exp(2j * (tb - ta))))) > np.radians(30.0)


def test_library_records_its_side_and_the_design_key_is_checked(tmp_path):
    # The bundled transmission libraries are solved with light from their incident medium: fused silica below the
    # fins (through the substrate); the slot film is lit from air (onto the structures); reflection: structures.
    assert load_library("tio2-nanofin-532").side == "substrate"
    assert load_library("asi-nanofin-1550").side == "substrate"
    assert load_library("au-slot-1550").side == "structures"
    assert load_library("au-antenna-825-reflect").side == "structures"
    res = _compile(tmp_path, _design(TRANSMISSION, [{"kind": "vortex", "charge": 1}], 1, None, 6.0), "dflt")
    ill = res.manifest["illumination"]
    assert ill["lit_from"] == "substrate" and ill["source"] == "library" and "through the substrate" in ill["in_words"]
    bad = _design(REFLECTION, [{"kind": "vortex", "charge": 1}], 1, "substrate", 6.0)
    with pytest.raises(DesignError, match=r"design\.lit_from.*reflection library.*allowed: 'structures'"):
        _compile(tmp_path, bad, "bad")
    wrong = copy.deepcopy(bad)
    wrong["design"]["lit_from"] = "top"
    with pytest.raises(DesignError, match=r"design\.lit_from.*'top'.*substrate.*structures"):
        load_design(write_toml(tmp_path / "w.toml", wrong))


def test_library_file_key_lit_from_is_written_read_and_checked(tmp_path):
    # The loader's default is derived from the stack (FORMAT.md); save_library writes the side, so a library built or
    # saved now states it; an explicit key wins and a wrong one is one clear error.
    import json
    from dataclasses import replace

    from metalay.cells.library import save_library
    from metalay.errors import LibraryError

    lib = load_library("tio2-nanofin-532")
    save_library(replace(lib, lit_from=None), tmp_path)
    path = tmp_path / "tio2-nanofin-532.library.json"
    data = json.loads(path.read_text())
    assert data["lit_from"] == "substrate"
    data["lit_from"] = "structures"  # stated in the file: wins over the stack
    path.write_text(json.dumps(data))
    assert load_library(path).side == "structures"
    data["lit_from"] = "below"
    path.write_text(json.dumps(data))
    with pytest.raises(LibraryError, match=r"lit_from.*'below'.*substrate.*structures"):
        load_library(path)
    refl = load_library("au-antenna-825-reflect")
    save_library(refl, tmp_path)
    rpath = tmp_path / "au-antenna-825-reflect.library.json"
    rdata = json.loads(rpath.read_text())
    assert rdata["lit_from"] == "structures"
    rdata["lit_from"] = "substrate"
    rpath.write_text(json.dumps(rdata))
    with pytest.raises(LibraryError, match="reflection library is lit from the structure side"):
        load_library(rpath)
