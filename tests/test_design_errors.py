"""Bad input: every malformed design gives a one-line error naming file and key, exit code 2, and no output."""

import copy

import numpy as np
import pytest

from metalay.cli import main

from conftest import SMALL_DESIGN, write_toml


def _set(d, path, value):
    keys = path.split(".")
    for k in keys[:-1]:
        d = d[int(k)] if k.isdigit() else d[k]
    last = keys[-1]
    if value is _DELETE:
        del d[last]
    else:
        d[last] = value


_DELETE = object()

# (label, dotted key to change, new value, text the message must contain)
CASES = [
    ("missing wavelength", "design.wavelength_nm", _DELETE, "design.wavelength_nm"),
    ("wavelength wrong type", "design.wavelength_nm", "green", "design.wavelength_nm"),
    ("wavelength negative", "design.wavelength_nm", -532.0, ">= 100.0"),
    ("wavelength zero", "design.wavelength_nm", 0.0, "design.wavelength_nm"),
    ("spin not +-1", "design.input_spin", 0, "design.input_spin"),
    ("unknown phase kind", "phase.0.kind", "spiral", "phase[0].kind"),
    ("charge not integer", "phase.0.charge", 2.5, "phase[0].charge"),
    ("tilt angle too big", "phase.1.angle_deg", 95.0, "phase[1].angle_deg"),
    ("zero aperture", "aperture.diameter_um", 0.0, "aperture.diameter_um"),
    ("negative aperture", "aperture.diameter_um", -5.0, "aperture.diameter_um"),
    ("unknown aperture shape", "aperture.shape", "hexagon", "aperture.shape"),
    ("aperture smaller than a cell", "aperture.diameter_um", 0.2, "smaller than one unit cell"),
    ("negative period", "lattice.period_nm", -325.0, "lattice.period_nm"),
    ("unknown lattice", "lattice.kind", "triangular", "lattice.kind"),
    ("unknown library", "design.library", "no-such-library", "no-such-library"),
    ("library path missing", "design.library", "missing/lib.library.json", "not found"),
    ("unknown key", "aperture.radius_um", 3.0, "aperture.radius_um"),
    ("rotation levels 1", "mask.rotation_levels", 1, "mask.rotation_levels"),
    ("bad format", "mask.formats", ["gds", "dxf"], "mask.formats"),
    ("levels without K", "mask.hierarchy", "levels", "mask.hierarchy"),
    ("bad layer", "mask.layers", {"structures": [1, 300]}, "mask.layers.structures"),
    ("missing phase list", "phase", _DELETE, "'phase'"),
    ("unknown cell", "mask.cell", "fin-999", "fin-999"),
    ("db unit zero", "mask.db_unit_nm", 0.0, "mask.db_unit_nm"),
]


def _run(tmp_path, data, name="d.toml", out_name="out"):
    design = write_toml(tmp_path / name, data)
    out = tmp_path / out_name
    return design, out


@pytest.mark.parametrize("label,key,value,expect", CASES, ids=[c[0] for c in CASES])
def test_bad_design_one_line_error_no_output(tmp_path, capsys, label, key, value, expect):
    data = copy.deepcopy(SMALL_DESIGN)
    _set(data, key, value)
    design, out = _run(tmp_path, data)
    code = main(["compile", str(design), "-o", str(out), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert "\n" not in err and "Traceback" not in err
    assert str(design) in err or "library" in err
    assert expect in err
    assert not out.exists() or not any(out.iterdir())


def test_nan_in_phase_map(tmp_path, capsys):
    values = np.zeros((5, 5))
    values[2, 3] = np.nan
    np.save(tmp_path / "map.npy", values)
    data = copy.deepcopy(SMALL_DESIGN)
    data["phase"] = [{"kind": "map", "file": "map.npy", "extent_um": [-20.0, 20.0, -20.0, 20.0]}]
    design, out = _run(tmp_path, data)
    assert main(["compile", str(design), "-o", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "non-finite" in err and "row 2, column 3" in err and "\n" not in err
    assert not out.exists() or not any(out.iterdir())


def test_phase_map_too_small_for_aperture(tmp_path, capsys):
    np.save(tmp_path / "map.npy", np.zeros((4, 4)))
    data = copy.deepcopy(SMALL_DESIGN)
    data["phase"] = [{"kind": "map", "file": "map.npy", "extent_um": [-5.0, 5.0, -5.0, 5.0]}]
    design, out = _run(tmp_path, data)
    assert main(["compile", str(design), "-o", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "outside the phase map extent" in err
    assert not out.exists() or not any(out.iterdir())


def test_pickled_npy_refused(tmp_path, capsys):
    np.save(tmp_path / "map.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    data = copy.deepcopy(SMALL_DESIGN)
    data["phase"] = [{"kind": "map", "file": "map.npy", "extent_um": [-20.0, 20.0, -20.0, 20.0]}]
    design, out = _run(tmp_path, data)
    assert main(["compile", str(design), "-o", str(out), "--quiet"]) == 2
    assert "cannot read phase map" in capsys.readouterr().err


def test_not_toml_and_missing_file(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("[design\nname = 'x'\n")
    assert main(["compile", str(bad), "-o", str(tmp_path / "o"), "--quiet"]) == 2
    assert "not valid TOML" in capsys.readouterr().err
    assert main(["compile", str(tmp_path / "none.toml"), "-o", str(tmp_path / "o"), "--quiet"]) == 2
    assert "design file not found" in capsys.readouterr().err


def test_unwritable_output_path(tmp_path, capsys):
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    design = write_toml(tmp_path / "d.toml", copy.deepcopy(SMALL_DESIGN))
    code = main(["compile", str(design), "-o", str(blocker / "out"), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "cannot create output folder" in err and "\n" not in err
    assert blocker.read_text() == "not a folder"
