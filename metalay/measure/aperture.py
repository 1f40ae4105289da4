"""The triangular aperture for reading a vortex beam's charge, written as a mask (GDSII/OASIS) with a manifest.

An equilateral triangular opening in the beam makes a far-field pattern of ``|l| + 1`` spots per side whose
orientation gives the sign of ``l`` (Hickmann et al. 2010); :func:`metalay.measure.imagecharge.read_triangle`
reads it from a camera image.  This module turns a size (or the beam's ring diameter) into one polygon on a layer
of its own, written through the project's writers (:class:`metalay.io.writer.GdsStream` for GDSII,
:class:`metalay.io.oasis_write.OasisStream` for OASIS), read back with :func:`metalay.io.gdsread.read_mask` and
compared vertex by vertex, and described in ``manifest.json`` (inputs, vertices, snapping error, SHA-256 of every
file, how to read the pattern, the safety caution).

The polygon is the opening: what the process does with it (clears a chrome or metal film, or keeps resist) is the
process's tone.  Spec files (TOML, one ``[triangle_aperture]`` table) are read through
:class:`metalay.validate.TomlTable`; keys are listed in :func:`parse_triangle_spec`.

References
----------
Hickmann, Fonseca, Soares & Chavez-Cerda 2010, Phys. Rev. Lett. 105, 053904.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.errors import DesignError, MetalayError
from metalay.measure.imagecharge import RING_RADIUS_TO_SIDE, TriangleAperture, triangle_aperture
from metalay.validate import TomlTable, load_toml

__all__ = ["TriangleSpec", "parse_triangle_spec", "load_triangle_spec", "write_triangle_aperture",
           "APERTURE_SAFETY_NOTE"]

#: The caution the aperture's manifest and command carry.
APERTURE_SAFETY_NOTE = (
    "This is a design aid. Check the mask against your facility's process rules before fabrication; making it "
    "involves lithography, etching and hazardous chemicals: follow your site's chemical-safety rules. Reading a "
    "charge needs a laser beam on a camera: follow your site's laser-safety rules (laser class, eyewear, beam "
    "enclosures, attenuate before the sensor) and your local codes.")


@dataclass(frozen=True)
class TriangleSpec:
    """What to write: the aperture's size and placement, where, and how.

    Attributes
    ----------
    name : str
        Cell and file name.
    side_um, ring_diameter_um : float or None
        Exactly one is given (the side follows from the ring: side = ring diameter, ring radius / side = 0.5).
    apex_deg : float
        Direction of one vertex in the mask's top view, from +x towards +y.
    center_um : (float, float)
        Centroid (on the beam axis).
    db_unit_nm : float
    layer, datatype : int
    formats : tuple of str
        ``"gds"`` and/or ``"oas"``.
    """

    name: str
    side_um: float | None
    ring_diameter_um: float | None
    apex_deg: float = 90.0
    center_um: tuple = (0.0, 0.0)
    db_unit_nm: float = 1.0
    layer: int = 30
    datatype: int = 0
    formats: tuple = ("gds", "oas")


def parse_triangle_spec(data: dict, where: str) -> TriangleSpec:
    """Validate a ``[triangle_aperture]`` table (already parsed TOML, or built from command-line options).

    Keys: ``name`` (letters, digits, ``-_.``, 1..64), ``ring_diameter_um`` or ``side_um`` (exactly one,
    (0, 1e5]), ``apex_deg`` (-360..360, default 90), ``center_um`` ([x, y], default [0, 0]), ``db_unit_nm``
    (0.001..100, default 1), ``layer`` ([layer, datatype], 0..65535, default [30, 0]), ``formats`` (non-empty,
    from ``["gds", "oas"]``, default both).

    Raises
    ------
    DesignError
        One line naming ``where``, the dotted key, the value and the allowed range.
    """
    top = TomlTable(data, where)
    t = top.table("triangle_aperture")
    top.check_unknown()
    name = t.string("name")
    if not name or len(name) > 64 or not all(c.isalnum() or c in "-_." for c in name):
        t.fail("name", name, "use 1 to 64 characters from letters, digits, '-', '_' and '.'")
    if t.has("side_um") == t.has("ring_diameter_um"):
        raise DesignError(f"{where}: give exactly one of 'triangle_aperture.side_um' or "
                          "'triangle_aperture.ring_diameter_um'")
    side = t.number("side_um", None, lo=0, lo_open=True, hi=1e5)
    ring = t.number("ring_diameter_um", None, lo=0, lo_open=True, hi=1e5)
    apex = t.number("apex_deg", 90.0, lo=-360.0, hi=360.0)
    centre = t.numbers("center_um", [0.0, 0.0], length=2, lo=-1e5, hi=1e5, allowed="[x, y] in um, each -1e5..1e5")
    db = t.number("db_unit_nm", 1.0, lo=0.001, hi=100.0)
    layer = t.numbers("layer", [30, 0], length=2, lo=0, hi=65535, integer=True,
                      allowed="[layer, datatype], integers 0..65535")
    formats = t.raw("formats", ["gds", "oas"])
    if (not isinstance(formats, list) or not formats or len(set(map(str, formats))) != len(formats)
            or any(f not in ("gds", "oas") for f in formats)):
        t.fail("formats", formats, "expected a non-empty list of distinct values from ['gds', 'oas']")
    t.check_unknown()
    return TriangleSpec(name, None if side is None else float(side), None if ring is None else float(ring),
                        float(apex), (float(centre[0]), float(centre[1])), float(db), int(layer[0]), int(layer[1]),
                        tuple(f for f in ("gds", "oas") if f in formats))


def load_triangle_spec(path) -> TriangleSpec:
    """Read and validate a spec file (TOML with one ``[triangle_aperture]`` table)."""
    path = Path(path)
    return parse_triangle_spec(load_toml(path, what="aperture spec", error=DesignError), str(path))


def _readback(path: Path, ap: TriangleAperture) -> dict:
    """Read the written file back and compare its one polygon with the intended vertices."""
    from metalay.io.gdsread import read_mask

    flat = read_mask(path)
    sel = np.flatnonzero((flat.layer == ap.layer) & (flat.datatype == ap.datatype))
    got = flat.xy_db[flat.start[sel[0]]:flat.start[sel[0] + 1]] if sel.size == 1 else np.zeros((0, 2), np.int64)
    same = (int(flat.count) == 1 and got.shape == ap.vertices_db.shape
            and any(np.array_equal(np.roll(got, k, axis=0), ap.vertices_db) for k in range(got.shape[0])))
    return {"polygons": int(flat.count), "on_layer": int(sel.size), "vertices_equal": bool(same),
            "db_unit_nm": float(flat.db_unit_nm)}


def write_triangle_aperture(spec: TriangleSpec, out_dir) -> dict:
    """Write ``<name>.gds`` / ``<name>.oas`` and ``manifest.json`` into ``out_dir``; return the manifest.

    The mask files are written atomically, read back and compared with the intended vertices (``readback`` in
    the manifest: a mismatch raises); the manifest is written last.  Same spec, same bytes.
    """
    from metalay.io.oasis_write import OasisStream
    from metalay.io.writer import GdsStream
    from metalay.mask.layout import Polygon
    from metalay.util.atomic import atomic_write_text, ensure_dir

    ap = triangle_aperture(side_um=spec.side_um, ring_diameter_um=spec.ring_diameter_um, apex_deg=spec.apex_deg,
                           center_um=spec.center_um, db_unit_nm=spec.db_unit_nm, layer=spec.layer,
                           datatype=spec.datatype)
    out = ensure_dir(out_dir)
    files, readback = {}, {}
    for fmt in spec.formats:  # one or two formats
        path = out / f"{spec.name}.{fmt}"
        if fmt == "gds":
            with GdsStream(path, spec.name, db_unit_nm=spec.db_unit_nm) as gs:
                gs.boundaries(ap.layer, ap.datatype, ap.vertices_db[None])
        else:
            with OasisStream(path, spec.name, db_unit_nm=spec.db_unit_nm) as oas:
                oas.add_polygons([Polygon(ap.layer, ap.datatype, ap.vertices_db)])
        data = path.read_bytes()
        files[path.name] = {"sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}
        readback[path.name] = _readback(path, ap)
        if not readback[path.name]["vertices_equal"]:
            raise MetalayError(f"{path}: read back, the aperture polygon differs from what was written")
    s = spec.db_unit_nm * 1e-3
    manifest = {
        "format": "metalay.triangle_aperture", "format_version": 1, "name": spec.name,
        "inputs": {"side_um": spec.side_um, "ring_diameter_um": spec.ring_diameter_um, "apex_deg": spec.apex_deg,
                   "center_um": list(spec.center_um), "db_unit_nm": spec.db_unit_nm,
                   "layer": [spec.layer, spec.datatype], "formats": list(spec.formats)},
        "aperture": {"side_um": ap.side_um, "apex_deg": ap.apex_deg, "center_um": list(ap.center_um),
                     "vertices_um": (ap.vertices_db * s).tolist(), "vertices_db": ap.vertices_db.tolist(),
                     "area_um2": ap.area_um2, "snap_error_nm": ap.snap_error_nm,
                     "layer": ap.layer, "datatype": ap.datatype, "opening": "the polygon is the opening"},
        "sizing": (f"side = ring diameter / (2 x {RING_RADIUS_TO_SIDE:g}) (ring radius / side = "
                   f"{RING_RADIUS_TO_SIDE:g}, inside the plateau 0.50-0.65 found with simulated frames); size it "
                   "for the charges expected: a Laguerre-Gauss ring grows as sqrt(|l|)"),
        "reading": {"method": "triangle", "apex_deg_on_camera": ap.apex_deg,
                    "command": f"metalay charge read IMAGE --method triangle --apex-deg {ap.apex_deg:g}",
                    "convention": "spots per side = |l| + 1; spot triangle vertex towards apex + 90 deg for l > 0, "
                                  "apex - 90 deg for l < 0 (far field in a lens's focal plane, same axes); a mirror "
                                  "between mask and camera, or light arriving onto the patterned face, mirrors the "
                                  "apex direction: give it as seen on the camera"},
        "files": files, "readback": readback, "caution": APERTURE_SAFETY_NOTE}
    atomic_write_text(out / "manifest.json", json.dumps(manifest, indent=2, sort_keys=True, allow_nan=False) + "\n")
    return manifest
