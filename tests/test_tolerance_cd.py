"""CD bias in the tolerance study for single-size libraries: biased cells solved by metalay's RCWA.

The design is an invented test scenario (a charge-2 vortex at 633 nm with the bundled tio2-nanofin-633 library,
16 um aperture); the truncation of the biased-cell solves is kept modest (3 orders per axis) through the
recorded setting ``--bias-harmonics`` so that the test stays fast.
"""

import copy
import csv
import json

import numpy as np
import pytest

from metalay.cells.biascells import BiasedCells
from metalay.cells.library import load_library
from metalay.cli import main as cli_main

from conftest import write_toml

DESIGN = {
    "design": {"name": "t-cd", "wavelength_nm": 633.0, "input_spin": 1, "library": "tio2-nanofin-633"},
    "phase": [{"kind": "vortex", "charge": 2}, {"kind": "tilt", "angle_deg": 5.0}],
    "aperture": {"shape": "circle", "diameter_um": 16.0},
    "lattice": {"kind": "square", "period_nm": 430.0},
    "mask": {"formats": ["gds"]},
    "checks": {"rules": False, "optics": False},
}
ARGS = ["--samples", "4", "--cd-bias-nm", "0", "3", "--bias-harmonics", "3", "--seed", "5", "--quiet", "--no-plots"]


@pytest.fixture(scope="module")
def design_path(tmp_path_factory):
    return write_toml(tmp_path_factory.mktemp("cd") / "d.toml", copy.deepcopy(DESIGN))


def _rows(folder):
    with open(folder / "tolerance_samples.csv") as fh:
        return list(csv.DictReader(fh))


def test_tolerance_cd_bias_on_a_single_size_library_is_evaluated(design_path, tmp_path):
    rc = cli_main(["tolerance", str(design_path), *ARGS, "--workers", "2", "--cell-cache", str(tmp_path / "cache"),
                   "-o", str(tmp_path / "a")])
    assert rc == 0
    res = json.loads((tmp_path / "a" / "tolerance.json").read_text())
    assert res["cd_bias"]["evaluated"] and res["cd_bias"]["solver"]["truncation"] == {"harmonics_x": 3,
                                                                                       "harmonics_y": 3}
    conv = res["statistics"]["converted"]
    assert conv["p5"] < conv["p95"]  # evaluated: the draws move the figures
    rows = _rows(tmp_path / "a")
    biases = [float(r["cd_bias_nm"]) for r in rows]
    assert len(set(biases)) == 4 and np.std(biases) > 0.5
    # each sample's converted power is |(t_long - t_short)/2|^2 of the biased cell (fully populated aperture;
    # Jones algebra of metalay.checks.optics), recomputed here from an independent solver object
    lib = load_library("tio2-nanofin-633")
    solver = BiasedCells(lib, harmonics=(3, 3), bias_step_nm=0.5)
    for r in rows:
        tl, ts = solver.responses_at([0], float(r["cd_bias_nm"]), 633.0)
        assert float(r["converted"]) == pytest.approx(abs((tl[0] - ts[0]) / 2) ** 2, rel=1e-5)
    # the same results with one worker, and from the cache folder (nothing solved again)
    rc = cli_main(["tolerance", str(design_path), *ARGS, "--workers", "1", "--cell-cache", str(tmp_path / "cache"),
                   "-o", str(tmp_path / "b")])
    assert rc == 0
    again = json.loads((tmp_path / "b" / "tolerance.json").read_text())
    assert again["statistics"] == res["statistics"]
    assert again["cd_bias"]["solver"]["points_solved"] == 0
    assert again["cd_bias"]["solver"]["points_loaded_from_cache"] > 0


def test_tolerance_cd_bias_nominal_only_when_asked(design_path, tmp_path):
    rc = cli_main(["tolerance", str(design_path), *ARGS, "--cd-response", "nominal", "--workers", "1",
                   "-o", str(tmp_path / "n")])
    assert rc == 0
    res = json.loads((tmp_path / "n" / "tolerance.json").read_text())
    assert not res["cd_bias"]["evaluated"]
    assert any("CD bias not evaluated" in n and "nominal" in n for n in res["notes"])
    conv = res["statistics"]["converted"]
    assert conv["p5"] == conv["p95"] == res["nominal"]["converted"]
