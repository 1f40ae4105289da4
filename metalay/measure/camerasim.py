"""Synthetic camera images of vortex beams, for testing charge readers and for checking a set-up on paper.

Each image comes from a formula that does not share code with the readers in :mod:`metalay.measure.imagecharge`:

* fork interferogram: ``I = |E + R|^2`` with ``R`` a plane wave tilted towards a chosen azimuth;
* spiral interferogram: ``R`` a spherical wave ``exp(i k r^2 / (2 R_c))`` (diverging for ``R_c > 0``);
* far field behind an equilateral triangular aperture: ``|FFT|^2`` of the aperture-limited field, zero-padded.

The beam is a Laguerre-Gauss ``LG_0^l`` field ``(r / w)^|l| exp(-r^2 / w^2) exp(i l phi)`` (Allen et al. 1992,
Phys. Rev. A 45, 8185) with ``phi = atan2(y, x)`` (the project's vortex convention).  Camera effects: a background
offset and gradient, Poisson (shot) noise, Gaussian read noise, quantisation to 8 or 16 bits.

Image convention (README "Physics conventions" and :mod:`metalay.routes`): row 0 is the top (+y), column 0 the left
(-x), as seen looking towards the source (the beam travels towards the viewer); pixel ``(row, col)`` sits at
``x = col - (n_cols - 1) / 2``, ``y = (n_rows - 1) / 2 - row`` pixels from the image centre.

These are invented test scenes, not measurements.
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from metalay.errors import MetalayError

__all__ = ["pixel_coordinates", "lg_field", "fork_scene", "spiral_scene", "triangle_mask", "triangle_scene",
           "CameraModel", "expose", "encode_image", "STUDY_FORMATS", "study_scene", "simulate_image"]


def pixel_coordinates(shape) -> tuple:
    """``(x, y)`` in pixels from the image centre for an image of ``shape = (rows, cols)`` (row 0 = +y)."""
    rows, cols = int(shape[0]), int(shape[1])
    x = np.arange(cols, dtype=np.float64) - (cols - 1) / 2
    y = (rows - 1) / 2 - np.arange(rows, dtype=np.float64)
    return np.meshgrid(x, y)


def lg_field(x, y, charge: int, waist: float, *, center=(0.0, 0.0)) -> np.ndarray:
    """``LG_0^l`` amplitude ``(r / w)^|l| exp(-r^2 / w^2) exp(i l atan2(y - y0, x - x0))`` (peak not normalised)."""
    dx, dy = np.asarray(x) - center[0], np.asarray(y) - center[1]
    r = np.hypot(dx, dy) / waist
    return r ** abs(int(charge)) * np.exp(-r * r) * np.exp(1j * int(charge) * np.arctan2(dy, dx))


def _waist_for_ring(charge: int, ring_radius: float) -> float:
    """Waist putting the ``LG_0^l`` intensity maximum at ``ring_radius`` (``r_max = w sqrt(|l| / 2)``)."""
    return ring_radius / np.sqrt(max(abs(int(charge)), 1) / 2)


def fork_scene(shape, charge: int, *, ring_radius_px: float, fringe_period_px: float, azimuth_deg: float = 0.0,
               center_px=(0.0, 0.0), reference_waist_px: float | None = None, reference_ratio: float = 1.0):
    """Intensity of an ``LG_0^l`` beam with a tilted plane reference: the fork pattern.

    Parameters
    ----------
    shape : (rows, cols)
    charge : int
    ring_radius_px : float
        Radius of the beam's bright ring (pixels).
    fringe_period_px : float
        Period of the straight fringes (reference tilt).
    azimuth_deg : float
        Direction the reference is tilted towards, from +x towards +y (image: right, up).
    center_px : (float, float)
        Beam axis from the image centre (x right, y up).
    reference_waist_px : float, optional
        Gaussian envelope of the reference (default: flat).
    reference_ratio : float
        Reference amplitude over the beam's peak amplitude.

    Returns
    -------
    ndarray (rows, cols) float64
        ``|E + R|^2`` with ``R = a exp(+2 pi i f_c . r)``; for ``l > 0`` and a reference tilted towards +x, the
        ``|l|`` extra fringes open towards +y (the top of the image).
    """
    xx, yy = pixel_coordinates(shape)
    e = lg_field(xx, yy, charge, _waist_for_ring(charge, ring_radius_px), center=center_px)
    e /= np.abs(e).max()
    az = np.radians(azimuth_deg)
    ref = reference_ratio * np.exp(2j * np.pi * (xx * np.cos(az) + yy * np.sin(az)) / fringe_period_px)
    if reference_waist_px:
        ref = ref * np.exp(-((xx - center_px[0]) ** 2 + (yy - center_px[1]) ** 2) / reference_waist_px ** 2)
    return np.abs(e + ref) ** 2


def spiral_scene(shape, charge: int, *, ring_radius_px: float, rings_to_edge: float, center_px=(0.0, 0.0),
                 tilt_cycles: tuple = (0.0, 0.0), reference_ratio: float = 1.0, diverging: bool = True):
    """Intensity of an ``LG_0^l`` beam with a coaxial spherical reference: a spiral of ``|l|`` arms.

    Parameters
    ----------
    shape : (rows, cols)
    charge : int
    ring_radius_px : float
    rings_to_edge : float
        Number of reference fringes (phase ``k r^2 / (2 R_c)`` in turns) out to twice the ring radius.
    center_px : (float, float)
        Axis of beam and reference.
    tilt_cycles : (float, float)
        Extra linear phase of the reference, in cycles across ``2 ring_radius`` along x and y (misalignment).
    reference_ratio : float
    diverging : bool
        Diverging (``R_c > 0``) or converging reference.

    Returns
    -------
    ndarray (rows, cols) float64
        ``|E + a exp(i (+-alpha r^2 + tilt))|^2`` with ``alpha = 2 pi rings / (2 r_ring)^2``.
    """
    xx, yy = pixel_coordinates(shape)
    e = lg_field(xx, yy, charge, _waist_for_ring(charge, ring_radius_px), center=center_px)
    e /= np.abs(e).max()
    dx, dy = xx - center_px[0], yy - center_px[1]
    alpha = 2 * np.pi * rings_to_edge / (2 * ring_radius_px) ** 2 * (1 if diverging else -1)
    tilt = 2 * np.pi * (tilt_cycles[0] * dx + tilt_cycles[1] * dy) / (2 * ring_radius_px)
    ref = reference_ratio * np.exp(1j * (alpha * (dx * dx + dy * dy) + tilt))
    return np.abs(e + ref) ** 2


def triangle_mask(x, y, side: float, *, apex_deg: float = 90.0, center=(0.0, 0.0)) -> np.ndarray:
    """Inside of an equilateral triangle of ``side`` with its centroid at ``center`` and a vertex towards
    ``apex_deg`` (from +x towards +y)."""
    dx, dy = np.asarray(x) - center[0], np.asarray(y) - center[1]
    inradius = side / (2 * np.sqrt(3.0))
    inside = np.ones(np.broadcast(dx, dy).shape, dtype=bool)
    for k in range(3):  # three edges
        n = np.radians(apex_deg + 180.0 + 120.0 * k)  # outward normal of the edge facing vertex k
        inside &= dx * np.cos(n) + dy * np.sin(n) <= inradius
    return inside


def triangle_scene(shape, charge: int, *, spot_scale_px: float, apex_deg: float = 90.0, center_px=(0.0, 0.0),
                   ring_to_side: float = 0.5, samples: int = 192):
    """Far-field intensity of an ``LG_0^l`` beam behind an equilateral triangular aperture.

    Parameters
    ----------
    shape : (rows, cols)
    charge : int
    spot_scale_px : float
        Camera pixels per ``wavelength F / side`` (the far-field unit of the aperture).
    apex_deg : float
        Aperture vertex direction (the camera sees the far field with the same x, y axes).
    center_px : (float, float)
        Position of the far-field centre (beam axis) in the image (off-centre beam or tilt).
    ring_to_side : float
        Ring radius of the beam over the side of the triangle (centred on the beam axis).
    samples : int
        Near-field samples across ``2.4`` sides.

    Returns
    -------
    ndarray (rows, cols) float64

    Notes
    -----
    Near field sampled at ``dx = 2.4 side / samples``; far field by a zero-padded FFT with padding chosen so that
    one FFT bin is ``1 / spot_scale_px`` of ``1 / side``, then shifted by whole bins to ``center_px`` (bilinear for
    the fraction of a pixel).  Independent of the readers (Goodman 2005, sec. 4.2).
    """
    from scipy import ndimage

    side = 1.0
    dx = 2.4 * side / samples
    axis = (np.arange(samples) - samples // 2) * dx
    xx, yy = np.meshgrid(axis, axis)  # y grows with the row index here; flipped to image rows below
    e = lg_field(xx, yy, charge, _waist_for_ring(charge, ring_to_side * side)) * triangle_mask(
        xx, yy, side, apex_deg=apex_deg)
    m = int(sfft.next_fast_len(int(round(spot_scale_px * side / dx))))
    spec = np.abs(sfft.fftshift(sfft.fft2(e, s=(m, m), workers=2))) ** 2
    scale = m * dx / (spot_scale_px * side)  # FFT bins per camera pixel (about 1)
    rows, cols = int(shape[0]), int(shape[1])
    xi, yi = pixel_coordinates(shape)
    cu = (xi - center_px[0]) * scale + m // 2
    cv = (yi - center_px[1]) * scale + m // 2
    out = ndimage.map_coordinates(spec, [cv.ravel(), cu.ravel()], order=1, mode="constant")
    return out.reshape(rows, cols) / spec.max()


@dataclass(frozen=True)
class CameraModel:
    """Camera response: counts = gain x (intensity normalised to its maximum) + background, with noise.

    Attributes
    ----------
    bits : int
        8 or 16.
    peak_fraction : float
        Counts at the brightest pixel over full scale (no saturation below 1).
    background_fraction : float
        Constant offset over full scale.
    gradient_fraction : float
        Background ramp across the image (peak to peak) over full scale, towards ``gradient_deg``.
    gradient_deg : float
    photons_at_peak : float
        Photo-electrons at the brightest pixel (Poisson noise); 0 = none.
    read_noise_fraction : float
        Gaussian read noise (standard deviation) over full scale.
    """

    bits: int = 8
    peak_fraction: float = 0.85
    background_fraction: float = 0.05
    gradient_fraction: float = 0.05
    gradient_deg: float = 30.0
    photons_at_peak: float = 2000.0
    read_noise_fraction: float = 0.01


def expose(intensity: np.ndarray, camera: CameraModel, rng: np.random.Generator) -> np.ndarray:
    """Camera image (uint8 or uint16) of an intensity pattern.

    Notes
    -----
    ``signal = I / max(I)``; shot noise ``Poisson(signal N) / N`` with ``N`` photons at the peak; counts
    ``full (peak signal + background + ramp + read noise)`` rounded and clipped to ``0 .. 2^bits - 1``.
    """
    if camera.bits not in (8, 16):
        raise MetalayError(f"camera bits = {camera.bits!r}; allowed: 8, 16")
    full = float(2 ** camera.bits - 1)
    sig = np.asarray(intensity, dtype=np.float64)
    sig = sig / sig.max() if sig.max() > 0 else sig
    if camera.photons_at_peak > 0:
        sig = rng.poisson(sig * camera.photons_at_peak) / camera.photons_at_peak
    xx, yy = pixel_coordinates(sig.shape)
    g = np.radians(camera.gradient_deg)
    ramp = xx * np.cos(g) + yy * np.sin(g)
    ramp = (ramp - ramp.min()) / max(np.ptp(ramp), 1e-12)
    counts = full * (camera.peak_fraction * sig + camera.background_fraction + camera.gradient_fraction * ramp
                     + camera.read_noise_fraction * rng.standard_normal(sig.shape))
    dtype = np.uint8 if camera.bits == 8 else np.uint16
    return np.clip(np.rint(counts), 0, full).astype(dtype)


def encode_image(image: np.ndarray, fmt: str) -> bytes:
    """PNG or TIFF bytes of a uint8 / uint16 grayscale image (deterministic: no timestamps, no software tag).

    Parameters
    ----------
    image : ndarray (rows, cols) uint8 or uint16
    fmt : {"png", "tiff"}
    """
    from PIL import Image

    image = np.ascontiguousarray(image)
    if image.dtype == np.uint8:
        img = Image.fromarray(image)
    elif image.dtype == np.uint16:
        img = Image.frombytes("I;16", (image.shape[1], image.shape[0]), image.astype("<u2").tobytes())
    else:
        raise MetalayError(f"encode_image: dtype {image.dtype} not allowed; uint8 or uint16")
    if fmt not in ("png", "tiff"):
        raise MetalayError(f"encode_image: fmt = {fmt!r}; allowed: 'png', 'tiff'")
    buf = io.BytesIO()
    img.save(buf, format="PNG" if fmt == "png" else "TIFF")
    return buf.getvalue()


#: Image formats of the study: (name, bits, Pillow format).
STUDY_FORMATS = (("png8", 8, "png"), ("png16", 16, "png"), ("tiff16", 16, "tiff"))


def study_scene(method: str, charge: int, rng: np.random.Generator, *, fmt: str = "png8", shape=(384, 384)):
    """A randomised test scene for one reader: camera image bytes and what the reader is told.

    Parameters
    ----------
    method : {"fork", "spiral", "triangle"}
    charge : int
    rng : numpy Generator
        All randomness (same seed, same scene, same bytes).
    fmt : {"png8", "png16", "tiff16"}
        File format and bit depth of the returned bytes.
    shape : (rows, cols)

    Returns
    -------
    (bytes, dict)
        The encoded image and the reader's keyword arguments (``reference_azimuth_deg``, ``reference`` or
        ``apex_deg``).

    Notes
    -----
    Ranges (invented, meant to be harder than a careful set-up): beam centre up to 60 px off the image centre;
    fork: ring radius 60-80 px, fringe period 5-9 px, reference tilted towards a random azimuth of which the reader
    is told a value up to 40 degrees off; spiral: ring radius 60-80 px, 8-14 reference rings out to twice the ring
    radius, a residual reference tilt of up to 0.5 cycles across the ring, diverging or converging; triangle:
    random aperture orientation, 5-9 camera pixels per ``wavelength F / side``, ring radius half the side.  Camera:
    200-2000 photo-electrons at the peak, read noise 1-3 % and background 0-15 % of full scale, a background ramp
    of 0-15 % in a random direction, 8 or 16 bits as the format says.
    """
    names = [f[0] for f in STUDY_FORMATS]
    if fmt not in names:
        raise MetalayError(f"study_scene: fmt = {fmt!r}; allowed: {names}")
    _, bits, pil = STUDY_FORMATS[names.index(fmt)]
    centre = tuple(rng.uniform(-60, 60, 2))
    if method == "fork":
        az = float(rng.uniform(0, 360))
        inten = fork_scene(shape, charge, ring_radius_px=float(rng.uniform(60, 80)),
                           fringe_period_px=float(rng.uniform(5, 9)), azimuth_deg=az, center_px=centre,
                           reference_waist_px=float(rng.uniform(150, 400)))
        hints = {"reference_azimuth_deg": float(az + rng.uniform(-40, 40))}
    elif method == "spiral":
        div = bool(rng.integers(0, 2))
        inten = spiral_scene(shape, charge, ring_radius_px=float(rng.uniform(60, 80)),
                             rings_to_edge=float(rng.uniform(8, 14)), center_px=(0.8 * centre[0], 0.8 * centre[1]),
                             tilt_cycles=tuple(rng.uniform(-0.5, 0.5, 2)), diverging=div)
        hints = {"reference": "diverging" if div else "converging"}
    elif method == "triangle":
        apex = float(rng.uniform(-180, 180))
        inten = triangle_scene(shape, charge, spot_scale_px=float(rng.uniform(5, 9)), apex_deg=apex,
                               center_px=centre)
        hints = {"apex_deg": apex}
    else:
        raise MetalayError(f"study_scene: method = {method!r}; allowed: 'fork', 'spiral', 'triangle'")
    cam = CameraModel(bits=bits, peak_fraction=float(rng.uniform(0.6, 0.95)),
                      background_fraction=float(rng.uniform(0, 0.15)), gradient_fraction=float(rng.uniform(0, 0.15)),
                      gradient_deg=float(rng.uniform(0, 360)), photons_at_peak=float(rng.uniform(200, 2000)),
                      read_noise_fraction=float(rng.uniform(0.01, 0.03)))
    return encode_image(expose(inten, cam, rng), pil), hints


def simulate_image(method: str, charge: int, *, setup, size_px: int = 384, bits: int = 8, fmt: str = "png",
                   seed: int = 0) -> bytes:
    """An invented camera image of one scene, encoded (for trying a reading set-up, not a measurement).

    Parameters
    ----------
    method : {"fork", "spiral", "triangle"}
    charge : int
        ``|l| <= 15``.
    setup : float or str
        Reference tilt azimuth in degrees (fork), ``"diverging"`` / ``"converging"`` (spiral), or the aperture's
        apex direction in degrees (triangle): what ``metalay charge read`` must then be told.
    size_px : int
        Square image side, 64..2048.
    bits : {8, 16}
    fmt : {"png", "tiff"}
    seed : int
        Noise seed (same seed, same bytes).

    Notes
    -----
    Scenes: beam ring radius 0.18 of the side, fork fringes 7 px apart with a Gaussian reference of waist 0.6 of
    the side, spiral with 10 reference rings out to twice the ring radius, triangle far field 7 px per
    ``lambda F / side``; camera :class:`CameraModel` defaults (5 % background, 5 % ramp, 2000 photo-electrons at
    the peak, 1 % read noise).
    """
    if method not in ("fork", "spiral", "triangle"):
        raise MetalayError(f"simulate: method = {method!r}; allowed: 'fork', 'spiral', 'triangle'")
    if not (isinstance(charge, (int, np.integer)) and abs(int(charge)) <= 15):
        raise MetalayError(f"simulate: charge = {charge!r}; allowed integers -15..15")
    if not (isinstance(size_px, (int, np.integer)) and 64 <= size_px <= 2048):
        raise MetalayError(f"simulate: size_px = {size_px!r}; allowed 64..2048")
    if bits not in (8, 16) or fmt not in ("png", "tiff"):
        raise MetalayError(f"simulate: bits = {bits!r}, fmt = {fmt!r}; allowed bits 8 or 16, fmt 'png' or 'tiff'")
    shape = (int(size_px), int(size_px))
    ring = 0.18 * size_px
    if method == "fork":
        inten = fork_scene(shape, int(charge), ring_radius_px=ring, fringe_period_px=7.0, azimuth_deg=float(setup),
                           reference_waist_px=0.6 * size_px)
    elif method == "spiral":
        if setup not in ("diverging", "converging"):
            raise MetalayError(f"simulate: spiral reference = {setup!r}; allowed: 'diverging', 'converging'")
        inten = spiral_scene(shape, int(charge), ring_radius_px=ring, rings_to_edge=10.0,
                             diverging=setup == "diverging")
    else:
        inten = triangle_scene(shape, int(charge), spot_scale_px=7.0, apex_deg=float(setup))
    img = expose(inten, CameraModel(bits=int(bits)), np.random.default_rng(int(seed)))
    return encode_image(img, fmt)
