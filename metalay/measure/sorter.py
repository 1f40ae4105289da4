"""Log-polar OAM mode sorter: the two phase elements, optional fan-out copies, and an optical check through them.

The sorter maps the azimuth of the input beam onto a straight line (Berkhout et al. 2010): a beam with charge
``l`` becomes a strip with a linear phase ``l v / a``, which a lens focuses to a spot whose position grows linearly
with ``l``.  The element phase terms, the fan-out grating and :func:`sorter_parameters` live in
:mod:`metalay.design.logpolar` (so design files can carry them: kind ``mode_sorter``) and are re-exported here;
:func:`sorter_check` propagates through the ideal elements or through sampled ones (:class:`ElementScreen`, e.g.
decoded from written masks by :mod:`metalay.measure.sortermask`).

Elements and conventions
------------------------
Element 1 (the unwrapper) at the input plane, element 2 (the phase corrector) a distance ``f`` behind it::

    phi_1(x, y) = (2 pi a / (lambda f)) [ y atan2(y, x) - x ln(sqrt(x^2 + y^2) / b) + x ]
    phi_2(x2, y2) = -(2 pi a b / (lambda f)) exp(-x2 / a) cos(y2 / a)

with ``u = -a ln(r / b)`` and ``v = a atan2(y, x)`` the log-polar coordinates.  The paper writes ``arctan(y/x)``;
read literally that folds the left half plane onto the right one, so the four-quadrant angle ``atan2(y, x)`` in
``(-pi, pi]`` is used (the project's vortex convention, ``l atan2(y, x)``), and ``v`` runs over ``(-pi a, pi a]``.
Phases multiply the field as ``exp(i phi)`` with time dependence ``exp(-i omega t)`` (README "Physics
conventions"): ``grad phi_1 = (2 pi / (lambda f)) (u, v)``, so combined with a lens of focal length ``f`` in
element 1 the ray through ``(x, y)`` reaches element 2 at ``(x2, y2) = (u, v)`` (no inversion), where ``phi_2``
cancels the remaining phase ``(2 pi a b / (lambda f)) exp(-u / a) cos(v / a)`` (stationary phase).  In the
compact arrangement used by :func:`sorter_check` (element 1 = ``phi_1`` + lens ``f``, free propagation over
``f``, element 2 = ``phi_2`` + lens ``f``) the second lens removes the quadratic phase that a lens's Fourier
transform carries when the input sits against the lens (Goodman 2005, sec. 5.2.2), which makes it equivalent to
the paper's lens between the elements.

After element 2 an input ``exp(i l theta)`` is ``exp(i l v / a)``: a plane wave tilted along +y2.  A Fourier lens
of focal length ``F`` (ideal, paraxial: ``t = lambda F f``) focuses it to ``t_y = lambda F l / (2 pi a)``, on the +y
side for ``l > 0`` (a phase increasing along +y sends light to +y, ``checks.grid``).  This is derived from the
paper's mapping (``theta = v / a``) and the lens's Fourier property; with the paper's choice ``a = d / (2 pi)``
(the full azimuth spread over the width ``d``) the spacing is ``lambda F / d``.  A strip of length ``2 pi a``
with uniform amplitude along ``v`` focuses to ``sinc^2`` along ``t_y`` whose first zero is exactly one spacing
away, so a detector window one spacing wide collects at most ``int_{-1/2}^{1/2} sinc^2 = 0.774`` of the power
(Goodman 2005, sec. 4.4.1): neighbouring charges overlap.

Fan-out copies (O'Sullivan, Mirhosseini, Malik & Boyd 2012): ``N`` copies of the corrected strip placed side by
side along y make a strip ``N`` times longer, so the spots become ``N`` times narrower at the same spacing.  As in
that paper (from memory: a copying element and a phase-correcting element after the sorter) the copier is a
separate pair of elements: element 2 also carries a lens ``f_c``;
element 3, a distance ``f_c`` behind it (the Fourier plane of the strip), carries a phase grating along y of period
``lambda f_c / (2 pi a)`` (order ``m`` is displaced by ``m 2 pi a`` one Fourier transform later) plus two lenses
``f_c`` (one removes the quadratic phase of the first transform, one makes the second); element 4, a further
``f_c`` behind, carries the constant phase ``-alpha_m`` on copy ``m`` (``alpha_m`` the phase of the grating's order
``m``) and a lens ``f_c`` removing the last quadratic phase.  For integer ``l`` the phase ``l v / a`` is continuous
from one copy to the next, so the copies join into one tilted wave ``N 2 pi a`` long.  The two transforms image the
strip upside down, so with copies the spots sit at ``-lambda F l / (2 pi a)``.  ``f_c`` is chosen so that the copies
leave element 3 at a small angle (default 1.7 degrees): folding the grating into element 1 instead (copies leaving
at the unwrapper's much larger angles) was tried and measured worse with exact (angular-spectrum) propagation
(600 um element, 3 copies: 0.64 of the detected power in the right window instead of 0.74 without copies), as the
side copies arrive defocused by non-paraxial propagation.  The grating is Gori's optimum triplicator for ``N = 3``
or an iterative equal-order design for other odd ``N``.

References
----------
Berkhout, Lavery, Courtial, Beijersbergen & Padgett 2010, Phys. Rev. Lett. 105, 153601 (log-polar sorter).
O'Sullivan, Mirhosseini, Malik & Boyd 2012, Opt. Express 20, 24444 (fan-out copies of the unwrapped beam).
Gori, Santarsiero, Vicalvi, Borghi, Cincotti, Di Fabrizio & Gentili 1998, Opt. Commun. 157, 13 (optimum
triplicator: phase ``arctan(2.65718 cos(2 pi x / period))``, efficiency 0.9256).
Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.4.1 (sinc patterns), 5.2 (lens as Fourier
transformer).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from metalay.design.logpolar import (
    TRIPLICATOR_C,
    CopyPhaseCorrector,
    FanOutGrating,
    LogPolarCorrector,
    LogPolarUnwrapper,
    SorterDesign,
    fanout_grating,
    sorter_parameters,
)
from metalay.errors import MetalayError

__all__ = [
    "LogPolarUnwrapper",
    "LogPolarCorrector",
    "FanOutGrating",
    "CopyPhaseCorrector",
    "fanout_grating",
    "SorterDesign",
    "sorter_parameters",
    "SorterCheck",
    "sorter_check",
    "window_fraction_sinc2",
    "TRIPLICATOR_C",
    "ElementScreen",
]


def window_fraction_sinc2(half_width: float) -> float:
    """``int_{-h}^{h} sinc^2(x) dx`` (``sinc(x) = sin(pi x) / (pi x)``; total 1): the power of a uniform strip's
    focal line inside a window of half-width ``h`` first-zero widths.

    Notes
    -----
    ``int sinc^2 = (2 / pi) [Si(2 pi h) - sin^2(pi h) / (pi h)]`` (integration by parts; ``Si`` the sine
    integral).  ``h = 1/2``: 0.7737 (one window per spacing without copies); ``h = 3/2``: 0.9330 (three copies).

    References
    ----------
    Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.4.1; Abramowitz & Stegun 5.2.1 (Si).
    """
    from scipy.special import sici

    h = float(half_width)
    if h <= 0:
        return 0.0
    return float((2 / np.pi) * (sici(2 * np.pi * h)[0] - np.sin(np.pi * h) ** 2 / (np.pi * h)))


@dataclass(frozen=True, eq=False)
class SorterCheck:
    """Optical check of a sorter: spot positions, spacing against the linear relation, crosstalk.

    Attributes
    ----------
    charges : ndarray (C,) int
        Input charges.
    positions_um : ndarray (C,)
        Measured spot position along y in the detector plane (power centroid within half a spacing of the peak).
    predicted_um : ndarray (C,)
        ``spot_sign lambda F l / (2 pi a)``.
    slope_um, predicted_slope_um, intercept_um : float
        Least-squares line through the measured positions and the predicted displacement per unit charge.
    window_power : ndarray (C, C)
        Power of input ``l`` (row) inside the detection window of output ``l'`` (column), as a fraction of the
        power entering element 1.  Windows: ``|t_y - t_l'| < spacing / 2`` and ``|t_x| < window_half_height_um``.
    crosstalk : ndarray (C, C)
        ``window_power`` normalised per row over the windows (fraction of the detected power).
    detected : ndarray (C,)
        Row sums of ``window_power``.
    window_half_height_um : float
    sample_um : float
    grid_side : int
    notes : tuple of str
    profile_ty_um : ndarray (T,), optional
        Detector positions along y of ``profiles``.
    profiles : ndarray (C, T), optional
        Power density along y (integrated over the window height) per input charge, per um, as a fraction of the
        power entering element 1.
    """

    charges: np.ndarray
    positions_um: np.ndarray
    predicted_um: np.ndarray
    slope_um: float
    predicted_slope_um: float
    intercept_um: float
    window_power: np.ndarray
    crosstalk: np.ndarray
    detected: np.ndarray
    window_half_height_um: float
    sample_um: float
    grid_side: int
    notes: tuple
    profile_ty_um: np.ndarray | None = None
    profiles: np.ndarray | None = None

    @property
    def diagonal(self) -> np.ndarray:
        """Fraction of each input's detected power in its own window."""
        return np.diag(self.crosstalk).copy()

    def as_dict(self) -> dict:
        """JSON-ready numbers."""
        return {"charges": self.charges.tolist(), "positions_um": self.positions_um.tolist(),
                "predicted_um": self.predicted_um.tolist(), "slope_um": self.slope_um,
                "predicted_slope_um": self.predicted_slope_um, "intercept_um": self.intercept_um,
                "window_power": self.window_power.tolist(), "crosstalk": self.crosstalk.tolist(),
                "detected": self.detected.tolist(), "window_half_height_um": self.window_half_height_um,
                "sample_um": self.sample_um, "grid_side": self.grid_side, "notes": list(self.notes)}


@dataclass(frozen=True, eq=False)
class ElementScreen:
    """One element's complex transmission sampled on a regular grid (e.g. decoded from a written mask).

    Attributes
    ----------
    field : ndarray (ny, nx) complex
        Transmission of the sample centred at ``(x_um[c], y_um[r])`` (row = y); 0 where the element passes no light
        into the propagated polarisation.
    x_um, y_um : ndarray (nx,), (ny,)
        Sample centres, evenly spaced, increasing.
    source : str
        Where the samples came from (stated in the check's notes).

    Notes
    -----
    :func:`sorter_check` looks each of its grid points up in the nearest sample (a piecewise-constant screen: a
    unit cell transmits its response over its whole area); a grid with the samples' pitch and origin takes them
    exactly.
    """

    field: np.ndarray
    x_um: np.ndarray
    y_um: np.ndarray
    source: str = ""

    @property
    def pitch_um(self) -> tuple:
        """Sample pitch ``(dx, dy)``."""
        dx = float(self.x_um[1] - self.x_um[0]) if self.x_um.size > 1 else np.inf
        dy = float(self.y_um[1] - self.y_um[0]) if self.y_um.size > 1 else np.inf
        return dx, dy

    @property
    def half_extent_um(self) -> float:
        """Largest ``|x|`` or ``|y|`` of a sample (plus half a pitch)."""
        dx, dy = (v if np.isfinite(v) else 0.0 for v in self.pitch_um)
        return float(max(np.abs(self.x_um).max() + dx / 2, np.abs(self.y_um).max() + dy / 2))

    def on_grid(self, axis: np.ndarray) -> np.ndarray:
        """The screen on the square grid ``axis x axis`` (nearest sample; 0 outside the sampled region)."""
        def index(a, centres):
            if centres.size == 1:
                step = 1.0
            else:
                step = float(centres[1] - centres[0])
            k = np.rint((a - centres[0]) / step).astype(np.int64)
            ok = (k >= 0) & (k < centres.size) & (np.abs(a - centres[0] - k * step) <= 0.5 * step + 1e-9)
            return np.clip(k, 0, centres.size - 1), ok

        ix, okx = index(axis, np.asarray(self.x_um, dtype=np.float64))
        iy, oky = index(axis, np.asarray(self.y_um, dtype=np.float64))
        out = self.field[np.ix_(iy, ix)].astype(np.complex128)
        out[~oky, :] = 0.0
        out[:, ~okx] = 0.0
        return out


def _input_beam(design: SorterDesign, xx, yy, charge: int, beam: str):
    """Ring-shaped vortex (Gaussian ring in the middle of the annulus) or LG_0^|l| beam, times the annulus."""
    r = np.hypot(xx, yy)
    r_in, r_out = design.input_inner_radius_um, design.input_outer_radius_um
    if beam == "ring":
        r0, w = 0.5 * (r_in + r_out), (r_out - r_in) / 6
        amp = np.exp(-((r - r0) / w) ** 2)
    elif beam == "lg":
        w0 = 0.5 * (r_in + r_out) / np.sqrt(max(abs(charge), 1) / 2)  # ring radius w0 sqrt(|l|/2) mid-annulus
        amp = (r / w0) ** abs(charge) * np.exp(-(r / w0) ** 2)
    else:
        raise MetalayError(f"sorter_check: beam = {beam!r}; allowed: 'ring', 'lg'")
    return amp * ((r >= r_in) & (r <= r_out)) * np.exp(1j * charge * np.arctan2(yy, xx))


def _element_screens(design: SorterDesign, axis: np.ndarray, sample_um: float) -> list:
    """Complex transmission of each element on the grid (phase terms times the element's aperture)."""
    from metalay.design.phase import target_phase

    xx, yy = np.meshgrid(axis, axis)
    terms = design.element_terms()
    x2 = design.strip_x2_um
    m = 3 * sample_um
    apertures = [np.ones(xx.shape, bool),
                 (xx >= x2[0] - m) & (xx <= x2[1] + m) & (np.abs(yy) <= np.pi * design.a_um + m)]
    if len(terms) == 4:
        apertures += [np.ones(xx.shape, bool),  # the grating plane: the relayed spots, unobstructed
                      (xx >= -x2[1] - m) & (xx <= -x2[0] + m) & (np.abs(yy) <= design.strip_half_length_um + m)]
    return [ap * np.exp(1j * target_phase(t, xx, yy, wavelength_nm=design.wavelength_nm))
            for t, ap in zip(terms, apertures)]


def _detector_profile(field, axis, design: SorterDesign, tx, ty):
    """Power density along ty (integrated over tx) in the focal plane of the ideal Fourier lens ``F``."""
    from metalay.checks import farpoints

    lam_um = design.wavelength_nm * 1e-3
    big_f = design.fourier_focal_length_mm * 1e3
    amp = farpoints.far_field_zoom(field, axis, axis, tx / big_f, ty / big_f, design.wavelength_nm)
    dx = float(axis[1] - axis[0])
    dens = np.abs(amp) ** 2 * dx ** 4 / (lam_um * big_f) ** 2  # power per um^2 (Parseval-normalised)
    return dens.sum(axis=1) * float(tx[1] - tx[0])


def _grid_and_screens(design: SorterDesign, elements, sample_um, max_side: int):
    """The common square grid of the element planes and every element's screen on it."""
    from metalay.checks import grid

    n_el = len(design.element_terms())
    if elements is not None:
        elements = list(elements)
        if len(elements) != n_el:
            raise MetalayError(f"sorter_check: {len(elements)} element screens given; this sorter has {n_el} "
                               f"elements (n_copies = {design.n_copies})")
    if sample_um is None:
        if elements is None:
            sample_um = min(1.0 / (4 * design.max_local_frequency_per_um()), 2 * design.input_outer_radius_um / 50)
        else:
            sample_um = min(min(el.pitch_um) for el in elements)
    half = 1.1 * max(design.input_outer_radius_um, np.abs(design.strip_x2_um).max(), design.strip_half_length_um)
    if elements is not None:
        half = max(half, max(el.half_extent_um for el in elements))
    n = int(2 * np.ceil(half / sample_um) + 1)
    if n > max_side:
        raise MetalayError(f"sorter_check: grid of {n} x {n} samples at {sample_um:.3g} um exceeds max_side = "
                           f"{max_side}; raise sample_um or max_side")
    axis = grid.centered_axis(n, sample_um)
    if elements is None:
        return axis, _element_screens(design, axis, sample_um), float(sample_um), n, "ideal phase elements"
    return axis, [el.on_grid(axis) for el in elements], float(sample_um), n, "; ".join(
        el.source for el in elements if el.source) or "sampled element screens"


def sorter_check(design: SorterDesign, charges=range(-5, 6), *, beam: str = "ring", sample_um: float | None = None,
                 pad_factor: float = 2.0, window_half_height_um: float | None = None, max_side: int = 2048,
                 workers: int = 2, elements=None) -> SorterCheck:
    """Propagate OAM beams through the elements and a Fourier lens; spot positions and crosstalk.

    Parameters
    ----------
    design : SorterDesign
    charges : iterable of int
        Input charges ``l``.
    beam : {"ring", "lg"}
        ``"ring"``: ``exp(-((r - r0) / w)^2) exp(i l theta)`` with ``r0`` mid-annulus and ``w`` a sixth of its
        width (the same ring for every ``l``); ``"lg"``: Laguerre-Gauss ``LG_0^l`` with its ring mid-annulus.
    sample_um : float, optional
        Sample pitch of the element planes; default a quarter period of the largest local frequency (at most a
        fiftieth of the input diameter), or with ``elements`` their finest pitch.
    pad_factor : float
        Padding of the angular-spectrum propagations.
    window_half_height_um : float, optional
        Half height (along x) of the detection windows; default ``4 lambda F / du``, ``du`` the width along x2 of
        the ring's image at element 2.
    max_side : int
        Largest grid side allowed (one clear error instead of a huge computation).
    workers : int
        Threads for ``scipy.fft``.
    elements : sequence of ElementScreen, optional
        Sampled elements to propagate through instead of the ideal phase terms (one per element, in order, each
        centred on the common axis), e.g. decoded from the written masks.

    Returns
    -------
    SorterCheck

    Notes
    -----
    Each element multiplies the field by its aperture and ``exp(i phi)`` (or by its sampled screen); between
    elements the field is propagated by the band-limited angular-spectrum method
    (:func:`metalay.checks.grid.angular_spectrum`, exact in the scalar approximation, non-paraxial) over ``f`` (and
    ``f_c``, ``f_c`` with copies); the detector plane of an ideal Fourier lens ``F`` is ``U(t) ~ A(t / F)`` with
    ``A`` the far field by a zoom transform (:func:`metalay.checks.farpoints.far_field_zoom`) around the expected
    spots, so no FFT padding enters the figures.
    """
    from metalay.checks import grid

    charges = np.asarray(list(charges), dtype=np.int64)
    axis, screens, sample_um, n, source = _grid_and_screens(design, elements, sample_um, max_side)
    xx, yy = np.meshgrid(axis, axis)
    gaps_um = [design.focal_length_mm * 1e3] + [design.copier_focal_length_mm * 1e3] * (len(screens) - 2)
    s = design.spot_spacing_um
    r0 = 0.5 * (design.input_inner_radius_um + design.input_outer_radius_um)
    w = (design.input_outer_radius_um - design.input_inner_radius_um) / 6
    hh = window_half_height_um or 4 * design.wavelength_nm * 1e-3 * design.fourier_focal_length_mm * 1e3 / (
        design.a_um * np.log((r0 + 2 * w) / (r0 - 2 * w)))
    lmax = int(np.abs(charges).max()) if charges.size else 0
    ty = np.arange(-(lmax + 1.5) * s, (lmax + 1.5) * s + 1e-9, s / 16)
    tx = np.linspace(-hh, hh, 49)
    centres = design.spot_sign * s * charges
    in_win = np.abs(ty[None, :] - centres[:, None]) < s / 2  # (C, nty)
    pos = np.zeros(charges.size)
    wp = np.zeros((charges.size, charges.size))
    profiles = np.zeros((charges.size, ty.size))
    for k, lc in enumerate(charges):  # loop over input charges (short axis)
        e = _input_beam(design, xx, yy, int(lc), beam)
        p_in = float(np.sum(np.abs(e) ** 2)) * sample_um ** 2
        e = e * screens[0]
        for gap, screen in zip(gaps_um, screens[1:]):  # 1 or 3 propagations (short axis)
            e = grid.angular_spectrum(e, sample_um, sample_um, design.wavelength_nm, gap, pad_factor=pad_factor,
                                      workers=workers) * screen
        prof = _detector_profile(e, axis, design, tx, ty)
        profiles[k] = prof / p_in
        wp[k] = (in_win * prof[None, :]).sum(axis=1) * (ty[1] - ty[0]) / p_in
        sel = np.abs(ty - ty[int(np.argmax(prof))]) < s / 2
        pos[k] = float((prof[sel] * ty[sel]).sum() / prof[sel].sum())
    detected = wp.sum(axis=1)
    slope, icpt = np.polyfit(charges, pos, 1) if charges.size > 1 else (np.nan, np.nan)
    notes = (f"elements: {source}",
             f"element planes sampled at {sample_um:.3f} um on {n} x {n}, propagations padded x{pad_factor:g}",
             f"detection windows {s:.3f} um wide (one spacing) and {2 * hh:.1f} um high",
             f"beam: {beam}; corrector amplitude {design.corrector_waves:.2f} waves; {design.n_copies} copies")
    return SorterCheck(charges=charges, positions_um=pos, predicted_um=centres.astype(float), slope_um=float(slope),
                       predicted_slope_um=float(design.spot_sign * s), intercept_um=float(icpt), window_power=wp,
                       crosstalk=wp / np.maximum(detected[:, None], 1e-300), detected=detected,
                       window_half_height_um=float(hh), sample_um=float(sample_um), grid_side=n, notes=notes,
                       profile_ty_um=ty, profiles=profiles)
