"""The main job end to end: design file -> GDSII + OASIS + manifest, read back and checked."""

import copy
import json
import os
import subprocess
import sys
import time
from dataclasses import replace

import gdstk
import numpy as np
import pytest

from metalay.api import compile_design
from metalay.design.phase import target_phase
from metalay.design.spec import load_design, parse_design
from metalay.mask.layout import recovered_rotation
from metalay.mask.mapping import geometric_rotation, wrap_pi

from conftest import SMALL_DESIGN, write_toml


def _compile(tmp_path, data, name="out"):
    design = load_design(write_toml(tmp_path / f"{name}.toml", data))
    return design, compile_design(design, tmp_path / name, show_progress=False)


def _fins_from_gds(path):
    lib = gdstk.read_gds(str(path))
    (top,) = lib.top_level()
    pts = np.array([p.points for p in top.polygons if p.layer == 1 and p.datatype == 0])
    return np.rint(pts * 1000).astype(np.int64)


def test_compile_read_back_every_rotation(tmp_path, small_design_dict):
    design, res = _compile(tmp_path, small_design_dict)
    fins = _fins_from_gds(res.files["gds"])
    assert len(fins) == res.manifest["counts"]["sites"]
    centres = fins.mean(axis=1)
    assert np.array_equal(centres, np.rint(centres))  # centrally symmetric fins on whole-nm centres
    x_um, y_um = centres[:, 0] / 1000, centres[:, 1] / 1000
    phi = target_phase(design.terms, x_um, y_um, wavelength_nm=design.wavelength_nm, sigma=design.sigma)
    want = geometric_rotation(phi, design.sigma)
    got = recovered_rotation(fins - centres[:, None, :].astype(np.int64))
    err_deg = np.degrees(np.abs(wrap_pi(2 * (got - want))))
    assert err_deg.max() <= res.manifest["errors"]["worst_snapping_phase_error_deg"] + 1e-5
    # Common practice (no source): rounding a vertex to a 1 nm grid moves it by at most sqrt(2)/2 nm, which turns
    # a fin of half-diagonal ~140 nm (270 x 70 nm) by at most asin(0.71 / 140) = 0.29 deg: 0.58 deg of geometric phase
    assert err_deg.max() < 0.7
    # OASIS holds the same elements
    oas = gdstk.read_oas(str(res.files["oas"]))
    n = sum(max(p.repetition.size, 1) for p in oas.top_level()[0].polygons if p.layer == 1)
    assert n == len(fins)
    man = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert man["files"]["gds"]["sha256"] and man["counts"]["sites"] == len(fins)
    assert "design aid" in man["caution"]


def test_compile_is_deterministic(tmp_path, small_design_dict):
    design = load_design(write_toml(tmp_path / "d.toml", small_design_dict))
    a = compile_design(design, tmp_path / "a", show_progress=False)
    b = compile_design(load_design(tmp_path / "d.toml"), tmp_path / "b", show_progress=False)
    for key in ("gds", "oas", "manifest"):
        assert a.files[key].read_bytes() == b.files[key].read_bytes(), key


def test_levels_hierarchy_plain_references(tmp_path, small_design_dict):
    d = copy.deepcopy(small_design_dict)
    d["mask"].update({"hierarchy": "levels", "rotation_levels": 8})
    design, res = _compile(tmp_path, d)
    lib = gdstk.read_gds(str(res.files["gds"]))
    top = lib.top_level()[0]
    assert all(r.rotation == 0 and not r.x_reflection for r in top.references)
    masters = {c.name for c in lib.cells} - {top.name}
    assert 2 <= len(masters) <= 8
    flat = top.copy("flat").flatten()
    assert len([p for p in flat.polygons if p.layer == 1]) == res.manifest["counts"]["sites"]
    assert res.manifest["errors"]["worst_quantisation_phase_error_deg"] <= 180 / 8 + 1e-9


def test_hexagonal_annulus(tmp_path, small_design_dict):
    d = copy.deepcopy(small_design_dict)
    d["lattice"] = {"kind": "hexagonal", "period_nm": 340.0}
    d["aperture"] = {"shape": "annulus", "diameter_um": 20.0, "inner_diameter_um": 6.0}
    _, res = _compile(tmp_path, d)
    fins = _fins_from_gds(res.files["gds"])
    r = np.hypot(*(fins.mean(axis=1) / 1000).T)
    assert r.min() >= 3.0 and r.max() <= 10.0
    assert len(fins) == res.manifest["counts"]["sites"]


def test_warnings_period_and_aliasing(tmp_path, small_design_dict):
    # Grating equation (Born & Wolf): orders beyond zero propagate in air when p >= lambda.
    d = copy.deepcopy(small_design_dict)
    d["design"]["wavelength_nm"] = 300.0
    d["phase"] = [{"kind": "lens", "focal_length_um": 5.0}]
    _, res = _compile(tmp_path, d)
    text = " | ".join(res.warnings)
    assert "spurious diffraction orders" in text and "'air'" in text
    assert "aliased" in text
    frac = res.manifest["errors"]["aliased_site_fraction"]
    # independent estimate: |grad phi| = k r / sqrt(r^2 + f^2) > pi / p  <=>  r > r_c
    k = 2 * np.pi / 0.3
    p = 0.325
    s = np.pi / (p * k)
    r_c = 5.0 * s / np.sqrt(1 - s * s)
    # Common practice (no source): the sampled fraction approximates the area fraction of the ring r_c < r < R
    assert frac == pytest.approx(1 - (r_c / 10.0) ** 2, abs=0.05)


def test_demo_runs_from_any_directory(tmp_path):
    env = dict(os.environ)
    out = tmp_path / "demo"
    proc = subprocess.run([sys.executable, "-m", "metalay.cli", "demo", "-o", str(out), "--quiet", "--no-checks"],
                          cwd=tmp_path, capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr
    names = sorted(p.name for p in out.iterdir())
    assert names == ["demo-vortex-532.gds", "demo-vortex-532.oas", "manifest.json", "report.html", "timings.json"]
    man = json.loads((out / "manifest.json").read_text())
    assert man["counts"]["sites"] > 600_000
    assert man["design"]["echo"]["phase"][0] == {"kind": "vortex", "charge": 3}


def test_parse_design_in_memory_notebook_use():
    d = parse_design(copy.deepcopy(SMALL_DESIGN))
    assert d.sigma == 1 and d.lattice.period_nm == 325.0 and len(d.terms) == 2


def test_failed_check_leaves_no_output(tmp_path, small_design_dict):
    # all or nothing: a failure after the masks were written removes them (no partial output)
    from metalay.mask.compile import compile_mask
    from metalay.mask.steps import MaskCheck

    seen = []

    def boom(written):
        seen.append(written.path.is_file())
        raise RuntimeError("checker crashed")

    design = load_design(write_toml(tmp_path / "d.toml", small_design_dict))
    with pytest.raises(RuntimeError):
        compile_mask(design, tmp_path / "o", checks=[MaskCheck("boom", boom)], show_progress=False)
    assert seen == [True]  # the check ran on a mask that had been written
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.toml"]  # no output folder, no stage, no lock
    with pytest.raises(RuntimeError):
        compile_mask(design, tmp_path / "p" / "q", checks=[MaskCheck("boom", boom)], show_progress=False)
    assert not (tmp_path / "p").exists()  # nor the missing parents it made (issue 11 part 6)
    (tmp_path / "empty").mkdir()
    with pytest.raises(RuntimeError):
        compile_mask(design, tmp_path / "empty", checks=[MaskCheck("boom", boom)], show_progress=False)
    assert (tmp_path / "empty").is_dir() and not any((tmp_path / "empty").iterdir())  # a folder that existed stays


def test_checks_are_steps_handed_to_compile(tmp_path, small_design_dict):
    # the compile runs exactly the steps it is given, when the design enables them, and records their results
    from metalay.checks.steps import default_checks
    from metalay.mask.compile import compile_mask
    from metalay.mask.steps import MaskCheck

    design = load_design(write_toml(tmp_path / "d.toml", small_design_dict))
    steps = [MaskCheck("count", lambda w: {"status": "clean", "bytes": w.path.stat().st_size}),
             MaskCheck("off", lambda w: {"status": "never"}, enabled=lambda d: False)]
    res = compile_mask(design, tmp_path / "o", checks=steps, show_progress=False)
    assert set(res.manifest["checks"]) == {"count"}
    assert res.manifest["checks"]["count"]["bytes"] == res.files["gds"].stat().st_size
    assert [c.name for c in default_checks()] == ["rules", "optics"]
    assert [c.name for c in default_checks(rules=False)] == ["optics"]
    assert default_checks(optics=True)[1].enabled(replace(design, checks=replace(design.checks, optics=False)))
    assert not default_checks()[1].enabled(replace(design, checks=replace(design.checks, optics=False)))


def test_gds_bytes_do_not_depend_on_other_outputs(tmp_path, small_design_dict):
    # the fast record path (GDSII only) and the path that also groups shapes for OASIS write identical GDSII
    d1 = copy.deepcopy(small_design_dict)
    d1["mask"].update({"formats": ["gds"], "label": False})  # the label carries a hash of the design text
    d2 = copy.deepcopy(small_design_dict)
    d2["mask"].update({"formats": ["gds", "oas"], "label": False})
    a = compile_design(load_design(write_toml(tmp_path / "a.toml", d1)), tmp_path / "a", show_progress=False)
    b = compile_design(load_design(write_toml(tmp_path / "b.toml", d2)), tmp_path / "b", show_progress=False)
    assert a.files["gds"].read_bytes() == b.files["gds"].read_bytes()


def test_too_large_for_memory_or_disk_is_refused_before_writing(tmp_path, small_design_dict, monkeypatch, capsys):
    # bad input that would exhaust memory or disk gets a one-line error before anything is written
    import shutil as _shutil
    from collections import namedtuple

    from metalay.cli import main

    big = copy.deepcopy(small_design_dict)
    big["aperture"]["diameter_um"] = 2000.0  # about 3e7 sites: 0.46 GB + 30 B x 1e7 (plateau) = 0.76 GB
    design = write_toml(tmp_path / "d.toml", big)
    t0 = time.perf_counter()
    assert main(["compile", str(design), "-o", str(tmp_path / "o1"), "--quiet", "--max-memory", "700M"]) == 2
    assert time.perf_counter() - t0 < 5  # Common practice (no source): refused up front, not after the tiles
    err = capsys.readouterr().err.strip()
    assert "700 MB" in err and "760 MB" in err and "--max-memory" in err and "\n" not in err
    # with the checks on, the hint names turning them off: the layout alone fits 1.2 GB, the rules check does not
    # even streamed (0.46 GB + 30 B x 3e7 + 0.3 GB = 1.66 GB; whole-mask it would need 9 GB)
    big["checks"] = {"rules": True, "optics": False}
    design = write_toml(tmp_path / "d.toml", big)
    assert main(["compile", str(design), "-o", str(tmp_path / "o1"), "--quiet", "--max-memory", "1.2G"]) == 2
    err = capsys.readouterr().err.strip()
    assert "--no-checks" in err and "\n" not in err
    assert not (tmp_path / "o1").exists()
    small = write_toml(tmp_path / "s.toml", small_design_dict)
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(_shutil, "disk_usage", lambda p: usage(10, 10, 0))
    assert main(["compile", str(small), "-o", str(tmp_path / "o2"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "disk has 0 B free" in err and "\n" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.toml", "s.toml"]  # no folder, stage or lock left


def test_compile_with_checks_is_deterministic(tmp_path, small_design_dict):
    d = copy.deepcopy(small_design_dict)
    d["checks"] = {"rules": True, "optics": True}
    path = write_toml(tmp_path / "d.toml", d)
    a = compile_design(load_design(path), tmp_path / "a", show_progress=False)
    compile_design(load_design(path), tmp_path / "b", show_progress=False)
    files_a = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*") if p.is_file())
    files_b = sorted(p.relative_to(tmp_path / "b") for p in (tmp_path / "b").rglob("*") if p.is_file())
    assert files_a == files_b
    for rel in files_a:
        if rel.name == "timings.json":
            continue
        assert (tmp_path / "a" / rel).read_bytes() == (tmp_path / "b" / rel).read_bytes(), rel
    assert str(tmp_path) not in (tmp_path / "a" / "manifest.json").read_text()
    assert a.manifest["checks"]["rules"]["status"] == "clean"
