"""The compile writes every output (flat and hierarchical GDSII, OASIS) tile by tile with its own streams.

Oracles: gdstk's readers (an independent implementation of both formats) flatten the files; the flattened polygon
set must equal the flat GDSII of the same design written by the compile's own record writer, polygon for polygon
(layer, datatype and exact integer vertices). Format references: SEMI P39 (OASIS: CELLNAME, PLACEMENT, repetitions,
CBLOCK, modal variables); Calma GDSII Stream Format Manual Release 6.0 (BOUNDARY, SREF, structures).
"""

import copy

import gdstk
import numpy as np
import pytest

from metalay.api import compile_design, load_design
from metalay.io.gdsread import read_mask

from conftest import SMALL_DESIGN, write_toml


def _canon_arrays(layers, datatypes, polys):
    """Canonical rows per vertex count: (layer, datatype, vertices rolled to start at the smallest (x, y)), sorted.

    Equal polygon sets give equal dicts; the vertex order (orientation) is kept."""
    by_v: dict = {}
    for lay, dt, p in zip(layers, datatypes, polys):
        by_v.setdefault(len(p), []).append((lay, dt, p))
    out = {}
    for v, items in by_v.items():  # distinct vertex counts (a few)
        xy = np.array([p for _, _, p in items], np.int64).reshape(-1, v, 2)
        key = (xy[..., 0] + (1 << 40)) * (1 << 21) + xy[..., 1]
        start = np.argmin(key, axis=1)
        idx = (start[:, None] + np.arange(v)[None, :]) % v
        rolled = np.take_along_axis(xy, idx[..., None], axis=1).reshape(len(items), -1)
        head = np.array([(lay, dt) for lay, dt, _ in items], np.int64)
        rows = np.concatenate([head, rolled], axis=1)
        out[v] = rows[np.lexsort(rows.T[::-1])]
    return out


def _mask_set(path):
    """Flattened polygon set of a written file by metalay's own reader."""
    m = read_mask(path)
    polys = [m.xy_db[m.start[k]:m.start[k + 1]] for k in range(m.count)]
    return _canon_arrays(m.layer, m.datatype, polys)


def _gdstk_set(path):
    """Flattened polygon set by gdstk (references and repetitions expanded), database units."""
    lib = gdstk.read_oas(str(path)) if str(path).endswith(".oas") else gdstk.read_gds(str(path))
    scale = lib.unit / lib.precision
    layers, dts, polys = [], [], []
    for top in lib.top_level():
        flat = top.copy(f"FLAT_{top.name}", deep_copy=True).flatten()
        for p in flat.polygons:
            offs = p.repetition.get_offsets() if p.repetition.size else np.zeros((1, 2))
            pts = np.rint((p.points[None, :, :] + offs[:, None, :]) * scale).astype(np.int64)
            layers += [p.layer] * len(offs)
            dts += [p.datatype] * len(offs)
            polys += list(pts)
    return _canon_arrays(layers, dts, polys)


def _same(a, b):
    assert sorted(a) == sorted(b)
    for v in a:
        assert np.array_equal(a[v], b[v]), v


def _compile(tmp_path, d, name, **kw):
    path = write_toml(tmp_path / f"{name}.toml", d)
    return compile_design(load_design(path), tmp_path / name, show_progress=False, **kw)


def _design(diameter_um=20.0, **mask):
    d = copy.deepcopy(SMALL_DESIGN)
    d["aperture"]["diameter_um"] = diameter_um
    d["mask"].update({"formats": ["gds", "oas"], "label": True})
    d["mask"].update(mask)
    return d


def test_flat_oasis_equals_flat_gdsii_small_and_medium(tmp_path):
    # medium: about 1.9e5 sites in 13 tiles of <= 15,000 sites (every tile boundary crossed by shapes)
    for diameter, tile in ((20.0, 250_000), (160.0, 15_000)):
        res = _compile(tmp_path, _design(diameter), f"m{int(diameter)}", sites_per_tile=tile)
        flat = _mask_set(res.files["gds"])
        assert sum(len(r) for r in flat.values()) > res.manifest["counts"]["sites"] > 0
        _same(_gdstk_set(res.files["oas"]), flat)
        _same(_mask_set(res.files["oas"]), flat)
        oas = res.files["oas"].read_bytes()
        assert oas.count(b"\x22") >= 1  # CBLOCK record id 34 (SEMI P39, table of record types)
        if diameter > 100:
            # Common practice (no source): a mask of 1e5 fins over ~1000 distinct shapes is many times smaller as
            # OASIS with repetitions than as flat GDSII (bench/bench_scale.py measures the ratio at scale)
            assert res.files["gds"].stat().st_size / len(oas) > 8


def test_levels_hierarchy_streamed_equals_flat(tmp_path):
    # the masters hold the level outlines: flattening the hierarchy gives the flat mask with the same levels (no
    # label: it carries a hash of the design, which differs between the two)
    ref = _compile(tmp_path, _design(40.0, rotation_levels=8, label=False), "flat", sites_per_tile=2_000)
    res = _compile(tmp_path, _design(40.0, rotation_levels=8, hierarchy="levels", label=False), "lev",
                   sites_per_tile=2_000)
    flat = _mask_set(ref.files["gds"])
    for fmt in ("gds", "oas"):
        _same(_gdstk_set(res.files[fmt]), flat)
        _same(_mask_set(res.files[fmt]), flat)
    lib = gdstk.read_oas(str(res.files["oas"]))
    top = lib.top_level()
    assert len(top) == 1 and all(r.rotation == 0 and not r.x_reflection for r in top[0].references)
    masters = sorted(c.name for c in lib.cells if c is not top[0])
    assert masters == sorted(f"t-small_R{k:04d}" for k in range(8))
    assert all(len(c.polygons) == 1 for c in lib.cells if c is not top[0])
    assert res.manifest["counts"]["distinct_shapes"] == 8
    # the GDSII puts one SREF per element: about 34 bytes instead of a 64-byte BOUNDARY
    assert res.files["gds"].stat().st_size < 0.7 * ref.files["gds"].stat().st_size


def test_levels_unused_masters_are_named_but_not_cells(tmp_path):
    # a small tilt uses only some of 64 levels: the unused ones keep their CELLNAME (reference numbers are fixed in
    # advance) but get no cell, so no reader sees a stray master as a second top cell
    d = _design(6.0, rotation_levels=64, hierarchy="levels")
    d["phase"] = [{"kind": "tilt", "angle_deg": 0.5}]
    res = _compile(tmp_path, d, "few")
    lib = gdstk.read_oas(str(res.files["oas"]))
    used = res.manifest["counts"]["distinct_shapes"]
    assert 1 <= used < 64 and len(lib.cells) == used + 1 and len(lib.top_level()) == 1
    assert len(read_mask(res.files["oas"]).start) - 1 == len(read_mask(res.files["gds"]).start) - 1
    _same(_gdstk_set(res.files["oas"]), _mask_set(res.files["gds"]))


def test_cell_per_write_field_streamed_equals_flat(tmp_path):
    wf = {"size_um": 6.0, "origin_um": [0.05, 0.05], "straddle": "shift-or-drop", "max_shift_nm": 200.0}
    ref = _compile(tmp_path, _design(20.0, write_field=dict(wf), label=False), "flat", sites_per_tile=800)
    res = _compile(tmp_path, _design(20.0, write_field=dict(wf, cell_per_field=True), label=False), "wf",
                   sites_per_tile=800)
    flat = _mask_set(ref.files["gds"])
    for fmt in ("gds", "oas"):
        _same(_gdstk_set(res.files[fmt]), flat)
    lib = gdstk.read_gds(str(res.files["gds"]))
    assert len(lib.top_level()) == 1 and len(lib.cells) > 4


def test_complement_oasis_equals_its_gdsii(tmp_path):
    res = _compile(tmp_path, _design(8.0, tone="complement", complement_band_rows=8), "c")
    flat = _mask_set(res.files["gds"])
    _same(_gdstk_set(res.files["oas"]), flat)
    _same(_mask_set(res.files["oas"]), flat)


@pytest.mark.parametrize("mask", [{}, {"rotation_levels": 8, "hierarchy": "levels"}])
def test_same_input_same_bytes(tmp_path, mask):
    path = write_toml(tmp_path / "d.toml", _design(30.0, **mask))
    a, b = (compile_design(load_design(path), tmp_path / k, show_progress=False, sites_per_tile=3_000)
            for k in "ab")
    for key in ("gds", "oas", "manifest"):
        assert a.files[key].read_bytes() == b.files[key].read_bytes(), key
    assert a.manifest["files"]["oas"]["sha256"] == b.manifest["files"]["oas"]["sha256"]
