"""Shared test helpers: small designs, deterministic hypothesis profile."""

import copy
import os

# One BLAS thread, as the command line runs (metalay/cli/__init__.py): the unit-cell and supercell solves use small
# dense matrices that run several times slower with threaded BLAS on a shared 2-core machine. Set before numpy loads.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import pytest  # noqa: E402
from hypothesis import HealthCheck, settings

settings.register_profile("metalay", deadline=None, derandomize=True, max_examples=60,
                          suppress_health_check=[HealthCheck.too_slow])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "metalay"))

SMALL_DESIGN = {
    "design": {"name": "t-small", "wavelength_nm": 532.0, "input_spin": 1, "library": "tio2-nanofin-532"},
    "phase": [{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}],
    "aperture": {"shape": "circle", "diameter_um": 20.0},
    "lattice": {"kind": "square", "period_nm": 325.0},
    "mask": {"formats": ["gds", "oas"]},
    "checks": {"rules": False, "optics": False},
}


@pytest.fixture
def small_design_dict():
    return copy.deepcopy(SMALL_DESIGN)


def write_toml(path, data):
    """Tiny TOML writer for the test designs (tables, arrays of tables, scalars, lists of scalars)."""
    lines = []

    def scalar(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
        if isinstance(v, list):
            return "[" + ", ".join(scalar(x) for x in v) + "]"
        if isinstance(v, dict):
            return "{" + ", ".join(f"{k} = {scalar(x)}" for k, x in v.items()) + "}"
        return repr(v)

    def table(prefix, d):
        simple = {k: v for k, v in d.items() if not isinstance(v, dict) and not (
            isinstance(v, list) and v and isinstance(v[0], dict))}
        for k, v in simple.items():
            lines.append(f"{k} = {scalar(v)}")
        for k, v in d.items():
            if isinstance(v, dict):
                lines.append(f"[{prefix}{k}]")
                table(f"{prefix}{k}.", v)
            elif isinstance(v, list) and v and isinstance(v[0], dict):
                for item in v:
                    lines.append(f"[[{prefix}{k}]]")
                    table(f"{prefix}{k}.", item)

    top_simple = {k: v for k, v in data.items() if not isinstance(v, (dict, list))}
    for k, v in top_simple.items():
        lines.append(f"{k} = {scalar(v)}")
    for k, v in data.items():
        if isinstance(v, dict):
            lines.append(f"[{k}]")
            table(f"{k}.", v)
        elif isinstance(v, list) and v and isinstance(v[0], dict):
            for item in v:
                lines.append(f"[[{k}]]")
                table(f"{k}.", item)
        elif isinstance(v, list):
            lines.append(f"{k} = {scalar(v)}")
    path.write_text("\n".join(lines) + "\n")
    return path


def write_fin_oasis_set(folder, centres, offsets, extras, *, fields_compression_level=None):
    """Three OASIS files of the same fins as the compile writes them: flat (shape groups tile by tile, 5 bands of y),
    levels (one master cell per distinct shape, placed with repetitions per tile) and one cell per 10 um write field;
    ``extras`` (Polygons) go into each top cell. Returns the paths (flat, levels, fields) and the level names."""
    import numpy as np

    from metalay.io.oasis_write import DEFAULT_COMPRESSION_LEVEL, OasisStream
    from metalay.mask.layout import Polygon, group_shapes

    paths = [folder / f"{k}.oas" for k in ("flat", "levels", "fields")]
    bands = np.array_split(np.argsort(centres[:, 1], kind="stable"), 5)
    with OasisStream(paths[0], "TOP") as oas:
        for sel in bands:
            g = group_shapes(offsets[sel])
            oas.add_shape_groups(1, 0, g.shapes_db, g.shape_of_site, centres[sel])
        oas.add_polygons(extras)
    g_all = group_shapes(offsets)
    names = [f"TOP_R{k:04d}" for k in range(len(g_all.shapes_db))]
    with OasisStream(paths[1], "TOP") as oas:
        for k, shp in enumerate(g_all.shapes_db):
            oas.define_cell(names[k], [Polygon(1, 0, shp)])
        for sel in bands:
            oas.add_placements(names, g_all.shape_of_site[sel], centres[sel])
        oas.add_polygons(extras)
    fid = np.floor_divide(centres, 10_000)
    level = DEFAULT_COMPRESSION_LEVEL if fields_compression_level is None else fields_compression_level
    with OasisStream(paths[2], "TOP", compression_level=level) as oas:
        placed = set()
        for sel in bands:
            for key in sorted({tuple(f) for f in fid[sel]}):  # fields (a few), not sites
                here = sel[np.all(fid[sel] == key, axis=1)]
                name = f"TOP_F{key[0]}_{key[1]}"
                g = group_shapes(offsets[here])
                oas.add_shape_groups(1, 0, g.shapes_db, g.shape_of_site, centres[here], cell=name)
                if name not in placed:
                    oas.place(name)
                    placed.add(name)
        oas.add_polygons(extras)
    return paths, names


def gdstk_repetitions():
    """One gdstk repetition of every OASIS kind (regular grid, one row, general two-vector grid, explicit offsets,
    x offsets, y offsets) in micrometres, for files written by gdstk as an independent writer."""
    import gdstk

    return [gdstk.Repetition(3, 4, spacing=(0.5, 0.7)), gdstk.Repetition(5, 1, spacing=(0.3, 0)),
            gdstk.Repetition(3, 2, v1=(0.3, 0.1), v2=(-0.1, 0.4)),
            gdstk.Repetition(offsets=[(0, 0), (1.001, 0.5), (2, -3), (0.004, 0.004)]),
            gdstk.Repetition(x_offsets=[0, 0.5, 0.7, 2.0]), gdstk.Repetition(y_offsets=[0, 0.3, 0.9])]
