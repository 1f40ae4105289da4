"""Topological charge read from a camera image: fork and spiral interferograms, triangular-aperture far fields;
and the triangular aperture itself as mask geometry.

Image convention: row 0 is the top (+y), column 0 the left (-x), as seen looking towards the source (the beam
travels towards the viewer) - the convention of :mod:`metalay.routes` and ``measure.camerasim``. A camera that
mirrors the image (a reflection in the path, a sensor read out flipped) reverses every sign below: flip the image
first.  Charges follow the project's convention: a vortex ``exp(i l atan2(y, x))`` with time dependence
``exp(-i omega t)``.

Sign conventions (each pinned by a test that fails when flipped)
----------------------------------------------------------------
* Fork (``I = |E + R|^2``, ``R`` a plane wave tilted towards azimuth ``az``): for ``l > 0`` and a reference tilted
  towards +x, the ``|l|`` extra fringes start at the core and open towards +y (the top of the image); towards -y
  for ``l < 0``.  In general the extra fringes lie on the side ``az + 90 deg`` for ``l > 0``.  The image alone does
  not fix the sign: the reader must be told which way the reference is tilted.
* Spiral (``R = exp(i k r^2 / (2 R_c))``, diverging for ``R_c > 0``): for ``l > 0`` and a diverging reference the
  ``|l|`` arms wind counter-clockwise (x right, y up) going outwards; a converging reference reverses it.
* Triangle (Hickmann et al. 2010): the far field behind an equilateral triangle shows a triangular lattice of
  spots with ``|l| + 1`` spots per side; with the aperture's vertex towards ``apex_deg``, the spot triangle has a
  vertex towards ``apex_deg + 90 deg`` for ``l > 0`` and ``apex_deg - 90 deg`` for ``l < 0`` (the far field as a
  lens's focal plane shows it, same axes as the aperture; found with the FFT model of :mod:`metalay.measure.camerasim`).

Reading untrusted files
-----------------------
:func:`read_image` decodes PNG or TIFF (8 or 16 bit, grayscale or colour) with Pillow in a separate process, after
checking the pixel count from the header against a limit, so a decoder crash or a decompression bomb becomes a
one-line :class:`~metalay.errors.MetalayError` instead of taking the caller down.

References
----------
Heckenberg, McDuff, Smith, Rubinsztein-Dunlop & Wegener 1992, Opt. Quantum Electron. 24, S951 (fork holograms).
Takeda, Ina & Kobayashi 1982, J. Opt. Soc. Am. 72, 156 (Fourier-transform fringe analysis).
Harris, Hill, Tapster & Vaughan 1994, Opt. Commun. 106, 161 (spiral interferograms of vortex beams).
Hickmann, Fonseca, Soares & Chavez-Cerda 2010, Phys. Rev. Lett. 105, 053904 (triangular aperture).
Banguilan & Hermosa 2019, arXiv:1903.08903 (the triangle must scale with the beam radius).
"""

from __future__ import annotations

import io
import os
import subprocess
import sys
from dataclasses import dataclass, field

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from metalay.errors import MetalayError

__all__ = [
    "MAX_IMAGE_PIXELS",
    "read_image",
    "ImageChargeReading",
    "read_fork",
    "read_spiral",
    "read_triangle",
    "TriangleAperture",
    "triangle_side_for_beam",
    "triangle_aperture",
    "READ_METHODS",
    "read_charge_file",
]

#: Default limit on decoded pixels (a 8k x 6k sensor has 4.9e7).
MAX_IMAGE_PIXELS = 60_000_000

#: More maxima than this above the spot threshold is not a lattice of |l| <= 15 (136 spots): unreadable.
MAX_TRIANGLE_MAXIMA = 1000

_DECODE = r"""
import io, sys
import numpy as np
from PIL import Image
path, limit = sys.argv[1], int(sys.argv[2])
Image.MAX_IMAGE_PIXELS = None
try:
    im = Image.open(path)
    w, h = im.size
    if w * h > limit or w < 1 or h < 1:
        sys.stderr.write(f"image of {w} x {h} pixels exceeds the limit of {limit} pixels\n"); sys.exit(3)
    fmt = im.format
    if fmt not in ("PNG", "TIFF"):
        sys.stderr.write(f"format {fmt} is not allowed (PNG or TIFF)\n"); sys.exit(3)
    mode = im.mode
    if mode in ("I;16", "I;16B", "I;16L", "I;16N"):
        arr = np.asarray(im).astype(np.uint16)
    elif mode in ("I", "F"):
        arr = np.asarray(im)
    elif mode in ("1", "L", "P", "LA", "PA", "RGB", "RGBA", "CMYK", "YCbCr"):
        arr = np.asarray(im.convert("L"))
    else:
        sys.stderr.write(f"pixel mode {mode} is not supported\n"); sys.exit(3)
except SystemExit:
    raise
except Exception as exc:
    sys.stderr.write(f"cannot decode ({type(exc).__name__}: {exc})\n"); sys.exit(3)
buf = io.BytesIO(); np.save(buf, np.ascontiguousarray(arr), allow_pickle=False)
sys.stdout.buffer.write(buf.getvalue())
"""


def read_image(path, *, max_pixels: int = MAX_IMAGE_PIXELS, isolate: bool = True, timeout_s: float = 60.0):
    """Read a PNG or TIFF camera image as a 2-D float64 array of counts (colour converted to luminance).

    Parameters
    ----------
    path : str or Path
    max_pixels : int
        Largest width x height accepted (checked from the header before decoding).
    isolate : bool
        Decode in a child process (default): a crash or hang of the decoder becomes a one-line error.  ``False``
        decodes here (for trusted files; same checks).
    timeout_s : float
        Time allowed for the child.

    Returns
    -------
    ndarray (rows, cols) float64
        Row 0 is the top of the image.  8-bit images give 0..255, 16-bit 0..65535.

    Raises
    ------
    MetalayError
        One line naming the file: missing, not PNG/TIFF, too many pixels, undecodable, crashed decoder.
    """
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise MetalayError(f"{path}: image file not found")
    if isolate:
        try:
            proc = subprocess.run([sys.executable, "-c", _DECODE, path, str(int(max_pixels))], capture_output=True,
                                  timeout=timeout_s)
        except subprocess.TimeoutExpired as exc:
            raise MetalayError(f"{path}: image decoder did not finish within {timeout_s:g} s") from exc
        if proc.returncode < 0:
            raise MetalayError(f"{path}: malformed image (the decoder crashed with signal {-proc.returncode})")
        if proc.returncode != 0:
            lines = [ln for ln in proc.stderr.decode("utf-8", "replace").splitlines() if ln.strip()]
            raise MetalayError(f"{path}: {lines[-1] if lines else 'cannot decode the image'}")
        if len(proc.stdout) > 8 * int(max_pixels) + 4096:
            raise MetalayError(f"{path}: decoded image larger than {max_pixels} pixels")
        arr = np.load(io.BytesIO(proc.stdout), allow_pickle=False)
    else:
        arr = _decode_here(path, int(max_pixels))
    if arr.ndim != 2 or arr.size == 0:
        raise MetalayError(f"{path}: expected a single-channel 2-D image, got shape {arr.shape}")
    return arr.astype(np.float64)


def _decode_here(path: str, max_pixels: int) -> np.ndarray:
    from PIL import Image

    try:
        with Image.open(path) as im:
            w, h = im.size
            if w * h > max_pixels:
                raise MetalayError(f"{path}: image of {w} x {h} pixels exceeds the limit of {max_pixels} pixels")
            if im.format not in ("PNG", "TIFF"):
                raise MetalayError(f"{path}: format {im.format} is not allowed (PNG or TIFF)")
            if im.mode.startswith("I;16"):
                return np.asarray(im).astype(np.uint16)
            if im.mode in ("I", "F"):
                return np.asarray(im)
            return np.asarray(im.convert("L"))
    except MetalayError:
        raise
    except Image.DecompressionBombError as exc:
        raise MetalayError(f"{path}: image exceeds the limit of {max_pixels} pixels ({exc})") from exc
    except Exception as exc:  # Pillow raises many types on malformed files
        raise MetalayError(f"{path}: cannot decode ({type(exc).__name__}: {exc})") from exc


@dataclass(frozen=True)
class ImageChargeReading:
    """Charge read from an image.

    Attributes
    ----------
    charge : int or None
        The charge, or None when the reading is unreadable.
    status : {"ok", "unreadable"}
    method : {"fork", "spiral", "triangle"}
    center_px : (float, float)
        Core or pattern centre as image ``(column, row)``.
    reason : str
        Why the reading is unreadable ("" when ok).
    evidence : dict
        Method-specific numbers (windings per loop, spectral peak, spots per side...).
    """

    charge: int | None
    status: str
    method: str
    center_px: tuple
    reason: str = ""
    evidence: dict = field(default_factory=dict)


def _physical(image) -> np.ndarray:
    """Image as float64 with row index growing along +y (row 0 of the file is the top)."""
    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 2 or min(img.shape) < 16:
        raise MetalayError(f"image must be 2-D and at least 16 x 16 pixels, got shape {img.shape}")
    if not np.all(np.isfinite(img)):
        raise MetalayError("image has non-finite values")
    return img[::-1].copy()


def _blank(img: np.ndarray, method: str):
    """An unreadable reading for an image without contrast, else None."""
    if not np.ptp(img) > 0:
        return ImageChargeReading(None, "unreadable", method, ((img.shape[1] - 1) / 2, (img.shape[0] - 1) / 2),
                                  "blank image (no contrast)")
    return None


def _to_image_px(x: float, y: float, shape) -> tuple:
    """Physical (column, row-from-bottom) -> image (column, row-from-top)."""
    return float(x), float(shape[0] - 1 - y)


def _tukey(n: int, frac: float = 0.15) -> np.ndarray:
    w = np.ones(n)
    m = max(1, int(frac * n / 2))
    ramp = 0.5 * (1 - np.cos(np.pi * np.arange(m) / m))
    w[:m], w[n - m:] = ramp, ramp[::-1]
    return w


def _loop_winding(field_: np.ndarray, cx: float, cy: float, r: float) -> tuple:
    """Winding (turns) of a complex field around a circle (bilinear samples) and its smallest sampled modulus."""
    n = int(max(256, 8 * 2 * np.pi * r))
    t = 2 * np.pi * np.arange(n) / n
    coords = np.stack([cy + r * np.sin(t), cx + r * np.cos(t)])
    re = ndimage.map_coordinates(field_.real, coords, order=1, mode="nearest")
    im = ndimage.map_coordinates(field_.imag, coords, order=1, mode="nearest")
    z = re + 1j * im
    d = np.diff(np.concatenate([np.angle(z), np.angle(z[:1])]))
    d = (d + np.pi) % (2 * np.pi) - np.pi
    return float(d.sum() / (2 * np.pi)), float(np.abs(z).min())


def _radial_mean(amp: np.ndarray, cx: float, cy: float, r_max: float, bins_per_px: float = 1.0):
    yy, xx = np.indices(amp.shape)
    r = np.hypot(xx - cx, yy - cy)
    nb = max(4, int(r_max * bins_per_px))
    idx = np.minimum((r / r_max * nb).astype(int), nb)
    s = np.bincount(idx.ravel(), amp.ravel(), nb + 1)[:nb]
    c = np.bincount(idx.ravel(), minlength=nb + 1)[:nb]
    return (np.arange(nb) + 0.5) * r_max / nb, s / np.maximum(c, 1)


def _beam_radius(img: np.ndarray) -> float:
    """RMS radius (px) of the positive part of a median-subtracted, smoothed image."""
    w = np.clip(ndimage.gaussian_filter(img - np.median(img), 2.0), 0, None)
    tot = w.sum()
    if tot <= 0:
        return float(min(img.shape)) / 4
    yy, xx = np.indices(img.shape)
    cx, cy = (w * xx).sum() / tot, (w * yy).sum() / tot
    return float(np.sqrt((w * ((xx - cx) ** 2 + (yy - cy) ** 2)).sum() / tot))


def _fork_sideband(img: np.ndarray, azimuth_deg: float):
    """Demodulated side band ``~ E R*`` of a fork interferogram and the carrier (cycles/px) found."""
    ny, nx = img.shape
    work = (img - np.median(img)) * np.outer(_tukey(ny), _tukey(nx))
    spec = sfft.fft2(work)
    fx, fy = sfft.fftfreq(nx), sfft.fftfreq(ny)
    fr = np.hypot(fx[None, :], fy[:, None])
    az = np.radians(azimuth_deg)
    side = fx[None, :] * np.cos(az) + fy[:, None] * np.sin(az) > 0
    f_min = max(3.0 / min(nx, ny), 1.5 / max(_beam_radius(img), 1.0))
    mag = ndimage.gaussian_filter(np.abs(sfft.fftshift(spec)), 1.0, mode="wrap")
    mag = sfft.ifftshift(mag) * (side & (fr > f_min) & (fr < 0.45))
    iy, ix = np.unravel_index(int(np.argmax(mag)), mag.shape)
    fp = np.array([fx[ix], fy[iy]])
    near = np.hypot(fx[None, :] - fp[0], fy[:, None] - fp[1]) < 0.3 * np.hypot(*fp)
    p = np.abs(spec) ** 2 * near
    fp = np.array([(p.sum(axis=0) * fx).sum(), (p.sum(axis=1) * fy).sum()]) / max(p.sum(), 1e-300)
    fc = float(np.hypot(*fp))
    power = np.abs(spec) ** 2
    ring = (fr > 0.8 * fc) & (fr < 1.2 * fc)
    peak = np.hypot(fx[None, :] - fp[0], fy[:, None] - fp[1]) < 0.15 * fc
    contrast = (float(power[peak].mean() / max(float(np.median(power[ring])), 1e-300))
                if peak.any() and ring.any() and fc > 0 else 0.0)
    if fc == 0:
        return np.zeros(img.shape, complex), fp, 0.0
    d = np.hypot(fx[None, :] + fp[0], fy[:, None] + fp[1]) / fc
    win = np.clip((0.5 - d) / 0.15, 0.0, 1.0)
    win = 0.5 - 0.5 * np.cos(np.pi * win)  # 1 within 0.35 |f_c| of -f_c, 0 beyond 0.5 |f_c|
    sb = sfft.ifft2(spec * win)
    yy, xx = np.indices(img.shape)
    return sb * np.exp(2j * np.pi * (fp[0] * xx + fp[1] * yy)), fp, contrast


def _loop_radii(amp: np.ndarray, cx: float, cy: float, n_loops: int = 5):
    """Loop radii spread over the bright part of the beam about (cx, cy), inside the image."""
    ny, nx = amp.shape
    r_in = min(cx, nx - 1 - cx, cy, ny - 1 - cy) - 2.0
    if r_in < 4:
        return np.zeros(0), 0.0
    r, prof = _radial_mean(amp, cx, cy, r_in)
    k = int(np.argmax(prof))
    bright = np.flatnonzero(prof >= 0.5 * prof.max())
    # the dark core of a high charge hides split unit vortices (amplitude ~ r^|l| below the noise): loops start
    # at the ring's maximum and go out to its outer half maximum
    lo, hi = max(2.0, float(r[k]) * 0.95 if k > 2 else float(r[bright[0]])), float(r[bright[-1]])
    if hi - lo < 1:
        lo, hi = max(2.0, lo - 1), hi + 1
    return np.linspace(lo, min(hi, r_in), n_loops), float(r[int(np.argmax(prof))])


def read_fork(image, *, reference_azimuth_deg: float = 0.0, min_agreement: float = 0.75,
              min_carrier_contrast: float = 50.0) -> ImageChargeReading:
    """Charge from a fork interferogram (vortex beam with a tilted plane reference).

    Parameters
    ----------
    image : ndarray (rows, cols)
        Camera counts (row 0 = top = +y).
    reference_azimuth_deg : float
        Direction the reference beam is tilted towards, from +x (right) towards +y (up).  The fringes only fix
        the charge up to this choice: telling the wrong side (by more than 90 degrees) flips the sign.
    min_agreement : float
        Fraction of loops that must give the same integer winding.
    min_carrier_contrast : float
        The side band must stand out: its mean spectral power over the median power at the same spatial frequency
        (measured here: above 1000 on the study's fork images, below 13 on frames of pure noise).

    Returns
    -------
    ImageChargeReading
        ``evidence``: ``carrier_cycles_per_px`` (the reference's carrier found), ``carrier_contrast``,
        ``windings`` and ``loop_radii_px``, ``ring_radius_px``.

    Notes
    -----
    Fourier-transform fringe analysis (Takeda et al. 1982): the image spectrum is windowed (Tukey) and searched,
    beyond the beam envelope's low frequencies, for the side band ``E* R`` at ``+f_c`` in the half plane of the
    reference tilt; the opposite side band ``E R*`` is kept with a raised-cosine disk of ``0.5 |f_c|``, moved to
    zero frequency, and its phase winding is counted around circles about the centroid of its power, spread over
    the beam's bright ring.  A noisy high charge splits into unit vortices near the core; loops enclosing the
    whole core still wind ``l`` times.  Background offsets and gradients stay at low frequency and drop out.
    """
    img = _physical(image)
    blank = _blank(img, "fork")
    if blank is not None:
        return blank
    sb, fp, contrast = _fork_sideband(img, reference_azimuth_deg)
    amp = ndimage.gaussian_filter(np.abs(sb), 1.0)
    w = amp ** 2 * (amp > 0.2 * amp.max())
    yy, xx = np.indices(img.shape)
    tot = float(w.sum())
    cx, cy = ((float((w * xx).sum() / tot), float((w * yy).sum() / tot)) if tot > 0
              else ((img.shape[1] - 1) / 2, (img.shape[0] - 1) / 2))
    radii, ring = _loop_radii(amp, cx, cy)
    ev = {"carrier_cycles_per_px": [float(fp[0]), float(fp[1])], "ring_radius_px": ring,
          "carrier_contrast": contrast}
    if contrast < min_carrier_contrast:
        return ImageChargeReading(None, "unreadable", "fork", _to_image_px(cx, cy, img.shape),
                                  f"no fringe carrier stands out (contrast {contrast:.1f} < {min_carrier_contrast:g})",
                                  ev)
    if radii.size == 0:
        return ImageChargeReading(None, "unreadable", "fork", _to_image_px(cx, cy, img.shape),
                                  "the beam centre is too close to the image edge for a loop", ev)
    wind = np.array([_loop_winding(sb, cx, cy, r)[0] for r in radii])
    return _decide(wind, radii, "fork", _to_image_px(cx, cy, img.shape), ev, min_agreement)


def _decide(wind, radii, method, center, ev, min_agreement) -> ImageChargeReading:
    rounded = np.rint(wind).astype(int)
    vals, counts = np.unique(rounded, return_counts=True)
    best = int(vals[np.argmax(counts)])
    agree = float(counts.max() / rounded.size)
    ev = dict(ev, windings=[float(v) for v in wind], loop_radii_px=[float(r) for r in radii], agreement=agree)
    if agree < min_agreement:
        return ImageChargeReading(None, "unreadable", method, center,
                                  f"loops disagree: windings {np.round(wind, 2).tolist()}", ev)
    return ImageChargeReading(best, "ok", method, center, "", ev)


def _polar_harmonics(img: np.ndarray, cx: float, cy: float, r_lo: float, r_hi: float, q_max: int,
                     n_rho: int = 96, n_theta: int = 128):
    """Azimuthal harmonics ``H[rho, q]`` (q = 0..q_max) of the image on circles uniform in ``rho = r^2``."""
    rho = np.linspace(r_lo ** 2, r_hi ** 2, n_rho)
    t = 2 * np.pi * np.arange(n_theta) / n_theta
    r = np.sqrt(rho)[:, None]
    coords = np.stack([(cy + r * np.sin(t)).ravel(), (cx + r * np.cos(t)).ravel()])
    vals = ndimage.map_coordinates(img, coords, order=1, mode="nearest").reshape(n_rho, n_theta)
    return rho, (sfft.fft(vals, axis=1) / n_theta)[:, :q_max + 1]


def _fringe_power(h: np.ndarray, *, with_trend: bool = False):
    """Per harmonic q: the largest power of H[:, q] along rho at frequencies beyond the lowest two bins (the
    fringes); with ``with_trend`` also the largest power within them (slow trends: envelope, gradients)."""
    n = h.shape[0]
    win = np.hanning(n)[:, None]
    p = np.abs(sfft.fft((h - h.mean(axis=0)) * win, axis=0)) ** 2
    nu = np.abs(sfft.fftfreq(n) * n)
    fringe = (p * (nu >= 2.5)[:, None]).max(axis=0)
    return (fringe, (p * (nu < 2.5)[:, None]).max(axis=0)) if with_trend else fringe


def _fringe_energy(img: np.ndarray) -> np.ndarray:
    """Local energy of the fringes (band-pass 1..8 px, squared, smoothed), above 30 % of its maximum: where the
    beam interferes with the reference.  Offsets, gradients and the beam envelope drop out."""
    band = ndimage.gaussian_filter(img, 1.0) - ndimage.gaussian_filter(img, 8.0)
    e = ndimage.gaussian_filter(band * band, 8.0)
    return e * (e > 0.3 * e.max())


def _spiral_centre(img, cx, cy, r_lo, r_hi, q_max, ring_px):
    """Refine the spiral centre (within about a tenth of the ring radius of the beam's centroid) by maximising the
    share of the strongest harmonic's fringe power; an off-axis circle crosses the rings and spreads power over
    many harmonics."""
    step = 0.05 * max(ring_px, 0.25 * r_hi)
    best = (-1.0, cx, cy)
    for _ in range(3):  # coarse-to-fine grid search (a few rounds)
        c0x, c0y = best[1], best[2]
        for dy in np.linspace(-2, 2, 5) * step:
            for dx in np.linspace(-2, 2, 5) * step:
                _, h = _polar_harmonics(img, c0x + dx, c0y + dy, r_lo, r_hi, q_max, n_rho=64, n_theta=96)
                fp = _fringe_power(h)
                score = float(fp.max() / fp.sum()) if fp.sum() > 0 else 0.0
                if score > best[0]:
                    best = (score, c0x + dx, c0y + dy)
        step /= 2.5
    return best[1], best[2]


def read_spiral(image, *, reference: str = "diverging", max_charge: int = 24, min_contrast: float = 4.0,
                min_fringe_to_trend: float = 5.0) -> ImageChargeReading:
    """Charge from a spiral interferogram (vortex beam with a coaxial spherical reference).

    Parameters
    ----------
    image : ndarray (rows, cols)
        Camera counts (row 0 = top = +y).
    reference : {"diverging", "converging"}
        Curvature of the reference wave at the camera (``R_c > 0`` diverging).  The arms' sense of rotation gives
        the sign only together with this.
    max_charge : int
        Largest ``|l|`` considered.
    min_contrast : float
        The winning harmonic's fringe power must exceed every other harmonic's by this factor (6 dB default).
    min_fringe_to_trend : float
        Within the winning harmonic, the fringe power must exceed the power of slow trends along ``rho`` by this
        factor (measured here: 17 or more on the study's spiral images, at most 1.4 on noise, 0.004 on a
        background ramp).

    Returns
    -------
    ImageChargeReading
        ``evidence``: ``harmonic`` (``|l|``), ``fringe_power`` per harmonic, ``phase_slope_rad_per_px2`` of the
        winning harmonic along ``rho = r^2``, ``ring_radius_px``.

    Notes
    -----
    ``I = |E|^2 + |R|^2 + 2 |E R| cos(l theta - alpha r^2)`` about the common axis: resampled on circles uniform in
    ``rho = r^2`` it is a straight grating in ``(theta, rho)``, whose azimuthal harmonic ``q = |l|`` carries the
    fringes (``exp(-i sign(l) alpha rho)``).  The centre is refined by maximising that harmonic's share of the
    fringe power (frequencies along ``rho`` above the envelope's), ``|l|`` is the strongest harmonic, and the sign
    follows from the slope of the harmonic's phase along ``rho``: negative for ``l > 0`` with a diverging
    reference (``alpha > 0``).  ``l = 0`` (concentric rings) wins at ``q = 0``.
    """
    if reference not in ("diverging", "converging"):
        raise MetalayError(f"read_spiral: reference = {reference!r}; allowed: 'diverging', 'converging'")
    img = _physical(image)
    blank = _blank(img, "spiral")
    if blank is not None:
        return blank
    base = ndimage.gaussian_filter(img - np.median(img), 1.0)
    w = _fringe_energy(img)
    yy, xx = np.indices(img.shape)
    tot = float(w.sum())
    if not tot > 0:
        return ImageChargeReading(None, "unreadable", "spiral", ((img.shape[1] - 1) / 2, (img.shape[0] - 1) / 2),
                                  "no fringes found")
    cx, cy = float((w * xx).sum() / tot), float((w * yy).sum() / tot)
    r_edge = min(cx, img.shape[1] - 1 - cx, cy, img.shape[0] - 1 - cy) - 2
    if r_edge < 8:
        return ImageChargeReading(None, "unreadable", "spiral", _to_image_px(cx, cy, img.shape),
                                  "the pattern centre is too close to the image edge")
    r, prof = _radial_mean(w, cx, cy, r_edge)
    bright = np.flatnonzero(prof >= 0.2 * prof.max())
    r_lo, r_hi = max(1.0, 0.5 * float(r[bright[0]])), min(float(r[bright[-1]]) * 1.2, r_edge)
    cx, cy = _spiral_centre(base, cx, cy, r_lo, r_hi, max_charge, float(r[int(np.argmax(prof))]))
    rho, h = _polar_harmonics(base, cx, cy, r_lo, r_hi, max_charge)
    fp, trend = _fringe_power(h, with_trend=True)
    q = int(np.argmax(fp))
    others = np.delete(fp, q)
    contrast = float(fp[q] / max(others.max(), 1e-300))
    to_trend = float(fp[q] / max(trend[q], 1e-300))
    ev = {"harmonic": q, "fringe_power": [float(v) for v in fp], "contrast": contrast,
          "fringe_to_trend": to_trend, "ring_radius_px": float(r[int(np.argmax(prof))])}
    centre = _to_image_px(cx, cy, img.shape)
    if contrast < min_contrast:
        return ImageChargeReading(None, "unreadable", "spiral", centre,
                                  f"no dominant azimuthal harmonic (contrast {contrast:.2f} < {min_contrast:g})", ev)
    if to_trend < min_fringe_to_trend:
        return ImageChargeReading(None, "unreadable", "spiral", centre,
                                  f"no fringes along the radius (fringe/trend {to_trend:.3g} < "
                                  f"{min_fringe_to_trend:g})", ev)
    if q == 0:
        return ImageChargeReading(0, "ok", "spiral", centre, "", ev)
    hq = h[:, q]
    wgt = np.abs(hq) ** 2
    ph = np.unwrap(np.angle(hq))
    slope = float(np.polyfit(rho, ph, 1, w=np.sqrt(wgt))[0])
    ev["phase_slope_rad_per_px2"] = slope
    sign = -1 if slope > 0 else 1
    if reference == "converging":
        sign = -sign
    return ImageChargeReading(sign * q, "ok", "spiral", centre, "", ev)


def _plane_background(img: np.ndarray) -> np.ndarray:
    """Least-squares plane through the darker half of the pixels (offset and gradient of the background)."""
    yy, xx = np.indices(img.shape)
    sel = img <= np.median(img)
    a = np.column_stack([np.ones(int(sel.sum())), xx[sel], yy[sel]])
    coef = np.linalg.lstsq(a, img[sel], rcond=None)[0]
    return coef[0] + coef[1] * xx + coef[2] * yy


def _strong_maxima(sm: np.ndarray, fraction: float) -> np.ndarray:
    """(x, y) of local maxima (3 x 3) above ``fraction`` of the maximum, brightest first."""
    peaks = (sm == ndimage.maximum_filter(sm, size=3)) & (sm >= fraction * sm.max())
    py, px = np.nonzero(peaks)
    order = np.argsort(-sm[py, px])
    return np.column_stack([px[order], py[order]]).astype(float)


def _merge_points(pts: np.ndarray, radius: float) -> np.ndarray:
    """Drop points closer than ``radius`` to a brighter (earlier) one; ``pts`` sorted brightest first."""
    kept = np.zeros((0, 2))
    for p in pts:  # at most MAX_TRIANGLE_MAXIMA points, each compared with the kept ones at once
        if kept.shape[0] == 0 or np.min(np.hypot(kept[:, 0] - p[0], kept[:, 1] - p[1])) >= radius:
            kept = np.vstack([kept, p[None, :]])
    return kept


def _count_peaks(profile: np.ndarray, min_sep: float, floor: float) -> np.ndarray:
    """Positions of local maxima of a 1-D profile above ``floor``, at least ``min_sep`` samples apart."""
    cand = np.flatnonzero((profile[1:-1] > profile[:-2]) & (profile[1:-1] >= profile[2:])) + 1
    cand = cand[profile[cand] >= floor]
    kept = []
    for i in cand[np.argsort(-profile[cand])]:  # a few tens of candidates
        if all(abs(i - j) >= min_sep for j in kept):
            kept.append(int(i))
    return np.sort(np.array(kept, dtype=float))


def _edge_spots(sm, pts, c, theta, a0):
    """Spots along the edge facing the vertex at ``theta``: (count, edge length in px, edge distance in px).

    The edge is the outermost row of maxima on the far side (at least two maxima within 0.35 spacing of the same
    line); its spots are counted as maxima of the image profile along that line (averaged over +-0.3 spacing).
    """
    u = np.array([np.cos(theta), np.sin(theta)])
    v = np.array([-u[1], u[0]])
    s = (pts - c) @ u
    order = np.argsort(s)
    row = None
    for i in order:  # maxima from the far side inwards
        if np.sum(np.abs(s - s[i]) < 0.35 * a0) >= 2:
            row = float(np.mean(s[np.abs(s - s[i]) < 0.35 * a0]))
            break
    if row is None:
        return 0, 0.0, 0.0
    on_row = np.abs(s - row) < 0.35 * a0
    t_pts = (pts[on_row] - c) @ v
    reach = float(np.abs(t_pts).max()) + 1.5 * a0
    step = 0.25
    t = np.arange(-reach, reach + step, step)
    offs = np.linspace(-0.3 * a0, 0.3 * a0, 5)
    xy = c[None, None, :] + row * u + t[None, :, None] * v + offs[:, None, None] * u
    line = ndimage.map_coordinates(sm, [xy[..., 1].ravel(), xy[..., 0].ravel()], order=1,
                                   mode="constant").reshape(xy.shape[:2]).mean(axis=0)
    found = _count_peaks(line, 0.6 * a0 / step, 0.25 * line.max())
    length = float(np.ptp(found) * step) if found.size > 1 else 0.0
    return int(found.size), length, -row


def read_triangle(image, *, apex_deg: float = 90.0, min_peak_fraction: float = 0.25) -> ImageChargeReading:
    """Charge from the far field of a vortex beam behind an equilateral triangular aperture.

    Parameters
    ----------
    image : ndarray (rows, cols)
        Camera counts of the far field (a lens's focal plane), row 0 = top = +y.
    apex_deg : float
        Direction of one vertex of the aperture triangle in the image's axes (90 = towards the top).
    min_peak_fraction : float
        Maxima below this fraction of the brightest are not used to place the triangle.

    Returns
    -------
    ImageChargeReading
        ``evidence``: ``spots_per_side`` (one count per edge), ``spacing_px``, ``orientation_deg`` of the spot
        triangle (a vertex direction, modulo 120) and the expected ones for each sign, ``maxima``.

    Notes
    -----
    Hickmann et al. 2010: the pattern is a truncated triangular lattice with ``|l| + 1`` spots per side, oriented
    ``apex_deg + 90`` (``l > 0``) or ``apex_deg - 90`` (``l < 0``) in this project's conventions.  A background plane
    (fitted to the darker half of the pixels) is removed and the image smoothed (1 px); maxima above
    ``min_peak_fraction`` are merged within half a spacing (the median nearest-neighbour distance); their centroid
    and third moment ``arg(sum (z - c)^3) / 3`` give the spot triangle's vertex direction (the vertices, farthest
    out, dominate), hence the sign; for each vertex the outermost row of maxima on the far side is its edge, and
    the spots along it are counted on the image profile.  One bright spot (at least 12 px at half maximum, clear
    of the image edge) with no second above 35 % reads 0.  Unreadable when no two edges agree, when an edge's
    length is not (count - 1) spacings within 35 %, or when the orientation is within 10 degrees of the midpoint
    between the two expected ones.
    """
    img = _physical(image)
    blank = _blank(img, "triangle")
    if blank is not None:
        return blank
    sig = img - _plane_background(img)
    sm = ndimage.gaussian_filter(sig, 1.0)
    raw = _strong_maxima(sm, min_peak_fraction) if sm.max() > 0 else np.zeros((0, 2))
    plus, minus = (apex_deg + 90.0) % 120.0, (apex_deg - 90.0) % 120.0
    ev = {"expected_orientation_deg": {"positive": plus, "negative": minus}}
    if raw.shape[0] == 0:
        return ImageChargeReading(None, "unreadable", "triangle", (0.0, 0.0), "no spot above the background", ev)
    if raw.shape[0] > MAX_TRIANGLE_MAXIMA:
        return ImageChargeReading(None, "unreadable", "triangle", (0.0, 0.0),
                                  f"{raw.shape[0]} maxima above {min_peak_fraction:g} of the brightest: not a spot "
                                  "pattern", dict(ev, maxima=int(raw.shape[0])))
    pts = _merge_points(raw, 3.0)
    second = sm[int(pts[1, 1]), int(pts[1, 0])] if pts.shape[0] > 1 else 0.0
    if pts.shape[0] == 1 or second < 0.35 * sm.max():
        lab, _ = ndimage.label(sm >= 0.5 * sm.max())
        blob = lab == lab[int(pts[0, 1]), int(pts[0, 0])]
        rows, cols = np.nonzero(blob)
        at_edge = rows.min() == 0 or cols.min() == 0 or rows.max() == sm.shape[0] - 1 or cols.max() == sm.shape[1] - 1
        if blob.sum() < 12 or at_edge:
            return ImageChargeReading(None, "unreadable", "triangle", _to_image_px(*pts[0], img.shape),
                                      "a single spot smaller than 12 pixels at half maximum or touching the "
                                      "image edge", ev)
        return ImageChargeReading(0, "ok", "triangle", _to_image_px(*pts[0], img.shape), "",
                                  dict(ev, spots_per_side=[1, 1, 1], maxima=1))
    d = np.hypot(pts[:, None, 0] - pts[None, :, 0], pts[:, None, 1] - pts[None, :, 1])
    np.fill_diagonal(d, np.inf)
    a0 = float(np.median(d.min(axis=1)))
    pts = _merge_points(pts, 0.5 * a0)
    c = pts.mean(axis=0)
    centre = _to_image_px(c[0], c[1], img.shape)
    ev.update(maxima=int(pts.shape[0]), spacing_px=a0)
    if pts.shape[0] < 3:
        return ImageChargeReading(None, "unreadable", "triangle", centre, "two spots: not a triangle", ev)
    z = (pts[:, 0] - c[0]) + 1j * (pts[:, 1] - c[1])
    orient = float(np.degrees(np.angle(np.sum(z ** 3))) / 3) % 120.0
    d_plus = abs((orient - plus + 60.0) % 120.0 - 60.0)
    d_minus = abs((orient - minus + 60.0) % 120.0 - 60.0)
    edges = [_edge_spots(sm, pts, c, np.radians(orient + 120.0 * k), a0) for k in range(3)]
    counts = [e[0] for e in edges]
    ev.update(spots_per_side=counts, edge_lengths_px=[e[1] for e in edges], orientation_deg=orient)
    vals, num = np.unique(counts, return_counts=True)
    n = int(vals[int(np.argmax(num))])
    lengths = np.array([e[1] for e in edges if e[0] == n])
    if num.max() < 2 or n < 2 or np.any(np.abs(lengths - (n - 1) * a0) > 0.35 * (n - 1) * a0):
        return ImageChargeReading(None, "unreadable", "triangle", centre,
                                  f"spots per side {counts} do not form a lattice triangle", ev)
    if abs(d_plus - d_minus) < 20.0:
        return ImageChargeReading(None, "unreadable", "triangle", centre,
                                  f"orientation {orient:.1f} deg is ambiguous between {plus:g} and {minus:g}", ev)
    sign = 1 if d_plus < d_minus else -1
    return ImageChargeReading(sign * (n - 1), "ok", "triangle", centre, "", ev)


#: Ring radius of the beam over the side of the triangle used by :func:`triangle_side_for_beam`.
RING_RADIUS_TO_SIDE = 0.5


def triangle_side_for_beam(ring_diameter_um: float) -> float:
    """Side (um) of the equilateral triangular aperture for a vortex beam whose bright ring has this diameter.

    Notes
    -----
    Side = ring diameter (ring radius = half the side, the triangle's centroid on the beam axis): the ring then
    crosses the three sides between the inscribed circle (0.29 side) and the vertices (0.58 side).  The ratio was
    chosen with the FFT model of :mod:`metalay.measure.camerasim` (``LG_0^l``, ``|l| <= 10``, noisy 8-bit frames, 42 per
    ratio) and :func:`read_triangle`: ring radius / side = 0.35: 23 of 42 read right, 0.40: 33, 0.45: 41,
    0.50 to 0.65: 42, 0.75: 20, 0.85: 14 (a triangle much larger than the ring barely truncates it and the spots
    smear along the edges; a much smaller one sits in the beam's dark core).  0.5 is inside the plateau.
    Hickmann et al. 2010 size the aperture to the beam; Banguilan & Hermosa 2019 (arXiv:1903.08903) find that it
    must scale with the beam's radius (which grows with ``|l|`` for a Laguerre-Gauss beam of fixed waist: ring
    radius ``w sqrt(|l| / 2)``), so size it for the charges expected.
    """
    d = float(ring_diameter_um)
    if not (0 < d <= 1e5):
        raise MetalayError(f"triangle aperture: ring_diameter_um = {ring_diameter_um!r}; allowed (0, 100000]")
    return d * 0.5 / RING_RADIUS_TO_SIDE


@dataclass(frozen=True, eq=False)
class TriangleAperture:
    """An equilateral triangular opening as mask geometry (one polygon on an amplitude layer).

    Attributes
    ----------
    side_um : float
    apex_deg : float
        Direction of one vertex (from +x towards +y, in the mask's top view).
    center_um : (float, float)
        Centroid (to be placed on the beam axis).
    vertices_db : ndarray (3, 2) int64
        Counter-clockwise vertices in database units (integers of ``db_unit_nm``), ready for
        :func:`metalay.io.writer.boundary_records` as ``vertices_db[None]``.
    db_unit_nm : float
    snap_error_nm : float
        Largest distance a vertex moved when snapped to the database grid.
    layer, datatype : int
        Where the opening is drawn (default 30/0: a layer of its own; what the process does with it, clear a film
        or keep it, is the process's tone setting).
    """

    side_um: float
    apex_deg: float
    center_um: tuple
    vertices_db: np.ndarray
    db_unit_nm: float
    snap_error_nm: float
    layer: int = 30
    datatype: int = 0

    @property
    def area_um2(self) -> float:
        """Area of the snapped polygon (shoelace formula)."""
        v = self.vertices_db.astype(np.float64) * self.db_unit_nm * 1e-3
        return float(0.5 * abs(np.dot(v[:, 0], np.roll(v[:, 1], -1)) - np.dot(v[:, 1], np.roll(v[:, 0], -1))))


def triangle_aperture(*, side_um: float | None = None, ring_diameter_um: float | None = None,
                      apex_deg: float = 90.0, center_um=(0.0, 0.0), db_unit_nm: float = 1.0, layer: int = 30,
                      datatype: int = 0) -> TriangleAperture:
    """Equilateral triangular aperture for reading a vortex beam's charge (Hickmann et al. 2010).

    Parameters
    ----------
    side_um : float, optional
        Side length; or give ``ring_diameter_um`` and the side follows :func:`triangle_side_for_beam`.
    ring_diameter_um : float, optional
        Diameter of the beam's bright ring at the aperture.
    apex_deg : float
        Direction of one vertex in the mask's top view.  Give the same direction, as seen on the camera, to
        :func:`read_triangle` (mind mirrors between mask and camera, and that light arriving through the substrate
        sees the top view mirrored).
    center_um : (float, float)
        Centroid position.
    db_unit_nm : float
        Database unit; vertices are rounded half to even (as the writer does).
    layer, datatype : int
        GDSII layer and datatype of the opening (0..65535).

    Returns
    -------
    TriangleAperture

    Raises
    ------
    MetalayError
        One line naming the argument and its allowed range.
    """
    if (side_um is None) == (ring_diameter_um is None):
        raise MetalayError("triangle aperture: give exactly one of side_um or ring_diameter_um")
    side = triangle_side_for_beam(ring_diameter_um) if side_um is None else float(side_um)
    if not (0 < side <= 1e5):
        raise MetalayError(f"triangle aperture: side_um = {side!r}; allowed (0, 100000]")
    if not (db_unit_nm > 0 and np.isfinite(db_unit_nm)):
        raise MetalayError(f"triangle aperture: db_unit_nm = {db_unit_nm!r} must be > 0")
    for name, val in (("layer", layer), ("datatype", datatype)):
        if not (isinstance(val, (int, np.integer)) and 0 <= int(val) <= 65535):
            raise MetalayError(f"triangle aperture: {name} = {val!r}; allowed integers 0..65535")
    rc_um = side / np.sqrt(3.0)
    ang = np.radians(float(apex_deg) + np.array([0.0, 120.0, 240.0]))  # counter-clockwise
    xy_um = np.stack([center_um[0] + rc_um * np.cos(ang), center_um[1] + rc_um * np.sin(ang)], axis=1)
    exact_db = xy_um * 1e3 / db_unit_nm
    snapped = np.rint(exact_db).astype(np.int64)
    if np.abs(snapped).max() >= 2 ** 31:
        raise MetalayError("triangle aperture: coordinates exceed the 32-bit range of GDSII at this database unit")
    err = float(np.max(np.hypot(*(snapped - exact_db).T)) * db_unit_nm)
    return TriangleAperture(side_um=side, apex_deg=float(apex_deg), center_um=(float(center_um[0]),
                            float(center_um[1])), vertices_db=snapped, db_unit_nm=float(db_unit_nm),
                            snap_error_nm=err, layer=int(layer), datatype=int(datatype))


#: Methods of :func:`read_charge_file` and the set-up each one needs.
READ_METHODS = {"fork": "reference_azimuth_deg", "spiral": "reference", "triangle": "apex_deg"}


def read_charge_file(path, *, method: str, setup, mirror: str = "none", max_pixels: int = MAX_IMAGE_PIXELS,
                     isolate: bool = True) -> tuple:
    """Read the charge from an image file: :func:`read_image`, an optional flip, then the method's reader.

    Parameters
    ----------
    path : str or Path
        PNG or TIFF, 8 or 16 bit (colour is converted to luminance).
    method : {"fork", "spiral", "triangle"}
    setup : float or str
        What the method needs to give the sign (:data:`READ_METHODS`): the reference tilt azimuth in degrees
        (fork), ``"diverging"`` or ``"converging"`` (spiral), the aperture apex direction in degrees as seen on
        the camera (triangle).
    mirror : {"none", "x", "y"}
        Undo one mirror reflection between beam and image: ``"x"`` flips the columns (x -> -x), ``"y"`` the rows.
    max_pixels, isolate
        See :func:`read_image`.

    Returns
    -------
    (ImageChargeReading, dict)
        The reading and the image's description (``rows``, ``cols``, ``min``, ``max``, ``sha256``).

    Raises
    ------
    MetalayError
        One line naming the file: unreadable image, unknown method or mirror, a set-up value out of range.
    """
    import hashlib

    if method not in READ_METHODS:
        raise MetalayError(f"{path}: method = {method!r}; allowed: {sorted(READ_METHODS)}")
    if mirror not in ("none", "x", "y"):
        raise MetalayError(f"{path}: mirror = {mirror!r}; allowed: 'none', 'x', 'y'")
    if method == "spiral":
        if setup not in ("diverging", "converging"):
            raise MetalayError(f"{path}: spiral reference = {setup!r}; allowed: 'diverging', 'converging'")
    elif not (isinstance(setup, (int, float)) and np.isfinite(setup) and -360.0 <= setup <= 360.0):
        raise MetalayError(f"{path}: {READ_METHODS[method]} = {setup!r}; allowed -360..360 degrees")
    img = read_image(path, max_pixels=max_pixels, isolate=isolate)
    if mirror == "x":
        img = img[:, ::-1]
    elif mirror == "y":
        img = img[::-1, :]
    with open(path, "rb") as fh:
        digest = hashlib.sha256(fh.read()).hexdigest()
    info = {"rows": int(img.shape[0]), "cols": int(img.shape[1]), "min": float(img.min()), "max": float(img.max()),
            "sha256": digest, "mirror": mirror}
    try:
        if method == "fork":
            reading = read_fork(img, reference_azimuth_deg=float(setup))
        elif method == "spiral":
            reading = read_spiral(img, reference=str(setup))
        else:
            reading = read_triangle(img, apex_deg=float(setup))
    except MetalayError as exc:
        raise MetalayError(f"{path}: {exc}") from exc
    return reading, info
