"""Log-polar OAM mode sorter: the two phase elements, optional fan-out copies, and an optical check through them.

The sorter maps the azimuth of the input beam onto a straight line (Berkhout et al. 2010): a beam with charge
``l`` becomes a strip with a linear phase ``l v / a``, which a lens focuses to a spot whose position grows linearly
with ``l``.

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
]

#: Optimum triplicator constant (Gori et al. 1998, Opt. Commun. 157, 13).
TRIPLICATOR_C = 2.65718


def _k_um(wavelength_nm: float) -> float:
    return 2 * np.pi / (wavelength_nm * 1e-3)


@dataclass(frozen=True)
class LogPolarUnwrapper:
    """Element 1 of the log-polar sorter: ``phi_1 = (2 pi a / (lambda f)) [y atan2(y, x) - x ln(r / b) + x]``.

    Parameters
    ----------
    a_um : float
        Scale of the azimuthal mapping ``v = a theta`` (the strip is ``2 pi a`` long).
    b_um : float
        Radius mapped to ``u = 0`` (``u = -a ln(r / b)``; translates the strip along x2).
    focal_length_mm : float
        Distance ``f`` to element 2 (element 1 also carries a lens of focal length ``f``, a separate term).
    center_x_um, center_y_um : float
        Axis of the input beam.

    Notes
    -----
    Vectorised over sites; radians, not wrapped.  At ``r = 0`` the value is 0 (the limit); the gradient diverges
    logarithmically there, so the element's aperture should exclude a small central disk.

    References
    ----------
    Berkhout et al. 2010, Phys. Rev. Lett. 105, 153601.
    """

    a_um: float
    b_um: float
    focal_length_mm: float
    center_x_um: float = 0.0
    center_y_um: float = 0.0

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        x = np.asarray(x_um, dtype=np.float64) - self.center_x_um
        y = np.asarray(y_um, dtype=np.float64) - self.center_y_um
        r = np.hypot(x, y)
        with np.errstate(divide="ignore", invalid="ignore"):
            log_term = np.where(r > 0, x * np.log(np.where(r > 0, r, 1.0) / self.b_um), 0.0)
        scale = _k_um(wavelength_nm) * self.a_um / (self.focal_length_mm * 1e3)
        return scale * (y * np.arctan2(y, x) - log_term + x)


@dataclass(frozen=True)
class LogPolarCorrector:
    """Element 2 of the log-polar sorter: ``phi_2 = -(2 pi a b / (lambda f)) exp(-x2 / a) cos(y2 / a)``.

    Coordinates are those of element 2 (``x2 = u``, ``y2 = v``), centred on the strip's axis.

    References
    ----------
    Berkhout et al. 2010, Phys. Rev. Lett. 105, 153601.
    """

    a_um: float
    b_um: float
    focal_length_mm: float
    center_x_um: float = 0.0
    center_y_um: float = 0.0

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        u = np.asarray(x_um, dtype=np.float64) - self.center_x_um
        v = np.asarray(y_um, dtype=np.float64) - self.center_y_um
        scale = _k_um(wavelength_nm) * self.a_um * self.b_um / (self.focal_length_mm * 1e3)
        return -scale * np.exp(-u / self.a_um) * np.cos(v / self.a_um)


@dataclass(frozen=True)
class FanOutGrating:
    """Periodic phase grating along y making ``n_copies`` equal diffraction orders (orders ``-M..M``).

    Attributes
    ----------
    period_um : float
        Grating period along y.
    profile_rad : tuple of float
        Phase over one period at ``y = k period / len(profile)`` (interpolated as the complex field, so wraps
        of the stored phase do not matter).
    order_phases_rad : tuple of float
        Phase ``alpha_m`` of orders ``-M..M`` (the copy corrector subtracts these).
    efficiency : float
        Power in the ``n_copies`` orders.
    uniformity : float
        ``(max - min) / (max + min)`` of the order powers.
    """

    period_um: float
    profile_rad: tuple
    order_phases_rad: tuple
    efficiency: float
    uniformity: float

    @property
    def n_copies(self) -> int:
        return len(self.order_phases_rad)

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        prof = np.exp(1j * np.asarray(self.profile_rad, dtype=np.float64))
        n = prof.size
        t = (np.asarray(y_um, dtype=np.float64) / self.period_um) % 1.0 * n
        i0 = np.floor(t).astype(np.int64) % n
        w = t - np.floor(t)
        val = (1 - w) * prof[i0] + w * prof[(i0 + 1) % n]
        return np.angle(val) + 0.0 * np.asarray(x_um, dtype=np.float64)


@dataclass(frozen=True)
class CopyPhaseCorrector:
    """Element-2 phase ``-alpha_m`` on copy ``m`` (strips ``|y2 - m 2 pi a| < pi a``, ``m = -M..M``); 0 elsewhere."""

    a_um: float
    order_phases_rad: tuple
    center_y_um: float = 0.0

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        v = np.asarray(y_um, dtype=np.float64) - self.center_y_um
        m_half = len(self.order_phases_rad) // 2
        m = np.rint(v / (2 * np.pi * self.a_um)).astype(np.int64)
        ok = np.abs(m) <= m_half
        alpha = np.asarray(self.order_phases_rad, dtype=np.float64)
        out = np.where(ok, -alpha[np.clip(m + m_half, 0, alpha.size - 1)], 0.0)
        return out + 0.0 * np.asarray(x_um, dtype=np.float64)


def _orders(profile: np.ndarray, m_half: int):
    c = np.fft.fft(np.exp(1j * profile)) / profile.size
    idx = np.arange(-m_half, m_half + 1)
    return c[idx]


def fanout_grating(n_copies: int, period_um: float, *, samples: int = 512, iterations: int = 300) -> FanOutGrating:
    """Phase grating with ``n_copies`` (odd) equal orders.

    Parameters
    ----------
    n_copies : int
        1, 3, 5, ... (odd: orders ``-M..M``).  1 returns a flat profile.
    period_um : float
        Grating period along y.
    samples : int
        Samples of the stored profile per period.
    iterations : int
        Iterations of the equal-order design (``n_copies > 3``).

    Returns
    -------
    FanOutGrating

    Notes
    -----
    ``n_copies = 3``: Gori's optimum triplicator ``arctan(2.65718 cos(2 pi y / period))`` (efficiency 0.9256).
    Otherwise an iterative Fourier design: start from the argument of an equal-amplitude multitone with Schroeder's
    phases, then alternate between the grating plane (unit modulus) and the order plane (target orders set to
    the mean amplitude times adaptive weights, all other orders zero), deterministic.

    References
    ----------
    Gori et al. 1998, Opt. Commun. 157, 13; Gerchberg & Saxton 1972, Optik 35, 237; Schroeder 1970, IEEE Trans.
    Inf. Theory 16, 85.
    """
    n = int(n_copies)
    if n < 1 or n % 2 == 0 or n > 31:
        raise MetalayError(f"fan-out: n_copies = {n_copies!r}; allowed odd 1..31")
    if not period_um > 0:
        raise MetalayError(f"fan-out: period_um = {period_um!r} must be > 0")
    m_half = n // 2
    y = np.arange(samples) / samples
    if n == 1:
        prof = np.zeros(samples)
    elif n == 3:
        prof = np.arctan(TRIPLICATOR_C * np.cos(2 * np.pi * y))
    else:
        orders = np.arange(-m_half, m_half + 1)
        beta = np.pi * orders ** 2 / n
        prof = np.angle(np.exp(1j * (2 * np.pi * np.outer(orders, y) + beta[:, None])).sum(axis=0))
        w = np.ones(n)
        for it in range(iterations):  # iterations of the 1-D design (short axis)
            c = np.fft.fft(np.exp(1j * prof)) / samples
            amp = np.abs(c[orders])
            if it > 10:
                w = w * np.sqrt(amp.mean() / np.maximum(amp, 1e-12))
            target = np.zeros(samples, dtype=complex)
            target[orders] = w * amp.mean() * np.exp(1j * np.angle(c[orders]))
            prof = np.angle(np.fft.ifft(target))
    c = _orders(prof, m_half)
    p = np.abs(c) ** 2
    return FanOutGrating(period_um=float(period_um), profile_rad=tuple(float(v) for v in prof),
                         order_phases_rad=tuple(float(v) for v in np.angle(c)), efficiency=float(p.sum()),
                         uniformity=float((p.max() - p.min()) / (p.max() + p.min())))


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


@dataclass(frozen=True)
class SorterDesign:
    """A log-polar sorter for one wavelength: parameters with units and the phase terms of its elements.

    Attributes
    ----------
    wavelength_nm : float
    a_um, b_um : float
        Mapping parameters (``u = -a ln(r / b)``, ``v = a theta``).
    focal_length_mm : float
        Element separation ``f`` (elements 1 and 2 each also carry a lens of focal length ``f``).
    fourier_focal_length_mm : float
        Focal length ``F`` of the Fourier lens in front of the detector.
    input_outer_radius_um, input_inner_radius_um : float
        Element 1 is the annulus between these radii (the centre is blocked).
    n_copies : int
        Fan-out copies (odd; 1 = no copier).
    copier_focal_length_mm : float
        Focal length ``f_c`` of the copier (elements 3 and 4), used when ``n_copies > 1``.
    """

    wavelength_nm: float
    a_um: float
    b_um: float
    focal_length_mm: float
    fourier_focal_length_mm: float
    input_outer_radius_um: float
    input_inner_radius_um: float
    n_copies: int = 1
    copier_focal_length_mm: float = 0.0

    @property
    def spot_spacing_um(self) -> float:
        """Predicted spot displacement per unit charge in the Fourier plane, ``lambda F / (2 pi a)``."""
        return self.wavelength_nm * 1e-3 * self.fourier_focal_length_mm * 1e3 / (2 * np.pi * self.a_um)

    @property
    def spot_sign(self) -> int:
        """+1: charge ``l`` lands at ``+l`` spacings along y; -1 with the copier (its relay inverts the strip)."""
        return 1 if self.n_copies == 1 else -1

    @property
    def strip_x2_um(self) -> tuple:
        """Range of x2 = u covered by the input annulus at element 2."""
        return (-self.a_um * np.log(self.input_outer_radius_um / self.b_um),
                -self.a_um * np.log(self.input_inner_radius_um / self.b_um))

    @property
    def strip_half_length_um(self) -> float:
        """Half length along y of the strip at element 2 (``pi a``) or of the copies at element 4
        (``n_copies pi a``)."""
        return self.n_copies * np.pi * self.a_um

    @property
    def corrector_waves(self) -> float:
        """``a b / (lambda f)``: amplitude of the corrector phase in waves (the mapping needs several)."""
        return self.a_um * self.b_um / (self.wavelength_nm * 1e-3 * self.focal_length_mm * 1e3)

    def fanout(self) -> FanOutGrating | None:
        """The copier's grating (element 3, period ``lambda f_c / (2 pi a)``), or None without copies."""
        if self.n_copies == 1:
            return None
        period = self.wavelength_nm * 1e-3 * self.copier_focal_length_mm * 1e3 / (2 * np.pi * self.a_um)
        return fanout_grating(self.n_copies, period)

    def element_terms(self) -> tuple:
        """Phase terms of each element: a tuple of 2 (no copier) or 4 tuples of terms.

        1: unwrapper + lens ``f``; 2: corrector + lens ``f`` (+ lens ``f_c``); 3: grating + 2 lenses ``f_c``;
        4: per-copy phases + lens ``f_c``.
        """
        from metalay.design.phase import Lens

        f_um, fc_um = self.focal_length_mm * 1e3, self.copier_focal_length_mm * 1e3
        el1 = (LogPolarUnwrapper(self.a_um, self.b_um, self.focal_length_mm), Lens(f_um))
        el2 = (LogPolarCorrector(self.a_um, self.b_um, self.focal_length_mm), Lens(f_um))
        g = self.fanout()
        if g is None:
            return (el1, el2)
        return (el1, el2 + (Lens(fc_um),), (g, Lens(fc_um), Lens(fc_um)),
                (CopyPhaseCorrector(self.a_um, g.order_phases_rad), Lens(fc_um)))

    def max_local_frequency_per_um(self) -> float:
        """Largest local spatial frequency (cycles/um) of any element's total phase (sampling check).

        Element 1: ``|(u, v) - (x, y)| / (lambda f)`` over the annulus; element 2: corrector
        ``b exp(-x2 / a) / (lambda f)`` plus its lenses; copier elements: grating ``M / period`` plus their
        lenses over the copies' extent.
        """
        lam = self.wavelength_nm * 1e-3
        lam_f = lam * self.focal_length_mm * 1e3
        r = np.linspace(self.input_inner_radius_um, self.input_outer_radius_um, 64)[:, None]
        t = np.linspace(-np.pi, np.pi, 129)[None, :]
        u, v = -self.a_um * np.log(r / self.b_um), self.a_um * t
        el1 = float(np.max(np.hypot(u - r * np.cos(t), v - r * np.sin(t)))) / lam_f
        x2 = np.array(self.strip_x2_um)
        r2 = np.hypot(np.abs(x2).max(), np.pi * self.a_um)
        el2 = (self.b_um * np.exp(-x2.min() / self.a_um) + r2) / lam_f
        if self.n_copies > 1:
            lam_fc = lam * self.copier_focal_length_mm * 1e3
            el2 += r2 / lam_fc
            el2 = max(el2, (self.n_copies // 2) * 2 * np.pi * self.a_um / lam_fc + 2 * 0.5 * r2 / lam_fc,
                      self.strip_half_length_um / lam_fc)
        return float(max(el1, el2))


def sorter_parameters(input_diameter_um: float, *, wavelength_nm: float, spot_spacing_um: float,
                      inner_diameter_um: float | None = None, period_nm: float | None = None,
                      focal_length_mm: float | None = None, n_copies: int = 1, min_waves: float = 4.0,
                      max_ray_angle_deg: float = 15.0, copier_angle_deg: float = 1.7) -> SorterDesign:
    """Choose ``a``, ``b``, the element separation and the lenses for an input aperture and a spot spacing.

    Parameters
    ----------
    input_diameter_um : float
        Width ``d`` of the input beam / element 1 (outer diameter).
    wavelength_nm : float
    spot_spacing_um : float
        Wanted displacement per unit charge in the detector plane.
    inner_diameter_um : float, optional
        Blocked centre of element 1 (default ``d / 5``).
    period_nm : float, optional
        Metasurface lattice period: the design is refused when an element's local phase gradient would exceed half
        the lattice's Nyquist limit, ``1 / (4 p)`` (a factor 2 of margin).
    focal_length_mm : float, optional
        Element separation ``f`` (default: the largest ``f`` with ``a b / (lambda f) >= min_waves``).
    n_copies : int
        Fan-out copies (odd; 1 = none).
    min_waves : float
        Smallest corrector amplitude ``a b / (lambda f)`` in waves.  The mapping is a stationary-phase (geometric)
        one and needs many waves across the element: measured with :func:`sorter_check` (300 um element, ring
        beam, charges -5..5, ``bench/sorter_study.py``), 2 waves gave 0.55-0.66 of the detected power in the right
        window and a spacing 1.1 % short; 4 waves gave 0.71-0.77 and a spacing within 0.15 % (the ``sinc^2``
        reference is 0.79).
    max_ray_angle_deg : float
        Largest angle of the geometric ray from ``(x, y)`` to ``(u, v)``: the mapping and the lens's Fourier
        property are paraxial.  A design that needs more is refused (enlarge the element: at a fixed angle the
        waves grow in proportion to the diameter).
    copier_angle_deg : float
        Angle ``2 pi a / f_c`` at which the side copies leave the copier's grating (sets ``f_c``).

    Returns
    -------
    SorterDesign

    Notes
    -----
    ``a = d / (2 pi)`` so that the full azimuth ``2 pi`` spreads over the width ``d`` (Berkhout et al. 2010);
    ``b = sqrt(r_in r_out)`` centres the strip on ``x2 = 0`` (``b`` only translates the strip: our choice);
    ``F = spacing 2 pi a / lambda`` from ``t = lambda F l / (2 pi a)``.
    """
    d = float(input_diameter_um)
    if not (d > 0 and wavelength_nm > 0 and spot_spacing_um > 0):
        raise MetalayError("sorter_parameters: input_diameter_um, wavelength_nm and spot_spacing_um must be > 0")
    r_out = d / 2
    r_in = (inner_diameter_um if inner_diameter_um is not None else d / 5) / 2
    if not 0 < r_in < r_out:
        raise MetalayError(f"sorter_parameters: inner_diameter_um = {2 * r_in:g} must be in (0, {d:g})")
    n_copies = int(n_copies)
    if n_copies < 1 or n_copies % 2 == 0:
        raise MetalayError(f"sorter_parameters: n_copies = {n_copies}; allowed odd 1, 3, 5, ...")
    a = d / (2 * np.pi)
    b = float(np.sqrt(r_in * r_out))
    lam_um = wavelength_nm * 1e-3
    big_f = spot_spacing_um * 2 * np.pi * a / lam_um * 1e-3
    fc = 0.0 if n_copies == 1 else float(np.ceil(2 * np.pi * a / np.tan(np.radians(copier_angle_deg))) * 1e-3)
    if focal_length_mm is None:
        focal_length_mm = float(np.floor(a * b / (lam_um * min_waves)) * 1e-3)
    design = SorterDesign(float(wavelength_nm), a, b, float(focal_length_mm), big_f, r_out, r_in, n_copies, fc)
    el1_only = SorterDesign(float(wavelength_nm), a, b, float(focal_length_mm), big_f, r_out, r_in)
    offset_um = el1_only.max_local_frequency_per_um() * lam_um * focal_length_mm * 1e3
    angle = float(np.degrees(np.arctan(offset_um / (focal_length_mm * 1e3))))
    if angle > max_ray_angle_deg:
        raise MetalayError(f"sorter_parameters: f = {focal_length_mm:g} mm needs rays at {angle:.1f} deg > "
                           f"max_ray_angle_deg = {max_ray_angle_deg:g} (paraxial mapping); enlarge "
                           f"input_diameter_um (now {d:g}) or lower min_waves")
    if period_nm is not None:
        nu = design.max_local_frequency_per_um()
        if nu > 1 / (4 * period_nm * 1e-3):
            raise MetalayError(f"sorter_parameters: local phase gradient {nu:.3f} cycles/um exceeds 1/(4 p) = "
                               f"{1 / (4 * period_nm * 1e-3):.3f} for period_nm = {period_nm:g}; enlarge f or "
                               "input_diameter_um")
    return design


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


def sorter_check(design: SorterDesign, charges=range(-5, 6), *, beam: str = "ring", sample_um: float | None = None,
                 pad_factor: float = 2.0, window_half_height_um: float | None = None, max_side: int = 2048,
                 workers: int = 2) -> SorterCheck:
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
        fiftieth of the input diameter).
    pad_factor : float
        Padding of the angular-spectrum propagations.
    window_half_height_um : float, optional
        Half height (along x) of the detection windows; default ``4 lambda F / du``, ``du`` the width along x2 of
        the ring's image at element 2.
    max_side : int
        Largest grid side allowed (one clear error instead of a huge computation).
    workers : int
        Threads for ``scipy.fft``.

    Returns
    -------
    SorterCheck

    Notes
    -----
    Each element multiplies the field by its aperture and ``exp(i phi)``; between elements the field is
    propagated by the band-limited angular-spectrum method (:func:`metalay.checks.grid.angular_spectrum`, exact in the
    scalar approximation, non-paraxial) over ``f`` (and ``f_c``, ``f_c`` with copies); the detector plane of an ideal
    Fourier lens ``F`` is ``U(t) ~ A(t / F)`` with ``A`` the far field by a zoom transform
    (:func:`metalay.checks.farpoints.far_field_zoom`) around the expected spots, so no FFT padding enters the figures.
    """
    from metalay.checks import grid

    charges = np.asarray(list(charges), dtype=np.int64)
    if sample_um is None:
        sample_um = min(1.0 / (4 * design.max_local_frequency_per_um()), 2 * design.input_outer_radius_um / 50)
    half = 1.1 * max(design.input_outer_radius_um, np.abs(design.strip_x2_um).max(), design.strip_half_length_um)
    n = int(2 * np.ceil(half / sample_um) + 1)
    if n > max_side:
        raise MetalayError(f"sorter_check: grid of {n} x {n} samples at {sample_um:.3g} um exceeds max_side = "
                           f"{max_side}; raise sample_um or max_side")
    axis = grid.centered_axis(n, sample_um)
    xx, yy = np.meshgrid(axis, axis)
    screens = _element_screens(design, axis, sample_um)
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
    for k, lc in enumerate(charges):  # loop over input charges (short axis)
        e = _input_beam(design, xx, yy, int(lc), beam)
        p_in = float(np.sum(np.abs(e) ** 2)) * sample_um ** 2
        e = e * screens[0]
        for gap, screen in zip(gaps_um, screens[1:]):  # 1 or 3 propagations (short axis)
            e = grid.angular_spectrum(e, sample_um, sample_um, design.wavelength_nm, gap, pad_factor=pad_factor,
                                      workers=workers) * screen
        prof = _detector_profile(e, axis, design, tx, ty)
        wp[k] = (in_win * prof[None, :]).sum(axis=1) * (ty[1] - ty[0]) / p_in
        sel = np.abs(ty - ty[int(np.argmax(prof))]) < s / 2
        pos[k] = float((prof[sel] * ty[sel]).sum() / prof[sel].sum())
    detected = wp.sum(axis=1)
    slope, icpt = np.polyfit(charges, pos, 1) if charges.size > 1 else (np.nan, np.nan)
    notes = (f"element planes sampled at {sample_um:.3f} um on {n} x {n}, propagations padded x{pad_factor:g}",
             f"detection windows {s:.3f} um wide (one spacing) and {2 * hh:.1f} um high",
             f"beam: {beam}; corrector amplitude {design.corrector_waves:.2f} waves; {design.n_copies} copies")
    return SorterCheck(charges=charges, positions_um=pos, predicted_um=centres.astype(float), slope_um=float(slope),
                       predicted_slope_um=float(design.spot_sign * s), intercept_um=float(icpt), window_power=wp,
                       crosstalk=wp / np.maximum(detected[:, None], 1e-300), detected=detected,
                       window_half_height_um=float(hh), sample_um=float(sample_um), grid_side=n, notes=notes)
