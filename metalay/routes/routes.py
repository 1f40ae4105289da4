"""One target phase, every fabrication route: multi-level etch masks, binary fork gratings, SLM phase images,
orientation maps, and one optics table comparing them.

The design file's target phase ``phi(x, y)`` (the same sum of terms the metasurface compiler uses) is turned into:

etch
    ``k`` binary masks for a surface-relief phase plate of ``N = 2^k`` levels (binary-optics scheme). Mask ``j``
    (``j = 1 .. k``) is etched to depth ``d_j = lambda / (2^j (n - 1))``; its openings (the polygons written) are
    the set ``sin(2^(j-1) phi) > 0``. The etched depth at a point is the sum of the depths of the masks open there,
    ``e = (N - 1 - q) lambda / (N (n - 1))`` with ``q = floor(N mod(phi, 2 pi) / 2 pi)`` the phase level, so the
    relief left above the deepest floor, ``D - e = q lambda / (N (n - 1))`` (``D`` the sum of all depths), imprints
    ``exp(i 2 pi q / N)`` in transmission: the phase level itself.
fork
    A binary grating (amplitude: the polygons are the clear lines; phase: the polygons are etched to a
    ``pi`` step) whose lines are the set ``cos(phi + 2 pi r . g / period) > cos(pi duty)``. For a charge-``l``
    target the grating has ``l`` extra lines at the dislocation; its +1 order carries the target phase.
slm
    An 8- or 16-bit grayscale PNG of the wrapped phase (optionally plus a blazed carrier) for a phase-only
    spatial light modulator; gray ``g`` means phase ``2 pi g / 2^bits`` unless a measured lookup table is given.
orient
    The fast-axis angle ``theta = sigma phi / 2 mod pi`` of a space-variant half-wave retarder (photo-aligned
    liquid crystal and similar) per pixel, as a 16-bit PNG (``angle = code * pi / 65536``) and as CSV (degrees).
compare
    The complex transmission of each route on one common grid over the aperture, its first-order efficiency
    (mode overlap with the ideal first-order beam, incident-power normalised), the far-field power inside the
    first-order window when the beam has a carrier, and the mode purity (OAM weight of the target charge).

Which side: the phase is computed in the frame of the light leaving the element (:mod:`metalay.design.side`). The
etch, fork and orient files show the patterned face seen from above, so when ``design.lit_from = "structures"``
(light onto the etched or patterned face) they hold the mirror image (``y -> -y``; orientation angles negated);
without ``design.lit_from`` the route elements are taken as lit through the substrate and their summaries say so.
The SLM image is the panel as the arriving light faces it and does not depend on ``lit_from``.

Conventions: time dependence ``exp(-i omega t)``; a phase element multiplies the field by ``exp(i phi)``; a
thickness ``h`` of index ``n`` adds phase ``2 pi (n - 1) h / lambda`` relative to air. Images: row 0 is the top
(largest ``y``), column 0 the left (smallest ``x``), seen with +x to the right and +y up.

Polygons are computed as level sets: marching squares on a raster of a smooth function of the phase
(``sin(2^(j-1) phi)``, ``cos(phi - c) - cos(pi / N)``) that is continuous across the ``2 pi`` wraps, then every
vertex is moved onto the exact level set by Newton steps that evaluate the analytic phase (or the bilinear
interpolant of an imported map). The remaining boundary error (chords between vertices) is measured and
reported, outside a small disk around each vortex core where all levels meet.

References
----------
Swanson 1989, MIT Lincoln Laboratory Technical Report 854 (binary optics: mask j etched to lambda/(2^j (n-1));
first-order efficiency sinc^2(1/N) of N phase levels).
Beijersbergen et al. 1994, Opt. Commun. 112, 321 (spiral phase plate: step height l lambda / (n - 1)).
Bazhenov, Vasnetsov & Soskin 1990, JETP Lett. 52, 429 (fork gratings: a charge-l dislocation in the grating).
Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.4 (binary amplitude/phase grating orders).
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from metalay.design.phase import Axicon, Lens, Multiplex, PhaseMap, QPlate, Tilt, Vortex, phase_gradient, target_phase
from metalay.design.side import Facing
from metalay.errors import DesignError, MetalayError
from metalay.io.writer import MAX_GDS_VERTICES, GdsStream
from metalay.routes import _routes_geom as geo
from metalay.util.atomic import atomic_write_bytes, atomic_write_text, ensure_dir
from metalay.validate import TomlTable

__all__ = [
    "EtchSettings", "ForkSettings", "SlmSettings", "OrientSettings", "RouteSettings", "parse_routes",
    "etch_depths_nm", "etched_depth_nm", "level_step_nm", "spiral_step_height_nm", "multilevel_efficiency",
    "binary_grating_efficiency", "substrate_index",
    "EtchMasks", "etch_masks", "level_regions", "write_etch",
    "ForkGrating", "fork_grating", "write_fork",
    "SlmImage", "slm_image", "gray_to_phase", "read_lut", "write_slm",
    "OrientationMap", "orientation_map", "write_orientation",
    "RouteFigures", "compare_routes", "format_table", "ROUTE_NAMES", "route_facing", "route_illumination",
]

ROUTE_NAMES = ("etch", "fork", "slm", "orient", "compare")
_MAX_RASTER_PIXELS = 64_000_000
_MAX_IMAGE_PIXELS = 100_000_000
_DEFAULT_RASTER_SAMPLES = 1500


# --------------------------------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class EtchSettings:
    """``[routes.etch]``: levels (2^k), substrate material or explicit index, GDSII layer of mask 1, split."""

    levels: int = 8
    material: str = "fused_silica"
    index: float | None = None
    layer: int = 10
    datatype: int = 0
    split: str = "layers"


@dataclass(frozen=True)
class ForkSettings:
    """``[routes.fork]``: carrier period and direction, line duty, amplitude or phase, layer, rules."""

    period_um: float = 10.0
    azimuth_deg: float = 0.0
    duty: float = 0.5
    kind: str = "amplitude"
    charge: int | None = None
    layer: int = 20
    datatype: int = 0
    min_line_um: float = 1.0
    min_gap_um: float = 1.0
    material: str = "fused_silica"
    index: float | None = None


@dataclass(frozen=True)
class SlmSettings:
    """``[routes.slm]``: pixel pitch, resolution, bit depth, blazed carrier, lookup table."""

    pitch_um: float = 8.0
    width_px: int = 1920
    height_px: int = 1080
    bit_depth: int = 8
    carrier_period_px: float = 0.0
    carrier_azimuth_deg: float = 0.0
    lut: str | None = None
    mask_outside: bool = True
    magnification: float = 1.0
    beam_diameter_px: float | None = None

    def scale(self, aperture) -> float:
        """Panel coordinate per design coordinate: ``magnification``, or the beam (the aperture's larger extent)
        spread over ``beam_diameter_px`` pixels: ``M = beam_diameter_px * pitch_um / aperture extent``."""
        if self.beam_diameter_px is None:
            return float(self.magnification)
        ax, ay = aperture.half_extent_um
        return float(self.beam_diameter_px * self.pitch_um / (2 * max(ax, ay)))


@dataclass(frozen=True)
class OrientSettings:
    """``[routes.orient]``: pixel pitch of the orientation map."""

    pitch_um: float = 2.0


@dataclass(frozen=True)
class RouteSettings:
    """The validated ``[routes]`` table of a design."""

    raster_um: float
    compare_samples: int = 1024
    etch: EtchSettings = field(default_factory=EtchSettings)
    fork: ForkSettings = field(default_factory=ForkSettings)
    slm: SlmSettings = field(default_factory=SlmSettings)
    orient: OrientSettings = field(default_factory=OrientSettings)
    base_dir: str = "."


def parse_routes(design) -> RouteSettings:
    """Validate ``design.raw["routes"]`` (every key optional) and return :class:`RouteSettings`.

    Raises
    ------
    DesignError
        One line naming the design file, the dotted key, the value and the allowed range.
    """
    where = design.source_path
    if getattr(design, "spin_decoupled", False):
        raise DesignError(f"{where}: key 'phase_spin_plus': the fabrication routes write one phase profile for any "
                          "input polarisation; a spin-decoupled design (a phase per input spin) needs its metasurface "
                          "mask (metalay compile)")
    data = design.raw.get("routes", {}) if isinstance(design.raw, dict) else {}
    top = TomlTable({"routes": data}, where)
    r = top.table("routes", {})
    hx, hy = design.aperture.half_extent_um
    extent = 2 * max(hx, hy)
    raster_um = float(r.number("raster_um", extent / _DEFAULT_RASTER_SAMPLES, lo=1e-4, hi=1e4))
    npx = (2 * hx / raster_um + 1) * (2 * hy / raster_um + 1)
    if npx > _MAX_RASTER_PIXELS:
        r.fail("raster_um", raster_um, f"gives {npx:.3g} raster pixels over the aperture; allowed up to "
                                       f"{_MAX_RASTER_PIXELS:.0e} (use a larger raster_um)")
    samples = int(r.number("compare_samples", 1024, lo=64, hi=8192, integer=True))

    e = r.table("etch", {})
    levels = e.number("levels", 8, lo=2, hi=256, integer=True)
    if levels & (levels - 1):
        e.fail("levels", levels, "must be a power of two (2, 4, 8, ..., 256)")
    k = levels.bit_length() - 1
    etch = EtchSettings(levels=levels, material=e.string("material", "fused_silica"),
                        index=_opt_float(e.number("index", None, lo=1.0, lo_open=True, hi=5.0)),
                        layer=e.number("layer", 10, lo=0, hi=256 - k, integer=True),
                        datatype=e.number("datatype", 0, lo=0, hi=255, integer=True),
                        split=e.string("split", "layers", options=("layers", "files")))
    e.check_unknown()

    f = r.table("fork", {})
    period = float(f.number("period_um", 10.0, lo=0, lo_open=True, hi=1e5))
    charge = f.number("charge", None, lo=-1000, hi=1000, integer=True)
    fork = ForkSettings(period_um=period, azimuth_deg=float(f.number("azimuth_deg", 0.0, lo=-360, hi=360)),
                        duty=float(f.number("duty", 0.5, lo=0, lo_open=True, hi=0.95)),
                        kind=f.string("kind", "amplitude", options=("amplitude", "phase")),
                        charge=charge,
                        layer=f.number("layer", 20, lo=0, hi=255, integer=True),
                        datatype=f.number("datatype", 0, lo=0, hi=255, integer=True),
                        min_line_um=float(f.number("min_line_um", 1.0, lo=0.0, hi=1e4)),
                        min_gap_um=float(f.number("min_gap_um", 1.0, lo=0.0, hi=1e4)),
                        material=f.string("material", "fused_silica"),
                        index=_opt_float(f.number("index", None, lo=1.0, lo_open=True, hi=5.0)))
    f.check_unknown()

    s = r.table("slm", {})
    slm = SlmSettings(pitch_um=float(s.number("pitch_um", 8.0, lo=0.1, hi=1000.0)),
                      width_px=s.number("width_px", 1920, lo=1, hi=32768, integer=True),
                      height_px=s.number("height_px", 1080, lo=1, hi=32768, integer=True),
                      bit_depth=s.number("bit_depth", 8, integer=True),
                      carrier_period_px=float(s.number("carrier_period_px", 0.0, lo=0.0, hi=1e6)),
                      carrier_azimuth_deg=float(s.number("carrier_azimuth_deg", 0.0, lo=-360, hi=360)),
                      lut=s.string("lut", None), mask_outside=s.boolean("mask_outside", True),
                      magnification=float(s.number("magnification", 1.0, lo=1e-3, hi=1e4)),
                      beam_diameter_px=_opt_float(s.number("beam_diameter_px", None, lo=2.0, hi=32768.0)))
    if slm.beam_diameter_px is not None and "magnification" in s.data:
        s.fail("beam_diameter_px", slm.beam_diameter_px, "give magnification or beam_diameter_px, not both")
    if slm.bit_depth not in (8, 16):
        s.fail("bit_depth", slm.bit_depth, "allowed values are 8 and 16")
    if 0 < slm.carrier_period_px < 2:
        s.fail("carrier_period_px", slm.carrier_period_px, "allowed 0 (no carrier) or >= 2 pixels")
    if slm.width_px * slm.height_px > _MAX_IMAGE_PIXELS:
        s.fail("width_px", slm.width_px, f"width_px * height_px must be <= {_MAX_IMAGE_PIXELS:.0e}")
    s.check_unknown()

    o = r.table("orient", {})
    orient = OrientSettings(pitch_um=float(o.number("pitch_um", 2.0, lo=0.01, hi=1e4)))
    n_or = (2 * hx / orient.pitch_um) * (2 * hy / orient.pitch_um)
    if n_or > _MAX_IMAGE_PIXELS:
        o.fail("pitch_um", orient.pitch_um, f"gives {n_or:.3g} pixels; allowed up to {_MAX_IMAGE_PIXELS:.0e}")
    o.check_unknown()
    r.check_unknown()
    base = str(Path(where).parent) if where != "<memory>" else "."
    return RouteSettings(raster_um=raster_um, compare_samples=samples, etch=etch, fork=fork, slm=slm,
                         orient=orient, base_dir=base)


def _opt_float(v):
    return None if v is None else float(v)


# ---------------------------------------------------------------------------------------------- formulas
def etch_depths_nm(levels: int, wavelength_nm: float, index: float) -> np.ndarray:
    """Etch depth of each of the ``k = log2(levels)`` masks, ``d_j = lambda / (2^j (n - 1))``, j = 1..k (nm).

    References
    ----------
    Swanson 1989, MIT Lincoln Laboratory TR 854.
    """
    k = int(levels).bit_length() - 1
    return wavelength_nm / (2.0 ** np.arange(1, k + 1) * (index - 1.0))


def level_step_nm(levels: int, wavelength_nm: float, index: float) -> float:
    """Height of one phase level, ``lambda / (N (n - 1))`` (nm)."""
    return wavelength_nm / (levels * (index - 1.0))


def spiral_step_height_nm(charge: int, wavelength_nm: float, index: float) -> float:
    """Total step height ``|l| lambda / (n - 1)`` of a continuous charge-``l`` spiral phase plate (nm).

    References
    ----------
    Beijersbergen et al. 1994, Opt. Commun. 112, 321.
    """
    return abs(charge) * wavelength_nm / (index - 1.0)


def etched_depth_nm(phi_rad, levels: int, wavelength_nm: float, index: float) -> np.ndarray:
    """Etched depth at phase ``phi_rad``: sum of ``d_j`` over the masks open there (``sin(2^(j-1) phi) > 0``).

    Notes
    -----
    Equals ``(N - 1 - q) lambda / (N (n - 1))`` with ``q = floor(N mod(phi, 2 pi) / 2 pi)`` away from level
    boundaries, so the relief left above the deepest floor, ``D - e``, imprints ``2 pi q / N``.
    """
    phi_rad = np.asarray(phi_rad, dtype=np.float64)
    e = np.zeros(phi_rad.shape)
    for j, d in enumerate(etch_depths_nm(levels, wavelength_nm, index), start=1):  # loop over masks
        e += d * (np.sin(2 ** (j - 1) * phi_rad) > 0)
    return e


def multilevel_efficiency(levels: int) -> float:
    """First-order efficiency ``sinc^2(1/N)`` of an N-level quantised phase (``sinc(t) = sin(pi t)/(pi t)``).

    References
    ----------
    Swanson 1989, MIT Lincoln Laboratory TR 854.
    """
    return float(np.sinc(1.0 / levels) ** 2)


def binary_grating_efficiency(kind: str, duty: float) -> float:
    """First-order efficiency of a binary grating: amplitude ``sin^2(pi D) / pi^2``; 0/pi phase
    ``4 sin^2(pi D) / pi^2`` (``D`` = line fraction).

    References
    ----------
    Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.4 (Fourier series of a rectangular grating).
    """
    s = math.sin(math.pi * duty) ** 2 / math.pi ** 2
    return 4 * s if kind == "phase" else s


def substrate_index(material: str, wavelength_nm: float, *, index: float | None = None, where: str = "",
                    key: str = "routes.etch.material", base_dir=None) -> float:
    """Real refractive index of the substrate: the explicit ``index`` if given, else from :mod:`metalay.cells.materials`
    (``get_material(material).index(wavelength_nm)``, dispersion included)."""
    return _substrate(material, wavelength_nm, index=index, where=where, key=key, base_dir=base_dir)[0]


def _substrate(material, wavelength_nm, *, index, where, key, base_dir=None) -> tuple[float, str]:
    if index is not None:
        return float(index), "explicit index"
    try:
        from metalay.cells import materials
    except ImportError as exc:  # pragma: no cover - the materials module ships with metalay
        raise DesignError(f"{where}: key '{key}' = {material!r}: the materials module is not available; give the "
                          f"index explicitly (key '{key.rsplit('.', 1)[0]}.index', > 1 and <= 5)") from exc
    try:
        mat = materials.get_material(material, base_dir=Path(base_dir) if base_dir else None)
        n = complex(np.asarray(mat.index(wavelength_nm)).ravel()[0])
        source = f"{mat.name}: {mat.dataset}"
    except MetalayError as exc:
        raise DesignError(f"{where}: key '{key}' = {material!r}: {exc}") from exc
    if not (n.real > 1.0):
        raise DesignError(f"{where}: key '{key}' = {material!r}: index {n.real:.4f} at {wavelength_nm:g} nm is not "
                          "> 1; a surface-relief plate needs n > 1")
    return float(n.real), source


# ---------------------------------------------------------------------------------------------- helpers
def _phase_func(design, terms=None):
    terms = tuple(design.terms) if terms is None else tuple(terms)

    def phi(x, y):
        return target_phase(terms, x, y, wavelength_nm=design.wavelength_nm, sigma=design.sigma)

    return phi


def _raster_axes(design, step_um: float):
    hx, hy = design.aperture.half_extent_um
    nx = int(math.ceil(2 * hx / step_um)) + 1
    ny = int(math.ceil(2 * hy / step_um)) + 1
    return np.linspace(-hx, hx, nx), np.linspace(-hy, hy, ny)


def _cores(terms, sigma: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Phase singularities of the terms: centres (C, 2) um and the largest |charge| at each (C,)."""
    found: dict[tuple[float, float], int] = {}
    for t in terms:  # short loop over terms
        if isinstance(t, Vortex):
            key, l = (t.center_x_um, t.center_y_um), abs(t.charge)
        elif isinstance(t, QPlate):
            key, l = (0.0, 0.0), abs(int(round(2 * t.q)))
        elif isinstance(t, Multiplex):
            key, l = (0.0, 0.0), max(abs(c.charge) for c in t.channels)
        else:
            continue
        found[key] = found.get(key, 0) + l
    keys = sorted(found)
    return (np.array(keys, dtype=np.float64).reshape(-1, 2), np.array([found[k] for k in keys], dtype=np.float64))


def _core_radii(charges: np.ndarray, multiplier: float, step_um: float) -> np.ndarray:
    """Radius inside which features of ``sin(multiplier * l * azimuth)`` span fewer than 4 raster pixels (there
    the marching-squares outline is not trusted and the boundary error is not measured)."""
    return np.maximum(3 * step_um, 4 * step_um * multiplier * charges / np.pi)


def net_charge(design) -> tuple[int | None, tuple[float, float] | None]:
    """Net topological charge of the target about its vortex axis, or (None, None) when not defined."""
    charge = 0
    centres = set()
    for t in design.terms:
        if isinstance(t, Vortex):
            charge += t.charge
            centres.add((t.center_x_um, t.center_y_um))
        elif isinstance(t, QPlate):
            charge += int(round(2 * design.sigma * t.q))
            centres.add((0.0, 0.0))
        elif isinstance(t, (Multiplex, PhaseMap)):
            return None, None
    if len(centres) > 1:
        return None, None
    return charge, (centres.pop() if centres else (0.0, 0.0))


def _tilt_frequency(terms, wavelength_nm: float) -> np.ndarray:
    """Linear spatial frequency (cycles/um, (fx, fy)) of the tilt terms."""
    f = np.zeros(2)
    for t in terms:
        if isinstance(t, Tilt):
            s = math.sin(math.radians(t.angle_deg)) / (wavelength_nm * 1e-3)
            az = math.radians(t.azimuth_deg)
            f += s * np.array([math.cos(az), math.sin(az)])
    return f


def _resolution_warning(design, phi_terms, step_um: float, levels_per_2pi: float, what: str) -> list[str]:
    x, y = _raster_axes(design, max(step_um, 2 * max(design.aperture.half_extent_um) / 256))
    xx, yy = np.meshgrid(x, y)
    inside = _inside(design.aperture, xx, yy)
    cores, charges = _cores(phi_terms)
    for (cx, cy), rad in zip(cores, _core_radii(charges, levels_per_2pi / 2, step_um)):
        inside &= np.hypot(xx - cx, yy - cy) > rad
    if not inside.any():
        return []
    g = phase_gradient(phi_terms, xx[inside], yy[inside], wavelength_nm=design.wavelength_nm, sigma=design.sigma,
                       step_um=step_um / 4)
    gmax = float(np.max(g))
    need = 2 * math.pi / levels_per_2pi / max(gmax, 1e-300)  # narrowest feature, um
    if need < 2 * step_um:
        return [f"{what}: the narrowest feature ({need:.3g} um) spans fewer than 2 raster pixels "
                f"(routes.raster_um = {step_um:g}); features may be missed; lower routes.raster_um"]
    return []


def _inside(aperture, x, y) -> np.ndarray:
    if aperture.shape in ("circle", "annulus"):
        r2 = x * x + y * y
        ok = r2 <= (aperture.diameter_um / 2) ** 2
        if aperture.shape == "annulus":
            ok &= r2 >= (aperture.inner_diameter_um / 2) ** 2
        return ok
    hx, hy = aperture.half_extent_um
    return (np.abs(x) <= hx) & (np.abs(y) <= hy)


def _write_gds(path: Path, cell: str, layer_rings: list[tuple[int, int, list[np.ndarray]]],
               db_unit_nm: float) -> Path:
    """Flat GDSII: rings grouped by vertex count, one vectorised call per (layer, count)."""
    with GdsStream(path, cell, db_unit_nm=db_unit_nm) as gs:
        for layer, datatype, rings in layer_rings:
            counts = np.array([len(r) for r in rings], dtype=np.int64)
            for nv in np.unique(counts):  # loop over distinct vertex counts
                sel = np.flatnonzero(counts == nv)
                gs.boundaries(layer, datatype, np.stack([rings[i] for i in sel]))
    return path


def _rings_area_um2(rings: list[np.ndarray], db_unit_nm: float) -> float:
    s = db_unit_nm * 1e-3
    tot = 0.0
    for r in rings:  # loop over polygons
        x = r[:, 0].astype(np.float64) * s
        y = r[:, 1].astype(np.float64) * s
        tot += 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))
    return tot


def _geometry_to_rings(geom, aperture_geom, db_unit_nm):
    clipped = geo._polygonal(geom.intersection(aperture_geom))
    pieces = geo.gds_pieces(clipped, max_vertices=MAX_GDS_VERTICES)
    return clipped, geo.snap_rings(pieces, db_unit_nm)


def route_facing(design) -> Facing:
    """The side the light arrives from for the route elements (all transmission elements): ``design.lit_from``,
    else assumed through the substrate (the file's summary says so)."""
    lit_from = getattr(design, "lit_from", None)
    return Facing(lit_from or "substrate", "transmission", "design" if lit_from else "assumed")


def route_illumination(facing: Facing) -> dict:
    """The side in words for a route's JSON summary."""
    d = facing.as_dict()
    if facing.source == "assumed":
        d["chosen_by"] = "assumed: light through the substrate (design.lit_from not given)"
    return d


def _mask_frame_rings(rings, facing: Facing) -> list:
    """Polygons as the file shows them: mirrored ``y -> -y`` (order reversed to keep the winding) when the light
    arrives onto the patterned face; computed in the frame of the light leaving the element."""
    if not facing.mirror_y:
        return list(rings)
    return [np.ascontiguousarray((np.asarray(r) * np.array([1, -1], dtype=np.asarray(r).dtype))[::-1])
            for r in rings]


def _json(obj) -> str:
    return json.dumps(obj, sort_keys=True, indent=2, allow_nan=False) + "\n"


# ---------------------------------------------------------------------------------------------- etch route
@dataclass(frozen=True, eq=False)
class EtchMasks:
    """Binary-optics mask set of an N-level surface-relief phase plate.

    Attributes
    ----------
    levels : int
        ``N = 2^k``.
    wavelength_nm, index : float
        Design wavelength and substrate index used for the depths.
    material : str
    depths_nm : ndarray (k,)
        Etch depth of mask j = 1..k, ``lambda / (2^j (n - 1))``.
    step_nm, max_depth_nm : float
        One level ``lambda / (N (n - 1))``; deepest etch ``(N - 1)`` steps.
    charge : int or None
        Net topological charge of the target (None when not defined).
    spiral_step_nm : float or None
        ``|l| lambda / (n - 1)`` of a continuous spiral plate of that charge.
    efficiency_expected : float
        ``sinc^2(1/N)``.
    masks : tuple of tuple of ndarray (V, 2) int64
        Hole-free polygons (database units) of each mask; mask j's polygons are the areas etched by it.
    layers : tuple of (int, int)
        GDSII (layer, datatype) of each mask.
    mask_area_um2 : ndarray (k,)
        Etched area of each mask (from the written polygons).
    level_area_um2 : ndarray (N,) or None
        Area of each phase level q (from separately polygonised level regions), when asked for.
    aperture_area_um2 : float
        Area of the aperture polygon the masks are clipped to.
    boundary_error_um : float
        Largest measured distance of a mask outline to the exact level set (before snapping), outside the cores.
    aperture_error_um : float
        Sagitta of the polygonal aperture outline.
    snap_error_um : float
        Largest vertex displacement by snapping to the database grid (``sqrt(2)/2`` database unit).
    core_radius_um : float
        Radius of the disks around vortex cores excluded from the boundary-error measurement.
    raster_um : float
    perimeter_um : ndarray (k,)
        Length of each mask's outline inside the aperture (to bound area errors: perimeter * boundary error).
    warnings : tuple of str
    """

    levels: int
    wavelength_nm: float
    index: float
    material: str
    depths_nm: np.ndarray
    step_nm: float
    max_depth_nm: float
    charge: int | None
    spiral_step_nm: float | None
    efficiency_expected: float
    masks: tuple
    layers: tuple
    mask_area_um2: np.ndarray
    level_area_um2: np.ndarray | None
    aperture_area_um2: float
    boundary_error_um: float
    aperture_error_um: float
    snap_error_um: float
    core_radius_um: float
    raster_um: float
    perimeter_um: np.ndarray
    warnings: tuple = ()
    facing: Facing = Facing(source="assumed")

    def summary(self) -> dict:
        """JSON-ready figures (no polygons)."""
        return {
            "illumination": route_illumination(self.facing),
            "route": "etch", "levels": self.levels, "masks": len(self.masks), "wavelength_nm": self.wavelength_nm,
            "material": self.material, "index": self.index,
            "depths_nm": [float(d) for d in self.depths_nm], "level_step_nm": self.step_nm,
            "max_depth_nm": self.max_depth_nm, "charge": self.charge, "spiral_step_height_nm": self.spiral_step_nm,
            "efficiency_expected": self.efficiency_expected,
            "layers": [list(x) for x in self.layers], "polygons": [len(m) for m in self.masks],
            "mask_area_um2": [float(a) for a in self.mask_area_um2],
            "level_area_um2": None if self.level_area_um2 is None else [float(a) for a in self.level_area_um2],
            "aperture_area_um2": self.aperture_area_um2, "boundary_error_um": self.boundary_error_um,
            "aperture_error_um": self.aperture_error_um, "snap_error_um": self.snap_error_um,
            "core_radius_um": self.core_radius_um, "raster_um": self.raster_um,
            "warnings": list(self.warnings),
        }


def _mask_func(phi, j):
    m = float(2 ** (j - 1))
    return lambda x, y: np.sin(m * phi(x, y))


def _level_func(phi, q, levels):
    c = 2 * np.pi * (q + 0.5) / levels
    h = math.cos(math.pi / levels)
    return lambda x, y: np.cos(phi(x, y) - c) - h


def level_regions(design, settings: RouteSettings | None = None, *, levels: int | None = None):
    """Polygonised phase-level regions ``q = 0 .. N-1`` (``mod(phi, 2 pi)`` in ``[2 pi q / N, 2 pi (q+1) / N)``).

    Returns
    -------
    regions : list of shapely geometries (um), clipped to the aperture
    error_um : float
        Largest measured boundary error outside the cores.
    """
    settings = settings or parse_routes(design)
    levels = levels or settings.etch.levels
    phi = _phase_func(design)
    x, y = _raster_axes(design, settings.raster_um)
    ap, _ = geo.aperture_geometry(design.aperture, tolerance_um=design.mask.db_unit_nm * 5e-4)
    cores, charges = _cores(design.terms)
    radii = _core_radii(charges, levels / 2, settings.raster_um)
    out, err = [], 0.0
    for q in range(levels):  # loop over levels
        g, e = geo.contour_region(_level_func(phi, q, levels), x, y, exclude_xy=cores, exclude_radius_um=radii)
        out.append(geo._polygonal(g.intersection(ap)))
        err = max(err, e)
    return out, err


def etch_masks(design, settings: RouteSettings | None = None, *, with_level_areas: bool = False) -> EtchMasks:
    """Compute the binary-optics mask set of the design's target phase (see module docstring).

    Parameters
    ----------
    design : metalay.design.spec.Design
    settings : RouteSettings, optional
        Default: :func:`parse_routes` of the design.
    with_level_areas : bool
        Also polygonise each of the N level regions and report their areas (N contour passes).

    Returns
    -------
    EtchMasks

    Notes
    -----
    ``d_j = lambda / (2^j (n - 1))``; mask j is open where ``sin(2^(j-1) phi) > 0``; first-order efficiency of N
    levels ``sinc^2(1/N)``.

    References
    ----------
    Swanson 1989, MIT Lincoln Laboratory TR 854; Beijersbergen et al. 1994, Opt. Commun. 112, 321.
    """
    settings = settings or parse_routes(design)
    es = settings.etch
    lam = design.wavelength_nm
    n, source = _substrate(es.material, lam, index=es.index, where=design.source_path, key="routes.etch.material",
                           base_dir=settings.base_dir)
    depths = etch_depths_nm(es.levels, lam, n)
    k = depths.size
    phi = _phase_func(design)
    x, y = _raster_axes(design, settings.raster_um)
    db_unit_nm = design.mask.db_unit_nm
    ap, ap_err = geo.aperture_geometry(design.aperture, tolerance_um=db_unit_nm * 5e-4)
    cores, charges = _cores(design.terms)
    core_r = float(np.max(_core_radii(charges, 2 ** (k - 1), settings.raster_um), initial=0.0))
    masks, areas, perims, err = [], [], [], 0.0
    for j in range(1, k + 1):  # loop over masks
        g, e = geo.contour_region(_mask_func(phi, j), x, y, exclude_xy=cores,
                                  exclude_radius_um=_core_radii(charges, 2 ** (j - 1), settings.raster_um))
        clipped, rings = _geometry_to_rings(g, ap, db_unit_nm)
        masks.append(tuple(rings))
        areas.append(_rings_area_um2(rings, db_unit_nm))
        perims.append(float(clipped.boundary.difference(ap.boundary.buffer(1e-6)).length) if not clipped.is_empty
                      else 0.0)
        err = max(err, e)
    level_areas = None
    if with_level_areas:
        regions, e2 = level_regions(design, settings)
        level_areas = np.array([r.area for r in regions])
        err = max(err, e2)
    charge, _ = net_charge(design)
    warnings = _resolution_warning(design, design.terms, settings.raster_um, es.levels, "etch")
    return EtchMasks(
        levels=es.levels, wavelength_nm=lam, index=n, material=source,
        depths_nm=depths, step_nm=level_step_nm(es.levels, lam, n),
        max_depth_nm=(es.levels - 1) * level_step_nm(es.levels, lam, n), charge=charge,
        spiral_step_nm=spiral_step_height_nm(charge, lam, n) if charge else None,
        efficiency_expected=multilevel_efficiency(es.levels), masks=tuple(masks),
        layers=tuple((es.layer + j, es.datatype) for j in range(k)), mask_area_um2=np.array(areas),
        level_area_um2=level_areas, aperture_area_um2=float(ap.area), boundary_error_um=err,
        aperture_error_um=float(ap_err), snap_error_um=db_unit_nm * 1e-3 * math.sqrt(0.5), core_radius_um=core_r,
        raster_um=settings.raster_um, perimeter_um=np.array(perims), warnings=tuple(warnings),
        facing=route_facing(design))


def write_etch(result: EtchMasks, out_dir, name: str, *, split: str = "layers", db_unit_nm: float = 1.0) -> list[Path]:
    """Write the masks as one GDSII with one layer per mask (``split="layers"``) or one file per mask
    (``"files"``), plus ``<name>_etch.json``; atomic, deterministic. Returns the written paths."""
    out = ensure_dir(out_dir)
    paths = []
    masks = [_mask_frame_rings(m, result.facing) for m in result.masks]
    if split == "layers":
        paths.append(_write_gds(out / f"{name}_etch.gds", f"{name}_ETCH",
                                [(ly, dt, m) for (ly, dt), m in zip(result.layers, masks)], db_unit_nm))
    else:
        for j, ((ly, dt), m) in enumerate(zip(result.layers, masks), start=1):
            paths.append(_write_gds(out / f"{name}_etch_mask{j}.gds", f"{name}_MASK{j}", [(ly, dt, m)],
                                    db_unit_nm))
    paths.append(atomic_write_text(out / f"{name}_etch.json", _json(result.summary())))
    return paths


# ---------------------------------------------------------------------------------------------- fork route
@dataclass(frozen=True, eq=False)
class ForkGrating:
    """Binary fork grating.

    Attributes
    ----------
    kind : str
        "amplitude" (polygons = clear lines) or "phase" (polygons etched to a pi step).
    period_um, azimuth_deg, duty : float
    charge : int or None
        Charge of the dislocation (net charge of the grating's phase).
    rings : tuple of ndarray (V, 2) int64
        Hole-free polygons of the lines, database units.
    layer : (int, int)
    line_area_um2, aperture_area_um2 : float
    boundary_error_um : float
    efficiency_expected : float
        ``sin^2(pi D)/pi^2`` (amplitude) or ``4 sin^2(pi D)/pi^2`` (phase).
    etch_depth_nm : float or None
        ``lambda / (2 (n - 1))`` for a phase grating.
    rules : dict
        Line-width and gap check (see :func:`fork_grating`).
    terms : tuple
        Phase terms of the grating (target + carrier).
    """

    kind: str
    period_um: float
    azimuth_deg: float
    duty: float
    charge: int | None
    rings: tuple
    layer: tuple
    line_area_um2: float
    aperture_area_um2: float
    boundary_error_um: float
    efficiency_expected: float
    etch_depth_nm: float | None
    rules: dict
    terms: tuple
    warnings: tuple = ()
    facing: Facing = Facing(source="assumed")

    def summary(self) -> dict:
        return {"illumination": route_illumination(self.facing),
                "route": "fork", "kind": self.kind, "period_um": self.period_um, "azimuth_deg": self.azimuth_deg,
                "duty": self.duty, "charge": self.charge, "polygons": len(self.rings), "layer": list(self.layer),
                "line_area_um2": self.line_area_um2, "aperture_area_um2": self.aperture_area_um2,
                "boundary_error_um": self.boundary_error_um, "efficiency_expected": self.efficiency_expected,
                "etch_depth_nm": self.etch_depth_nm, "rules": self.rules, "warnings": list(self.warnings)}


def _fork_terms(design, fs: ForkSettings) -> tuple:
    """Target terms (or a bare vortex of ``fs.charge``) plus the grating carrier as a tilt of the same period."""
    base = (Vortex(fs.charge),) if fs.charge is not None else tuple(design.terms)
    s = design.wavelength_nm * 1e-3 / fs.period_um
    if s >= 1:
        # an evanescent carrier is still a valid mask pattern: represent it by a custom linear term
        return base + (_Carrier(fs.period_um, fs.azimuth_deg),)
    return base + (Tilt(math.degrees(math.asin(s)), fs.azimuth_deg),)


@dataclass(frozen=True)
class _Carrier:
    period_um: float
    azimuth_deg: float

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        az = math.radians(self.azimuth_deg)
        return 2 * np.pi * (x_um * math.cos(az) + y_um * math.sin(az)) / self.period_um


def _width_violations(geom, width_um: float, cores: np.ndarray, near_um: float) -> dict:
    """Parts of ``geom`` narrower than ``width_um`` (morphological opening by a disk of that diameter)."""
    if width_um <= 0 or geom.is_empty:
        return {"count": 0, "area_um2": 0.0, "near_core": 0, "elsewhere": 0}
    opened = geom.buffer(-width_um / 2, quad_segs=8).buffer(width_um / 2, quad_segs=8)
    narrow = geo._polygonal(geom.difference(opened))
    import shapely

    parts = [p for p in shapely.get_parts(narrow) if p.area > 0.1 * width_um ** 2]
    near = 0
    for p in parts:  # loop over violations (few)
        c = p.representative_point()
        if cores.size and np.min(np.hypot(cores[:, 0] - c.x, cores[:, 1] - c.y)) < near_um:
            near += 1
    return {"count": len(parts), "area_um2": float(sum(p.area for p in parts)), "near_core": near,
            "elsewhere": len(parts) - near}


def fork_grating(design, settings: RouteSettings | None = None) -> ForkGrating:
    """Binary fork grating of the target phase plus a carrier of ``period_um`` towards ``azimuth_deg``.

    The lines are ``cos(phi + 2 pi r . g / period) > cos(pi duty)``: full lines of width ``duty * period`` away
    from the dislocation, ``l`` extra lines ending at a charge-``l`` core. Line width and gap are checked by a
    morphological opening with disks of ``min_line_um`` and ``min_gap_um``; violations are counted separately near
    the cores (within two periods: the tips of the extra lines always narrow to a point) and elsewhere (including
    slivers cut by the aperture edge).

    References
    ----------
    Bazhenov, Vasnetsov & Soskin 1990, JETP Lett. 52, 429; Goodman 2005, sec. 4.4.
    """
    settings = settings or parse_routes(design)
    fs = settings.fork
    if fs.period_um < 4 * settings.raster_um:
        raise DesignError(f"{design.source_path}: key 'routes.fork.period_um' = {fs.period_um:g}: needs at least 4 "
                          f"raster pixels per period (>= {4 * settings.raster_um:g} um at routes.raster_um = "
                          f"{settings.raster_um:g}); lower routes.raster_um or raise the period")
    terms = _fork_terms(design, fs)
    phi = _phase_func(design, terms)
    h = math.cos(math.pi * fs.duty)
    x, y = _raster_axes(design, settings.raster_um)
    db_unit_nm = design.mask.db_unit_nm
    ap, _ = geo.aperture_geometry(design.aperture, tolerance_um=db_unit_nm * 5e-4)
    cores, charges = _cores(terms)
    g, err = geo.contour_region(lambda a, b: np.cos(phi(a, b)) - h, x, y, exclude_xy=cores,
                                exclude_radius_um=_core_radii(charges, 1.0, settings.raster_um))
    clipped, rings = _geometry_to_rings(g, ap, db_unit_nm)
    gaps = geo._polygonal(ap.difference(clipped))
    rules = {"min_line_um": fs.min_line_um, "min_gap_um": fs.min_gap_um,
             "nominal_line_um": fs.duty * fs.period_um, "nominal_gap_um": (1 - fs.duty) * fs.period_um,
             "source": "Common practice (no source): contact/proximity photolithography resolves about 1 um",
             "narrow_lines": _width_violations(clipped, fs.min_line_um, cores, 2 * fs.period_um),
             "narrow_gaps": _width_violations(gaps, fs.min_gap_um, cores, 2 * fs.period_um)}
    rules["nominal_ok"] = bool(rules["nominal_line_um"] >= fs.min_line_um and rules["nominal_gap_um"] >= fs.min_gap_um)
    charge = None
    if fs.charge is not None:
        charge = fs.charge
    else:
        charge, _ = net_charge(design)
    depth = None
    if fs.kind == "phase":
        n = substrate_index(fs.material, design.wavelength_nm, index=fs.index, where=design.source_path,
                            key="routes.fork.material", base_dir=settings.base_dir)
        depth = design.wavelength_nm / (2 * (n - 1))
    warnings = []
    if not rules["nominal_ok"]:
        warnings.append(f"fork: nominal line {rules['nominal_line_um']:g} um / gap {rules['nominal_gap_um']:g} um "
                        f"below the minimum {fs.min_line_um:g} / {fs.min_gap_um:g} um")
    return ForkGrating(kind=fs.kind, period_um=fs.period_um, azimuth_deg=fs.azimuth_deg, duty=fs.duty, charge=charge,
                       rings=tuple(rings), layer=(fs.layer, fs.datatype),
                       line_area_um2=_rings_area_um2(rings, db_unit_nm),
                       aperture_area_um2=float(ap.area), boundary_error_um=err,
                       efficiency_expected=binary_grating_efficiency(fs.kind, fs.duty), etch_depth_nm=depth,
                       rules=rules, terms=terms, warnings=tuple(warnings), facing=route_facing(design))


def write_fork(result: ForkGrating, out_dir, name: str, *, db_unit_nm: float = 1.0) -> list[Path]:
    """Write ``<name>_fork.gds`` and ``<name>_fork.json`` (atomic, deterministic)."""
    out = ensure_dir(out_dir)
    p = _write_gds(out / f"{name}_fork.gds", f"{name}_FORK", [(result.layer[0], result.layer[1],
                                                               _mask_frame_rings(result.rings, result.facing))],
                   db_unit_nm)
    return [p, atomic_write_text(out / f"{name}_fork.json", _json(result.summary()))]


# ---------------------------------------------------------------------------------------------- SLM route
@dataclass(frozen=True, eq=False)
class SlmImage:
    """Phase image for a phase-only SLM.

    Attributes
    ----------
    gray : ndarray (H, W) uint8 or uint16
        Gray levels; row 0 = top (largest y).
    phase_rad : ndarray (H, W) float64
        Phase the device shows for these gray levels (through the lookup table when given), in [0, 2 pi) + offset.
    target_rad : ndarray (H, W) float64
        Wrapped target (design phase plus carrier) the gray levels encode, in [0, 2 pi).
    inside : ndarray (H, W) bool
        Pixels inside the design aperture.
    lut_rad : ndarray (2^bits,)
        Phase of every gray level.
    x_um, y_um : ndarray (W,), (H,)
        Pixel centres (y decreasing with the row index).
    pitch_um : float
    bit_depth : int
    carrier_f_per_um : ndarray (2,)
        Spatial frequency of the blazed carrier (cycles/um).
    max_error_rad : float
        Largest encoding error inside the aperture (circular).
    """

    gray: np.ndarray
    phase_rad: np.ndarray
    target_rad: np.ndarray
    inside: np.ndarray
    lut_rad: np.ndarray
    x_um: np.ndarray
    y_um: np.ndarray
    pitch_um: float
    bit_depth: int
    carrier_f_per_um: np.ndarray
    max_error_rad: float
    lut_source: str | None = None
    warnings: tuple = ()
    magnification: float = 1.0

    def summary(self) -> dict:
        h, w = self.gray.shape
        return {"route": "slm", "width_px": w, "height_px": h, "pitch_um": self.pitch_um, "bit_depth": self.bit_depth,
                "magnification": self.magnification,
                "carrier_f_per_um": [float(v) for v in self.carrier_f_per_um], "lut": self.lut_source,
                "max_error_rad": self.max_error_rad, "gray_to_phase": "lut" if self.lut_source else
                "phase = 2 pi gray / 2^bit_depth", "orientation": "row 0 = top (+y), column 0 = left (-x)",
                "pixels_inside_aperture": int(self.inside.sum()), "warnings": list(self.warnings)}


def read_lut(path, bit_depth: int, *, where: str = "") -> np.ndarray:
    """Read a lookup table CSV with header ``gray,phase_rad`` (measured device response).

    Gray levels must be integers in ``[0, 2^bits - 1]``, strictly increasing, starting at 0; phases strictly
    increasing. The table is linearly interpolated to every gray level (held constant past the last entry).

    Returns
    -------
    ndarray (2^bits,) float64 — phase of every gray level (rad).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise DesignError(f"{where}: key 'routes.slm.lut' = {str(path)!r}: cannot read ({exc})") from exc
    rows = list(csv.reader(io.StringIO(text)))
    if not rows or [c.strip() for c in rows[0]] != ["gray", "phase_rad"]:
        raise DesignError(f"{where}: key 'routes.slm.lut' = {str(path)!r}: first line must be 'gray,phase_rad'")
    try:
        data = np.array([[float(a), float(b)] for a, b in (r for r in rows[1:] if r)], dtype=np.float64)
    except ValueError as exc:
        raise DesignError(f"{where}: key 'routes.slm.lut' = {str(path)!r}: expected two numbers per row ({exc})") \
            from exc
    top = 2 ** bit_depth - 1
    if (data.shape[0] < 2 or not np.all(np.isfinite(data)) or np.any(data[:, 0] != np.round(data[:, 0]))
            or data[0, 0] != 0 or data[-1, 0] > top or np.any(np.diff(data[:, 0]) <= 0)
            or np.any(np.diff(data[:, 1]) <= 0)):
        raise DesignError(f"{where}: key 'routes.slm.lut' = {str(path)!r}: need >= 2 rows, gray integers from 0 "
                          f"strictly increasing up to {top}, finite phases strictly increasing")
    return np.interp(np.arange(top + 1, dtype=np.float64), data[:, 0], data[:, 1])


def _encode(target_rad: np.ndarray, lut_rad: np.ndarray) -> np.ndarray:
    """Nearest gray level (circular phase distance) for each target phase, using levels within one 2 pi turn."""
    p0 = lut_rad[0]
    usable = np.flatnonzero(lut_rad < p0 + 2 * np.pi)
    table = lut_rad[usable]
    t = np.mod(target_rad - p0, 2 * np.pi) + p0
    i = np.clip(np.searchsorted(table, t), 1, table.size - 1)
    lo, hi = table[i - 1], table[i]
    choice = np.where(t - lo <= hi - t, i - 1, i)
    # wrap-around: the top of the turn may be closer to gray 0 (p0 + 2 pi)
    best = table[choice]
    wrap = (p0 + 2 * np.pi - t) < np.abs(t - best)
    choice = np.where(wrap, 0, choice)
    return usable[choice]


def gray_to_phase(gray: np.ndarray, bit_depth: int, lut_rad: np.ndarray | None = None) -> np.ndarray:
    """Phase (rad) shown for gray levels: ``2 pi g / 2^bits`` or the lookup table."""
    gray = np.asarray(gray).astype(np.int64)
    if lut_rad is None:
        return 2 * np.pi * gray / float(2 ** bit_depth)
    return np.asarray(lut_rad)[gray]


def slm_image(design, settings: RouteSettings | None = None) -> SlmImage:
    """Wrapped target phase (plus an optional blazed carrier) as SLM gray levels.

    Notes
    -----
    Pixel (r, c) centre: ``x = (c - (W - 1)/2) p``, ``y = ((H - 1)/2 - r) p``. Phase
    ``psi = mod(phi(x, y) + 2 pi (x cos a + y sin a) / (P p), 2 pi)`` with carrier period ``P`` pixels; without a
    lookup table ``g = round(psi 2^bits / 2 pi) mod 2^bits``; with one, the gray level whose measured phase is
    nearest (circularly). Pixels outside the design aperture are gray 0 when ``mask_outside``.
    """
    settings = settings or parse_routes(design)
    ss = settings.slm
    w, h, p = ss.width_px, ss.height_px, ss.pitch_um
    mag = ss.scale(design.aperture)
    x = (np.arange(w) - (w - 1) / 2) * p
    y = ((h - 1) / 2 - np.arange(h)) * p
    xx, yy = x[None, :] / mag, y[:, None] / mag  # design coordinates of the pixel centres
    psi = _phase_func(design)(xx, yy)
    f = np.zeros(2)
    if ss.carrier_period_px > 0:
        az = math.radians(ss.carrier_azimuth_deg)
        f = np.array([math.cos(az), math.sin(az)]) / (ss.carrier_period_px * p)
        psi = psi + 2 * np.pi * mag * (xx * f[0] + yy * f[1])  # the carrier is set in panel pixels
    psi = np.mod(psi, 2 * np.pi)
    inside = _inside(design.aperture, xx + 0 * yy, yy + 0 * xx)
    levels = 2 ** ss.bit_depth
    lut_src = None
    if ss.lut:
        lp = Path(ss.lut) if Path(ss.lut).is_absolute() else Path(settings.base_dir) / ss.lut
        lut = read_lut(lp, ss.bit_depth, where=design.source_path)
        lut_src = str(lp)
        gray = _encode(psi, lut)
    else:
        lut = 2 * np.pi * np.arange(levels) / levels
        gray = np.mod(np.rint(psi * levels / (2 * np.pi)).astype(np.int64), levels)
    if ss.mask_outside:
        gray = np.where(inside, gray, 0)
    gray = gray.astype(np.uint8 if ss.bit_depth == 8 else np.uint16)
    shown = lut[gray.astype(np.int64)]
    d = np.angle(np.exp(1j * (shown - psi)))
    max_err = float(np.max(np.abs(d[inside]))) if inside.any() else 0.0
    warnings = []
    if inside.any():
        gm = phase_gradient(design.terms, xx + 0 * yy, yy + 0 * xx, wavelength_nm=design.wavelength_nm,
                            sigma=design.sigma, step_um=p / (4 * mag)) / mag  # per um of the panel
        gm = gm + 2 * np.pi * float(np.hypot(*f))
        away = inside.copy()
        cores, charges = _cores(design.terms)
        for (cx, cy), rad in zip(cores, _core_radii(charges, 1.0, p / mag)):  # a few vortex cores
            away &= np.hypot(xx - cx, yy - cy) > rad
        worst = float(np.max(gm[away]) * p) if away.any() else 0.0
        if worst > np.pi:
            warnings.append(f"slm: the phase changes by up to {worst:.2f} rad per pixel (> pi): the pattern is "
                            f"aliased at pitch {p:g} um; enlarge the beam or lower the tilt")
    else:
        warnings.append("slm: no pixel lies inside the design aperture")
    hw = (w * p / 2, h * p / 2)
    ax, ay = design.aperture.half_extent_um
    ax, ay = ax * mag, ay * mag  # the beam on the panel
    if hw[0] < ax or hw[1] < ay:
        warnings.append(f"slm: the panel ({w * p:g} x {h * p:g} um) is smaller than the beam on it "
                        f"({2 * ax:g} x {2 * ay:g} um at magnification {mag:.4g}); the image is cropped")
    elif max(2 * ax / (w * p), 2 * ay / (h * p)) < 0.25:
        warnings.append(f"slm: the beam covers {2 * ax / p:.0f} x {2 * ay / p:.0f} of the {w} x {h} pixels "
                        f"(magnification {mag:.4g}); scale it with routes.slm.magnification or beam_diameter_px "
                        "(option --beam-diameter-px) to use the panel's resolution")
    return SlmImage(gray=gray, phase_rad=shown, target_rad=psi, inside=inside, lut_rad=lut, x_um=x, y_um=y,
                    pitch_um=p, bit_depth=ss.bit_depth, carrier_f_per_um=f, max_error_rad=max_err, lut_source=lut_src,
                    warnings=tuple(warnings), magnification=mag)


def _png_bytes(arr: np.ndarray) -> bytes:
    """Grayscale PNG (8-bit 'L' or 16-bit 'I;16') without time or text chunks."""
    from PIL import Image

    if arr.dtype == np.uint8:
        img = Image.fromarray(np.ascontiguousarray(arr))
    else:
        img = Image.frombytes("I;16", (arr.shape[1], arr.shape[0]), np.ascontiguousarray(arr, dtype="<u2").tobytes())
    buf = io.BytesIO()
    img.save(buf, format="PNG", optimize=False, compress_level=6)
    return buf.getvalue()


def write_slm(result: SlmImage, out_dir, name: str) -> list[Path]:
    """Write ``<name>_slm.png`` (8/16-bit grayscale) and ``<name>_slm.json``."""
    out = ensure_dir(out_dir)
    return [atomic_write_bytes(out / f"{name}_slm.png", _png_bytes(result.gray)),
            atomic_write_text(out / f"{name}_slm.json", _json(result.summary()))]


# ---------------------------------------------------------------------------------------------- orientation
@dataclass(frozen=True, eq=False)
class OrientationMap:
    """Fast-axis angle of a space-variant half-wave retarder per pixel.

    Attributes
    ----------
    angle_rad : ndarray (H, W)
        ``theta = sigma phi / 2 mod pi`` in [0, pi); row 0 = top (largest y).
    code : ndarray (H, W) uint16
        ``round(theta 65536 / pi) mod 65536`` (the PNG values); 0 outside the aperture.
    inside : ndarray (H, W) bool
    x_um, y_um : ndarray
    pitch_um : float
    sigma : int
    """

    angle_rad: np.ndarray
    code: np.ndarray
    inside: np.ndarray
    x_um: np.ndarray
    y_um: np.ndarray
    pitch_um: float
    sigma: int
    facing: Facing = Facing(source="assumed")

    def summary(self) -> dict:
        h, w = self.code.shape
        return {"illumination": route_illumination(self.facing),
                "route": "orient", "width_px": w, "height_px": h, "pitch_um": self.pitch_um, "input_spin": self.sigma,
                "angle": "fast axis, counter-clockwise from +x; theta = sigma * phi / 2 mod pi",
                "png_code": "angle_rad = code * pi / 65536", "csv": "angle_deg per pixel, nan outside the aperture",
                "orientation": "row 0 = top (+y), column 0 = left (-x)",
                "note": "a slow axis (liquid-crystal director of positive birefringence) at theta + 90 deg gives the "
                        "same beam up to a constant phase pi"}


def orientation_map(design, settings: RouteSettings | None = None) -> OrientationMap:
    """Fast-axis angle map ``theta = sigma phi / 2 mod pi`` on a square pixel grid over the aperture.

    Notes
    -----
    A half-wave retarder with its fast axis at ``theta`` turns ``|sigma>`` into ``|-sigma>`` with phase
    ``2 sigma theta`` (geometric phase), so ``theta = sigma phi / 2`` writes ``phi``.

    References
    ----------
    Marrucci, Manzo & Paparo 2006, Phys. Rev. Lett. 96, 163905.
    """
    from metalay.mask.mapping import geometric_rotation

    settings = settings or parse_routes(design)
    p = settings.orient.pitch_um
    hx, hy = design.aperture.half_extent_um
    w = max(1, int(math.ceil(2 * hx / p)))
    h = max(1, int(math.ceil(2 * hy / p)))
    x = (np.arange(w) - (w - 1) / 2) * p
    y = ((h - 1) / 2 - np.arange(h)) * p
    xx, yy = np.broadcast_arrays(x[None, :], y[:, None])
    theta = geometric_rotation(_phase_func(design)(xx, yy), design.sigma)
    inside = _inside(design.aperture, xx, yy)
    code = np.mod(np.rint(theta * 65536 / np.pi).astype(np.int64), 65536)
    code = np.where(inside, code, 0).astype(np.uint16)
    return OrientationMap(angle_rad=theta, code=code, inside=inside, x_um=x, y_um=y, pitch_um=p, sigma=design.sigma,
                          facing=route_facing(design))


def write_orientation(result: OrientationMap, out_dir, name: str) -> list[Path]:
    """Write ``<name>_orient.png`` (16-bit), ``<name>_orient.csv`` (degrees, 4 decimals) and a JSON summary."""
    out = ensure_dir(out_dir)
    code, inside = result.code, result.inside
    if result.facing.mirror_y:  # the retarder as the file shows it: mirrored rows, negated angles
        code = np.where(inside, np.mod(65536 - code.astype(np.int64), 65536), 0)[::-1].astype(np.uint16)
        inside = inside[::-1]
    deg = np.where(inside, code.astype(np.float64) * 180.0 / 65536, np.nan)
    buf = io.StringIO()
    np.savetxt(buf, deg, fmt="%.4f", delimiter=",")
    return [atomic_write_bytes(out / f"{name}_orient.png", _png_bytes(code)),
            atomic_write_text(out / f"{name}_orient.csv", buf.getvalue()),
            atomic_write_text(out / f"{name}_orient.json", _json(result.summary()))]


# ---------------------------------------------------------------------------------------------- comparison
@dataclass(frozen=True)
class RouteFigures:
    """One row of the comparison table.

    efficiency : mode overlap ``|<T, t>|^2 / (<T, T> P_in)`` with the ideal first-order beam ``T`` over the
        aperture (incident-power normalised).
    far_field : power fraction (of the incident power) inside the first-order window of the far field (a disk of
        half the carrier frequency around it), or None when the beam has no carrier.
    purity : OAM weight of the target charge in the first-order beam (carrier and smooth terms removed, other
        orders filtered out in the far field), or None when the target has no single vortex axis.
    expected : the textbook first-order efficiency of the route, or None.
    """

    route: str
    efficiency: float
    far_field: float | None
    purity: float | None
    expected: float | None
    note: str = ""


def _lattice_sample(design, x, y):
    p = design.lattice.period_um
    if design.lattice.kind == "square":
        return np.rint(x / p) * p, np.rint(y / p) * p
    rp = p * math.sqrt(3) / 2
    j = np.rint(y / rp)
    shift = np.where(np.mod(j, 2) == 1, p / 2, 0.0)
    return np.rint((x - shift) / p) * p + shift, j * rp


def compare_routes(design, settings: RouteSettings | None = None, *, routes=("ideal", "metasurface", "etch", "fork",
                                                                              "slm", "orient"),
                   samples: int | None = None, workers: int = 2) -> tuple[RouteFigures, ...]:
    """First-order efficiency and mode purity of each route on one common grid over the aperture.

    Parameters
    ----------
    design : Design
    settings : RouteSettings, optional
    routes : sequence of str
        Any of "ideal", "metasurface", "etch", "fork", "slm", "orient".
    samples : int, optional
        Grid samples across the larger aperture side (default ``routes.compare_samples``).

    Notes
    -----
    Each route's transmission ``t`` is evaluated at the grid points: etch ``exp(i 2 pi (n - 1) (D - e) / lambda)``
    from the mask depths ``e`` and the substrate index; fork 0/1 (amplitude) or -1/+1 (phase); SLM the shown phase
    of the nearest pixel (0 off the panel); orient ``exp(2 i sigma theta)`` of the nearest pixel; metasurface the
    geometric phase of the nearest lattice site (ideal cells, full conversion, rotation levels if set).
    Efficiency ``|sum conj(T) t|^2 / (sum |T|^2 sum 1)`` over the aperture with ``T = exp(i (phi + carrier))``.
    Far field by :func:`metalay.checks.grid.far_field`; purity by :func:`metalay.checks.oam.oam_spectrum`.

    References
    ----------
    Swanson 1989, MIT Lincoln Laboratory TR 854 (sinc^2(1/N)); Goodman 2005, sec. 4.4 (binary gratings);
    Torner, Torres & Carrasco 2005, Opt. Express 13, 873 (spiral spectrum).
    """
    grid = _compare_grid(design, settings or parse_routes(design), samples, workers)
    rows = []
    for r in routes:  # loop over routes (a handful)
        route = _COMPARED_ROUTES.get(r)
        if route is None:
            raise DesignError(f"{design.source_path}: unknown route {r!r}; allowed "
                              "ideal, metasurface, etch, fork, slm, orient")
        rows.append(route(grid))
    return tuple(rows)


@dataclass(frozen=True, eq=False)
class _CompareGrid:
    """The common sample grid of :func:`compare_routes` and the design's target on it."""

    design: object
    settings: RouteSettings
    n: int
    step: float
    ax: np.ndarray
    xx: np.ndarray
    yy: np.ndarray
    inside: np.ndarray
    phi: np.ndarray
    f_tilt: np.ndarray
    smooth: object        # tilt, lens and axicon phase (removed before the OAM spectrum), or 0.0
    charge: int | None
    centre: tuple
    workers: int

    @property
    def n_in(self) -> float:
        return float(self.inside.sum())


def _compare_grid(design, settings: RouteSettings, samples, workers: int) -> _CompareGrid:
    from metalay.checks.grid import centered_axis

    n = int(samples or settings.compare_samples)
    hx, hy = design.aperture.half_extent_um
    step = 2 * max(hx, hy) / n
    ax = centered_axis(n, step)
    xx, yy = np.meshgrid(ax, ax)
    lam = design.wavelength_nm
    smooth_terms = tuple(t for t in design.terms if isinstance(t, (Tilt, Lens, Axicon)))
    smooth = target_phase(smooth_terms, xx, yy, wavelength_nm=lam, sigma=design.sigma) if smooth_terms else 0.0
    charge, centre = net_charge(design)
    return _CompareGrid(design, settings, n, step, ax, xx, yy, _inside(design.aperture, xx, yy),
                        _phase_func(design)(xx, yy), _tilt_frequency(design.terms, lam), smooth, charge, centre,
                        workers)


def _route_figures(g: _CompareGrid, name, t, carrier_f, expected, note="") -> RouteFigures:
    """Efficiency against the target, first-order power fraction and OAM purity of transmission ``t``."""
    import scipy.fft as sfft

    from metalay.checks.grid import far_field, frequency_axis
    from metalay.checks.oam import oam_spectrum

    lam, n_in, inside, step, n = g.design.wavelength_nm, g.n_in, g.inside, g.step, g.n
    carrier = 2 * np.pi * (g.xx * carrier_f[0] + g.yy * carrier_f[1])
    ref = np.exp(1j * (g.phi + carrier))
    t = np.where(inside, t, 0)
    eff = float(abs(np.vdot(ref[inside], t[inside])) ** 2 / (n_in * n_in))
    f_lin = g.f_tilt + np.asarray(carrier_f)
    fmag = float(np.hypot(*f_lin))
    ff = None
    if fmag > 0:
        res = far_field(t.astype(np.complex64), step, step, lam, pad_factor=2.0, cell_aperture=False,
                        workers=g.workers)
        win = ((res.fx_per_um[None, :] - f_lin[0]) ** 2 + (res.fy_per_um[:, None] - f_lin[1]) ** 2
               < (0.5 * fmag) ** 2)
        ff = float(res.power[win].sum() * res.near_power / n_in)
    pur = None
    if g.charge is not None:
        b = t * np.exp(-1j * (g.smooth + carrier))
        if fmag > 0:
            m = int(sfft.next_fast_len(int(1.5 * n)))
            spec = sfft.fft2(b, s=(m, m), workers=g.workers)
            f = sfft.ifftshift(frequency_axis(m, step))
            spec *= (f[None, :] ** 2 + f[:, None] ** 2) < (0.5 * fmag) ** 2
            b = sfft.ifft2(spec, workers=g.workers)[:n, :n]
        sp = oam_spectrum(b, g.ax, g.ax, center=g.centre, charges=range(g.charge - 12, g.charge + 13),
                          workers=g.workers)
        pur = sp.purity(g.charge)
    return RouteFigures(name, eff, ff, pur, expected, note)


_ZERO = np.zeros(2)


def _route_ideal(g: _CompareGrid) -> RouteFigures:
    return _route_figures(g, "ideal", np.exp(1j * g.phi), _ZERO, 1.0, "continuous target phase")


def _route_metasurface(g: _CompareGrid) -> RouteFigures:
    from metalay.mask.mapping import geometric_rotation, quantise_rotation

    design = g.design
    sx, sy = _lattice_sample(design, g.xx, g.yy)
    theta = geometric_rotation(_phase_func(design)(sx, sy), design.sigma)
    note = "ideal cells, geometric phase at lattice sites"
    levels = design.mask.rotation_levels
    if levels:
        theta, _ = quantise_rotation(theta, levels)
        note += f", {levels} rotation levels"
    exp_ms = multilevel_efficiency(levels) if levels else None
    return _route_figures(g, "metasurface", np.exp(2j * design.sigma * theta), _ZERO, exp_ms, note)


def _route_etch(g: _CompareGrid) -> RouteFigures:
    design, es, lam = g.design, g.settings.etch, g.design.wavelength_nm
    nsub = substrate_index(es.material, lam, index=es.index, where=design.source_path, base_dir=g.settings.base_dir)
    depths = etch_depths_nm(es.levels, lam, nsub)
    e = etched_depth_nm(g.phi, es.levels, lam, nsub)
    t = np.exp(1j * 2 * np.pi * (nsub - 1) * (depths.sum() - e) / lam)
    return _route_figures(g, "etch", t, _ZERO, multilevel_efficiency(es.levels),
                          f"{es.levels} levels, n = {nsub:.4f}, phase from depth and index")


def _route_fork(g: _CompareGrid) -> RouteFigures:
    design, fs = g.design, g.settings.fork
    pf = target_phase(_fork_terms(design, fs), g.xx, g.yy, wavelength_nm=design.wavelength_nm, sigma=design.sigma)
    line = np.cos(pf) > math.cos(math.pi * fs.duty)
    t = line.astype(np.complex128) if fs.kind == "amplitude" else np.where(line, -1.0, 1.0).astype(complex)
    az = math.radians(fs.azimuth_deg)
    cf = np.array([math.cos(az), math.sin(az)]) / fs.period_um
    expected = binary_grating_efficiency(fs.kind, fs.duty)
    if fs.charge is not None:
        return RouteFigures("fork", float("nan"), None, None, expected,
                            "skipped: routes.fork.charge overrides the target")
    if 2 * g.step > fs.period_um / 2:
        return RouteFigures("fork", float("nan"), None, None, expected,
                            "skipped: compare grid too coarse for the fork period")
    return _route_figures(g, "fork", t, cf, expected, f"binary {fs.kind}, period {fs.period_um:g} um, duty {fs.duty:g}")


def _route_slm(g: _CompareGrid) -> RouteFigures:
    im = slm_image(g.design, g.settings)
    h, w = im.gray.shape
    m = im.magnification  # the panel is imaged onto the design plane at 1 / m
    c = np.rint(m * g.xx / im.pitch_um + (w - 1) / 2).astype(np.int64)
    rr = np.rint((h - 1) / 2 - m * g.yy / im.pitch_um).astype(np.int64)
    on = (c >= 0) & (c < w) & (rr >= 0) & (rr < h)
    t = np.where(on, np.exp(1j * im.phase_rad[np.clip(rr, 0, h - 1), np.clip(c, 0, w - 1)]), 0)
    exp_slm = None if im.lut_source else multilevel_efficiency(2 ** im.bit_depth)
    return _route_figures(g, "slm", t, im.carrier_f_per_um * m, exp_slm,
                          f"{im.bit_depth}-bit, pitch {im.pitch_um:g} um, magnification {m:.4g}"
                          + (", LUT" if im.lut_source else ""))


def _route_orient(g: _CompareGrid) -> RouteFigures:
    om = orientation_map(g.design, g.settings)
    h, w = om.code.shape
    c = np.clip(np.rint(g.xx / om.pitch_um + (w - 1) / 2).astype(np.int64), 0, w - 1)
    rr = np.clip(np.rint((h - 1) / 2 - g.yy / om.pitch_um).astype(np.int64), 0, h - 1)
    theta = om.code[rr, c].astype(np.float64) * np.pi / 65536
    return _route_figures(g, "orient", np.exp(2j * g.design.sigma * theta), _ZERO, None,
                          f"half-wave retarder, pitch {om.pitch_um:g} um")


#: The routes :func:`compare_routes` knows, by name.
_COMPARED_ROUTES = {"ideal": _route_ideal, "metasurface": _route_metasurface, "etch": _route_etch,
                    "fork": _route_fork, "slm": _route_slm, "orient": _route_orient}


def format_table(rows) -> list[str]:
    """Text lines of the comparison table."""
    def f(v):
        return "   -  " if v is None or (isinstance(v, float) and math.isnan(v)) else f"{v:6.4f}"

    lines = [f"{'route':<12} {'eff':>6} {'farfld':>6} {'purity':>6} {'expect':>6}  note"]
    for r in rows:
        lines.append(f"{r.route:<12} {f(r.efficiency)} {f(r.far_field)} {f(r.purity)} {f(r.expected)}  {r.note}")
    return lines
