"""`metalay charge read | aperture | simulate`: the charge from camera image files (fork, spiral, triangle), the
sign conventions and what flips them, exit codes, one-line errors, and the triangular aperture mask read back by
gdstk and put through an independent far-field simulation."""

import json
from pathlib import Path

import gdstk
import numpy as np
import pytest
import scipy.fft as sfft

from metalay.cli import main
from metalay.measure import camerasim

ROOT = Path(__file__).resolve().parent.parent
SPEC = ROOT / "examples" / "measure" / "triangle-aperture-1550.toml"


def _scene(tmp_path, name, method, charge, setup, *, fmt="png", bits=8, seed=1):
    """An image file of a simulated scene (camerasim: formulas independent of the readers)."""
    shape = (320, 320)
    if method == "fork":
        inten = camerasim.fork_scene(shape, charge, ring_radius_px=60.0, fringe_period_px=6.0, azimuth_deg=setup,
                                     center_px=(14.0, -9.0), reference_waist_px=250.0)
    elif method == "spiral":
        inten = camerasim.spiral_scene(shape, charge, ring_radius_px=60.0, rings_to_edge=10.0, center_px=(-8.0, 6.0),
                                       diverging=setup == "diverging")
    else:
        inten = camerasim.triangle_scene(shape, charge, spot_scale_px=7.0, apex_deg=setup, center_px=(10.0, 5.0))
    cam = camerasim.CameraModel(bits=bits)
    img = camerasim.expose(inten, cam, np.random.default_rng(seed))
    path = tmp_path / f"{name}.{'png' if fmt == 'png' else 'tif'}"
    path.write_bytes(camerasim.encode_image(img, fmt))
    return path


_OPT = {"fork": "--reference-azimuth-deg", "spiral": "--reference", "triangle": "--apex-deg"}


def _read(path, method, setup, *extra):
    return ["charge", "read", str(path), "--method", method, _OPT[method], str(setup), "--json", *extra]


@pytest.mark.parametrize("method, charge, setup, fmt, bits", [
    # Source: Heckenberg et al. 1992, Opt. Quantum Electron. 24, S951 (fork: |l| extra fringes at the core)
    ("fork", 3, 20.0, "png", 8),
    ("fork", -5, 200.0, "tiff", 16),
    # Source: Harris et al. 1994, Opt. Commun. 106, 161 (spiral interferogram: |l| arms)
    ("spiral", -2, "diverging", "png", 16),
    ("spiral", 4, "converging", "tiff", 16),
    # Source: Hickmann et al. 2010, Phys. Rev. Lett. 105, 053904 (|l| + 1 spots per side of the triangle)
    ("triangle", 4, 90.0, "png", 8),
    ("triangle", -3, -35.0, "tiff", 16),
])
def test_read_prints_the_charge_of_simulated_images(tmp_path, capsys, method, charge, setup, fmt, bits):
    path = _scene(tmp_path, "img", method, charge, setup, fmt=fmt, bits=bits)
    code = main(_read(path, method, setup))
    out = json.loads(capsys.readouterr().out)
    assert code == 0 and out["status"] == "ok" and out["charge"] == charge and out["method"] == method
    assert out["image"]["max"] <= 2 ** bits - 1 and out["exit_code"] == 0 and "laser-safety" in out["caution"]


@pytest.mark.parametrize("method, setup, wrong", [
    ("fork", 90.0, 270.0),             # the reference tilted the other way
    ("spiral", "diverging", "converging"),  # the other curvature of the reference
    ("triangle", 90.0, 270.0),         # the aperture turned by 180 degrees
])
def test_the_set_up_that_flips_the_sign(tmp_path, capsys, method, setup, wrong):
    # Conventions (README "Charge from a camera image"): with the wrong reference side, curvature or apex the
    # same image reads -l; a single mirror between beam and camera flips it too (here --mirror x applied to an
    # unmirrored frame plays that mirror).  A test that fails if any of these conventions were flipped.
    path = _scene(tmp_path, "img", method, 2, setup, seed=3)
    readings = []
    for s, extra in ((setup, ()), (wrong, ()), (setup, ("--mirror", "x"))):
        assert main(_read(path, method, s, *extra)) == 0
        readings.append(json.loads(capsys.readouterr().out)["charge"])
    # a left-right mirror turns l into -l and keeps the set-up directions chosen here (90 deg stays 90 deg)
    assert readings == [2, -2, -2]


def test_unreadable_image_exits_1_and_gives_no_charge(tmp_path, capsys):
    # a blank frame: no fringes, no spots -> "unreadable", never a number
    from PIL import Image

    path = tmp_path / "blank.png"
    Image.fromarray(np.full((64, 64), 17, np.uint8)).save(path)
    for method, setup in (("fork", 0.0), ("spiral", "diverging"), ("triangle", 90.0)):
        assert main(_read(path, method, setup)) == 1
        out = json.loads(capsys.readouterr().out)
        assert out["status"] == "unreadable" and out["charge"] is None and out["reason"]
    assert main(["charge", "read", str(path), "--method", "fork", "--reference-azimuth-deg", "0"]) == 1
    text = capsys.readouterr().out
    assert "charge: none" in text and "status: unreadable" in text


@pytest.mark.parametrize("argv, text", [
    (["--method", "fork"], "needs --reference-azimuth-deg"),
    (["--method", "spiral", "--reference", "diverging", "--apex-deg", "10"], "--apex-deg applies to --method "
                                                                            "triangle only"),
    (["--method", "triangle", "--apex-deg", "400"], "allowed -360..360"),
    (["--method", "fork", "--reference-azimuth-deg", "0", "--max-pixels", "100"], "exceeds the limit of 100"),
])
def test_read_bad_options_are_one_line_errors(tmp_path, capsys, argv, text):
    path = _scene(tmp_path, "img", "fork", 1, 0.0)
    assert main(["charge", "read", str(path), *argv]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and text in err


def test_read_bad_files_are_one_line_errors(tmp_path, capsys):
    bad = tmp_path / "broken.png"
    bad.write_bytes(b"\x89PNG\r\n\x1a\n" + b"\x00" * 40)
    gif = tmp_path / "frame.gif"
    from PIL import Image

    Image.fromarray(np.zeros((20, 20), np.uint8)).save(gif)
    for path, text in ((tmp_path / "missing.png", "not found"), (bad, "broken.png"), (gif, "PNG or TIFF")):
        assert main(["charge", "read", str(path), "--method", "spiral", "--reference", "diverging"]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and str(path.name) in err and text in err


def test_simulate_then_read_round_trip(tmp_path, capsys):
    out = tmp_path / "sim.tiff"
    assert main(["charge", "simulate", "--method", "spiral", "--reference", "converging", "--charge", "-3",
                 "--bits", "16", "-o", str(out), "--seed", "4"]) == 0
    capsys.readouterr()
    first = out.read_bytes()
    assert main(["charge", "simulate", "--method", "spiral", "--reference", "converging", "--charge", "-3",
                 "--bits", "16", "-o", str(out), "--seed", "4"]) == 0
    assert out.read_bytes() == first  # same seed, same bytes
    capsys.readouterr()
    assert main(_read(out, "spiral", "converging")) == 0
    assert json.loads(capsys.readouterr().out)["charge"] == -3
    assert main(["charge", "simulate", "--method", "fork", "--reference-azimuth-deg", "0", "--charge", "1", "-o",
                 str(tmp_path / "x.jpg")]) == 2
    assert ".png, .tif or .tiff" in capsys.readouterr().err


def _equilateral(v):
    sides = np.hypot(*(np.roll(v, -1, axis=0) - v).T)
    return sides


def test_aperture_spec_writes_an_equilateral_triangle_read_back_by_gdstk(tmp_path, capsys):
    out = tmp_path / "tri"
    assert main(["charge", "aperture", str(SPEC), "-o", str(out)]) == 0
    assert "read back: identical" in capsys.readouterr().out
    m = json.loads((out / "manifest.json").read_text())
    assert set(m["files"]) == {"triangle-1550.gds", "triangle-1550.oas"} and "laser-safety" in m["caution"]
    for name in m["files"]:  # gdstk reads both formats independently of metalay's reader
        lib = gdstk.read_gds(str(out / name)) if name.endswith(".gds") else gdstk.read_oas(str(out / name))
        polys = lib.top_level()[0].polygons
        assert len(polys) == 1 and (polys[0].layer, polys[0].datatype) == (30, 0)
        v = np.array(polys[0].points)
        # Common practice (no source): equilateral, side = ring diameter (ring radius / side = 0.5, the sizing
        # rule of metalay.measure.imagecharge.triangle_side_for_beam), centroid on the axis, apex towards +y
        assert np.allclose(_equilateral(v), 360.0, atol=2e-3)
        assert np.allclose(v.mean(axis=0), 0.0, atol=1e-3)
        top = v[np.argmax(v[:, 1])]
        assert top[0] == pytest.approx(0.0, abs=1e-3) and top[1] == pytest.approx(360.0 / np.sqrt(3), abs=1e-3)
    again = tmp_path / "tri2"
    assert main(["charge", "aperture", str(SPEC), "-o", str(again), "--quiet"]) == 0
    for name in ("triangle-1550.gds", "triangle-1550.oas", "manifest.json"):
        assert (again / name).read_bytes() == (out / name).read_bytes()


def test_aperture_mask_through_an_independent_far_field_reads_the_charge(tmp_path, capsys):
    # End to end: the written triangle (gdstk) rasterised here, an LG_0^l beam with its ring radius half the side
    # cut by it, the far field |FFT|^2 (Goodman 2005, Introduction to Fourier Optics, sec. 4.2) saved as a 16-bit
    # PNG, and the command reads l back.  Source: Hickmann et al. 2010 (|l| + 1 spots per side, the orientation
    # gives the sign).
    out = tmp_path / "tri"
    assert main(["charge", "aperture", "--side-um", "40", "--apex-deg", "30", "-o", str(out), "--quiet",
                 "--formats", "gds"]) == 0
    v = np.array(gdstk.read_gds(str(out / "triangle.gds")).top_level()[0].polygons[0].points)
    n, dx = 256, 40.0 * 2.4 / 256
    ax = (np.arange(n) - n // 2) * dx
    xx, yy = np.meshgrid(ax, ax)
    inside = np.ones_like(xx, dtype=bool)
    for k in range(3):  # half-planes of the counter-clockwise polygon
        (x0, y0), (x1, y1) = v[k], v[(k + 1) % 3]
        inside &= (x1 - x0) * (yy - y0) - (y1 - y0) * (xx - x0) >= 0
    for charge in (3, -3):
        w = 20.0 / np.sqrt(abs(charge) / 2)  # ring radius w sqrt(|l|/2) = 20 um = side / 2 (Allen et al. 1992)
        r = np.hypot(xx, yy) / w
        field = r ** abs(charge) * np.exp(-r * r) * np.exp(1j * charge * np.arctan2(yy, xx)) * inside
        m = 1792  # 7 far-field pixels per lambda F / side
        far = np.abs(sfft.fftshift(sfft.fft2(field, s=(m, m)))) ** 2
        crop = far[m // 2 - 160:m // 2 + 160, m // 2 - 160:m // 2 + 160][::-1]  # row 0 = +y
        img = np.rint(60000 * crop / crop.max()).astype(np.uint16)
        path = tmp_path / f"far{charge}.png"
        path.write_bytes(camerasim.encode_image(img, "png"))
        assert main(_read(path, "triangle", 30.0)) == 0
        assert json.loads(capsys.readouterr().out)["charge"] == charge


@pytest.mark.parametrize("argv, text", [
    (["--side-um", "10", "--ring-diameter-um", "20"], "exactly one of --side-um or --ring-diameter-um"),
    (["--side-um", "0"], "option --side-um = 0.0"),
    (["--side-um", "10", "--layer", "1", "70000"], "option --layer"),
    (["--side-um", "10", "--formats", "gds,dxf"], "option --formats"),
    (["--side-um", "10", "--name", "bad name"], "option --name"),
    ([str(SPEC), "--apex-deg", "10"], "cannot be combined with a spec file"),
])
def test_aperture_bad_input_is_one_line(tmp_path, capsys, argv, text):
    assert main(["charge", "aperture", *argv, "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and text in err
    assert not (tmp_path / "o").exists()


def test_aperture_spec_file_errors_name_file_and_key(tmp_path, capsys):
    spec = tmp_path / "t.toml"
    spec.write_text('[triangle_aperture]\nname = "t"\nside_um = 50.0\napex_degree = 3.0\n')
    assert main(["charge", "aperture", str(spec), "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip()
    assert "t.toml" in err and "triangle_aperture.apex_degree" in err and len(err.splitlines()) == 1
