"""Log-polar OAM mode sorter elements as phase terms, and the choice of their parameters.

The sorter maps the azimuth of the input beam onto a straight line (Berkhout et al. 2010): a beam with charge
``l`` becomes a strip with a linear phase ``l v / a``, which a lens focuses to a spot whose position grows linearly
with ``l``.  This module holds what a mask needs (the phase of every element, pure and vectorised, and the
parameter choice); the optical check through the elements is :mod:`metalay.measure.sorter`.

Elements and conventions
------------------------
Element 1 (the unwrapper) at the input plane, element 2 (the phase corrector) a distance ``f`` behind it::

    phi_1(x, y) = (2 pi a / (lambda f)) [ y atan2(y, x) - x ln(sqrt(x^2 + y^2) / b) + x ]
    phi_2(x2, y2) = -(2 pi a b / (lambda f)) exp(-x2 / a) cos(y2 / a)

with ``u = -a ln(r / b)`` and ``v = a atan2(y, x)`` the log-polar coordinates.  The paper writes ``arctan(y/x)``;
read literally that folds the left half plane onto the right one, so the four-quadrant angle ``atan2(y, x)`` in
``(-pi, pi]`` is used (the project's vortex convention, ``l atan2(y, x)``), and ``v`` runs over ``(-pi a, pi a]``.
Each element also carries a lens of focal length ``f`` (element 1: the lens whose Fourier plane is element 2;
element 2: the lens removing the quadratic phase of that transform, Goodman 2005, sec. 5.2.2), so the two masks
alone make the sorter; a bulk lens ``F`` behind element 2 (not on a mask) focuses the spots.  With fan-out copies
(O'Sullivan et al. 2012) element 2 also carries a lens ``f_c``, element 3 a fan-out grating along y and two lenses
``f_c``, element 4 the per-copy phase correction and a lens ``f_c``; see :mod:`metalay.measure.sorter` for the
optics and the measured figures.

Design-file kind ``mode_sorter`` (:func:`parse_sorter_term`): every element file of one sorter carries the same
set-up keys (``input_diameter_um``, ``spot_spacing_um``, ...) and its own ``element`` number; the term is that
element's phase (:class:`SorterElement`).

References
----------
Berkhout, Lavery, Courtial, Beijersbergen & Padgett 2010, Phys. Rev. Lett. 105, 153601 (log-polar sorter).
O'Sullivan, Mirhosseini, Malik & Boyd 2012, Opt. Express 20, 24444 (fan-out copies of the unwrapped beam).
Gori, Santarsiero, Vicalvi, Borghi, Cincotti, Di Fabrizio & Gentili 1998, Opt. Commun. 157, 13 (optimum
triplicator: phase ``arctan(2.65718 cos(2 pi x / period))``, efficiency 0.9256).
Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 5.2 (lens as Fourier transformer).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from metalay.errors import DesignError, MetalayError

__all__ = [
    "LogPolarUnwrapper",
    "LogPolarCorrector",
    "FanOutGrating",
    "CopyPhaseCorrector",
    "fanout_grating",
    "SorterDesign",
    "sorter_parameters",
    "SorterElement",
    "sorter_element",
    "element_aperture",
    "parse_sorter_term",
    "TRIPLICATOR_C",
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
        raise DesignError(f"fan-out: n_copies = {n_copies!r}; allowed odd 1..31")
    if not period_um > 0:
        raise DesignError(f"fan-out: period_um = {period_um!r} must be > 0")
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
        raise DesignError("sorter_parameters: input_diameter_um, wavelength_nm and spot_spacing_um must be > 0")
    r_out = d / 2
    r_in = (inner_diameter_um if inner_diameter_um is not None else d / 5) / 2
    if not 0 < r_in < r_out:
        raise DesignError(f"sorter_parameters: inner_diameter_um = {2 * r_in:g} must be in (0, {d:g})")
    n_copies = int(n_copies)
    if n_copies < 1 or n_copies % 2 == 0:
        raise DesignError(f"sorter_parameters: n_copies = {n_copies}; allowed odd 1, 3, 5, ...")
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
        raise DesignError(f"sorter_parameters: f = {focal_length_mm:g} mm needs rays at {angle:.1f} deg > "
                           f"max_ray_angle_deg = {max_ray_angle_deg:g} (paraxial mapping); enlarge "
                           f"input_diameter_um (now {d:g}) or lower min_waves")
    if period_nm is not None:
        nu = design.max_local_frequency_per_um()
        if nu > 1 / (4 * period_nm * 1e-3):
            raise DesignError(f"sorter_parameters: local phase gradient {nu:.3f} cycles/um exceeds 1/(4 p) = "
                               f"{1 / (4 * period_nm * 1e-3):.3f} for period_nm = {period_nm:g}; enlarge f or "
                               "input_diameter_um")
    return design



@dataclass(frozen=True)
class SorterElement:
    """Phase term of one element of a sorter (design-file kind ``mode_sorter``): the sum of its terms.

    Attributes
    ----------
    setup : SorterDesign
        The whole sorter (the same in every element file of one sorter).
    element : int
        1 (unwrapper + lens ``f``), 2 (corrector + lens ``f``, + lens ``f_c`` with copies), 3 (fan-out grating +
        two lenses ``f_c``), 4 (per-copy phases + lens ``f_c``).
    terms : tuple
        ``setup.element_terms()[element - 1]`` (computed once by :func:`sorter_element`).

    Notes
    -----
    The phase does not depend on the input spin: the mapping stage writes ``theta = sigma phi / 2``, so the element
    applies ``phi`` to light of its design spin.  Element ``k + 1`` receives the converted light of element ``k``,
    whose spin is opposite: write element 2 for ``input_spin = -s`` when element 1 is written for ``s`` (or put a
    half-wave plate between them).

    References
    ----------
    Berkhout et al. 2010, Phys. Rev. Lett. 105, 153601; O'Sullivan et al. 2012, Opt. Express 20, 24444.
    """

    setup: SorterDesign
    element: int
    terms: tuple

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        x = np.asarray(x_um, dtype=np.float64)
        y = np.asarray(y_um, dtype=np.float64)
        total = np.zeros(np.broadcast(x, y).shape, dtype=np.float64)
        for t in self.terms:  # 2 or 3 terms (short axis)
            total += t.phase(x, y, wavelength_nm=wavelength_nm, sigma=sigma)
        return total


def sorter_element(setup: SorterDesign, element: int) -> SorterElement:
    """The phase term of element ``element`` (1-based) of ``setup``.

    Raises
    ------
    DesignError
        When the element does not exist (1..2 without copies, 1..4 with).
    """
    terms = setup.element_terms()
    if not 1 <= int(element) <= len(terms):
        raise DesignError(f"sorter element = {element!r}; allowed 1..{len(terms)} for n_copies = {setup.n_copies}")
    return SorterElement(setup, int(element), tuple(terms[int(element) - 1]))


def _up(v: float) -> float:
    """Round a size up to 0.1 um (readable design files, never smaller than needed)."""
    return float(np.ceil(v * 10.0 - 1e-9) / 10.0)


def element_aperture(setup: SorterDesign, element: int, *, margin_um: float | None = None,
                     max_charge: int = 5) -> dict:
    """The ``[aperture]`` table suggested for element ``element`` (keys of the design file).

    Parameters
    ----------
    setup : SorterDesign
    element : int
        1..2 (1..4 with copies).
    margin_um : float, optional
        Added on every side of elements 2 and 4 (default 2 % of the input diameter: our choice, it covers the
        diffraction blur of the mapped strip's edges over ``f``).
    max_charge : int
        Largest ``|l|`` the grating plane (element 3) must pass.

    Returns
    -------
    dict
        ``{"shape": ..., "diameter_um": ...}`` and so on, as in the design file.

    Notes
    -----
    Element 1: the input annulus.  Element 2: the strip ``x2`` in ``strip_x2_um`` by ``2 pi a`` (the log-polar
    image of the annulus).  Element 3 sits in the Fourier plane of the corrected strip: charge ``l`` arrives at
    ``y3 = l lambda f_c / (2 pi a)`` (mirrored: ``-l``), each spot about ``lambda f_c / (2 pi a)`` wide along y and
    ``lambda f_c / w`` along x (``w`` the strip width); the rectangle covers ``|l| <= max_charge + 2`` along y and
    ``+-4 lambda f_c / w`` along x (measured with the sampled four-element check, 532 nm, 300 um, 3 copies: the
    detected power matched the unobstructed grating plane within 1 %; with ``+-2 lambda f_c / w`` 8 % was lost).
    Element 4: the ``n_copies`` copies side by side, ``n_copies 2 pi a`` long.
    """
    k = int(element)
    if not 1 <= k <= (4 if setup.n_copies > 1 else 2):
        raise DesignError(f"sorter element = {element!r}; allowed 1..{4 if setup.n_copies > 1 else 2}")
    m = 0.02 * 2 * setup.input_outer_radius_um if margin_um is None else float(margin_um)
    w = setup.strip_x2_um[1] - setup.strip_x2_um[0]
    if k == 1:
        return {"shape": "annulus", "diameter_um": _up(2 * setup.input_outer_radius_um),
                "inner_diameter_um": float(np.floor(20 * setup.input_inner_radius_um) / 10)}
    if k == 2:
        return {"shape": "rectangle", "width_um": _up(w + 2 * m), "height_um": _up(2 * np.pi * setup.a_um + 2 * m)}
    lam_fc = setup.wavelength_nm * 1e-3 * setup.copier_focal_length_mm * 1e3
    if k == 3:
        pitch = lam_fc / (2 * np.pi * setup.a_um)
        return {"shape": "rectangle", "width_um": _up(8 * lam_fc / w), "height_um": _up(2 * (max_charge + 2) * pitch)}
    return {"shape": "rectangle", "width_um": _up(w + 2 * m),
            "height_um": _up(setup.n_copies * 2 * np.pi * setup.a_um + 2 * m)}


def parse_sorter_term(r, wavelength_nm: float) -> SorterElement:
    """Read a ``[[phase]]`` table of kind ``mode_sorter`` (a :class:`metalay.validate.TomlTable`).

    Keys (units in the names): ``element`` (1..2, or 1..4 with copies), ``input_diameter_um``,
    ``inner_diameter_um`` (default a fifth of the input diameter), ``spot_spacing_um`` (displacement per unit
    charge behind the Fourier lens), ``focal_length_mm`` (element spacing ``f``; default from ``min_waves``),
    ``n_copies`` (odd, default 1), ``min_waves`` (default 4), ``max_ray_angle_deg`` (default 15),
    ``copier_angle_deg`` (default 1.7).  The values go to :func:`sorter_parameters`, which chooses ``a``, ``b``,
    ``F`` and ``f_c``; a refusal there names the key to change.

    Returns
    -------
    SorterElement
    """
    element = r.number("element", integer=True, lo=1, hi=4)
    d = r.number("input_diameter_um", lo=0, lo_open=True, hi=1e5)
    inner = r.number("inner_diameter_um", None, lo=0, lo_open=True, hi=1e5)
    if inner is not None and inner >= d:
        r.fail("inner_diameter_um", inner, f"must be smaller than input_diameter_um = {d:g}")
    spacing = r.number("spot_spacing_um", lo=0, lo_open=True, hi=1e5)
    f_mm = r.number("focal_length_mm", None, lo=0, lo_open=True, hi=1e4)
    n = r.number("n_copies", 1, integer=True, lo=1, hi=31)
    if n % 2 == 0:
        r.fail("n_copies", n, "allowed odd values 1..31 (orders -M..M of the fan-out grating)")
    if element > (4 if n > 1 else 2):
        r.fail("element", element, f"allowed 1..{4 if n > 1 else 2} for n_copies = {n}")
    waves = r.number("min_waves", 4.0, lo=0.5, hi=1000.0)
    angle = r.number("max_ray_angle_deg", 15.0, lo=0, lo_open=True, hi=60.0)
    copier = r.number("copier_angle_deg", 1.7, lo=0, lo_open=True, hi=30.0)
    try:
        setup = sorter_parameters(float(d), wavelength_nm=float(wavelength_nm), spot_spacing_um=float(spacing),
                                  inner_diameter_um=None if inner is None else float(inner),
                                  focal_length_mm=None if f_mm is None else float(f_mm), n_copies=int(n),
                                  min_waves=float(waves), max_ray_angle_deg=float(angle),
                                  copier_angle_deg=float(copier))
    except MetalayError as exc:
        msg = str(exc).removeprefix("sorter_parameters: ")
        table = f"table '{r.prefix.rstrip('.')}' (kind 'mode_sorter')" if r.prefix else "mode_sorter set-up"
        raise DesignError(f"{r.where}: {table}: {msg}") from exc
    return sorter_element(setup, int(element))
