"""Map two target phases (one per input spin) to a cell and a rotation at every site (spin-decoupled libraries).

A half-wave cell with conversion phase ``psi = arg((t_long - t_short)/2)`` rotated by ``theta`` (arriving light's
frame) gives spin +1 the phase ``psi + 2 theta`` and spin -1 the phase ``psi - 2 theta``
(:mod:`metalay.cells.decoupled`; Mueller et al. 2017, Phys. Rev. Lett. 118, 113901). Per site:

1. the wanted conversion phase is ``psi_t = (phi_+ + phi_-)/2`` mod pi (:func:`metalay.cells.decoupled.cell_targets`);
2. the cell is the library cell whose conversion phase is nearest to ``psi_t`` modulo pi (a cell turned by 90
   degrees carries its phase + pi), leaving the cell-set error ``e = psi_cell - psi_t`` (mod pi, in (-pi/2, pi/2]);
3. the rotation is taken on the branch of the cell: ``theta = (phi_+ - (psi_cell - e))/2`` mod pi, so that both
   spins receive their target plus the same ``e``: spin +1 ``psi_cell + 2 theta = phi_+ + e``, spin -1
   ``psi_cell - 2 theta = phi_- + e`` (mod 2 pi);
4. the rotation written in the mask frame is ``s theta`` with ``s`` the side's rotation sign (+1 lit through the
   substrate in transmission, -1 lit onto the structures or in reflection; the caller also evaluates the phases at
   the leaving light's coordinates); with K rotation levels it is rounded to a multiple of pi/K, which adds
   ``+2 s d`` to spin +1 and ``-2 s d`` to spin -1 for a rounding ``d`` of the mask-frame rotation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from metalay.cells.decoupled import cell_targets, conversion_phase, wrap_pi
from metalay.cells.library import CellLibrary
from metalay.errors import LibraryError
from metalay.mask.mapping import quantise_rotation

__all__ = ["SpinAssignment", "assign_spin_cells"]


@dataclass(frozen=True)
class SpinAssignment:
    """Per-site cell choice for a spin-decoupled design (parallel arrays of length N).

    Attributes
    ----------
    cell_index : ndarray int16
        Index into ``library.cells``.
    rotation_rad : ndarray float64
        Element rotation in the mask frame, in [0, pi).
    level : ndarray int32 or None
        Rotation level (0..K-1) when quantised.
    quantisation_error_rad : float
        Worst phase error of either spin from the cell set and the rotation levels (radians).
    cell_phase_error_rad : float
        Worst ``|e|``: the cell set's error of the conversion phase, common to both spins.
    spin_error_rad : dict {+1: float, -1: float}
        Worst ``|e + 2 sigma s d|`` per input spin (cell set and rotation levels, before snapping).
    phase_error_rad : dict {+1: ndarray, -1: ndarray}
        Per-site phase error of each spin (``e + 2 sigma s d``, wrapped), for statistics.
    """

    cell_index: np.ndarray
    rotation_rad: np.ndarray
    level: np.ndarray | None
    quantisation_error_rad: float
    cell_phase_error_rad: float
    spin_error_rad: dict
    phase_error_rad: dict


def assign_spin_cells(phi_plus_rad, phi_minus_rad, library: CellLibrary, *, wavelength_nm: float,
                      rotation_levels: int = 0, rotation_sign: int = 1) -> SpinAssignment:
    """Choose the cell and rotation that give each spin its own target phase, at every site.

    Parameters
    ----------
    phi_plus_rad, phi_minus_rad : ndarray (N,)
        Target phases for input spin +1 and -1 at the sites (radians, any branch; evaluated at the coordinates of
        the leaving light).
    library : CellLibrary
        A ``spin_decoupled`` library with responses.
    wavelength_nm : float
        Design wavelength (the cells' conversion phases are taken there).
    rotation_levels : int
        0 for the exact rotation per site, K >= 2 to round the mask-frame rotation to multiples of pi/K.
    rotation_sign : {+1, -1}
        ``s`` in ``theta_mask = s theta``: +1 for transmission lit through the substrate, -1 for light arriving
        onto the structures (transmission) or reflection (the arriving light sees the element mirrored).

    Returns
    -------
    SpinAssignment

    Raises
    ------
    LibraryError
        The library is not a spin-decoupled library with responses at ``wavelength_nm``.

    Examples
    --------
    With a single ideal cell of conversion phase 0, targets ``phi_+ = pi/2`` and ``phi_- = -pi/2`` need only the
    rotation ``theta = pi/4`` (a pure geometric phase): ``assign_spin_cells(...).rotation_rad == pi/4``.
    """
    if library.phase_mechanism != "spin_decoupled":
        raise LibraryError(f"{library.source_path or library.name}: phase_mechanism = {library.phase_mechanism!r}; "
                           "a design with a phase per input spin needs a 'spin_decoupled' library")
    if rotation_sign not in (1, -1):
        raise LibraryError(f"rotation_sign = {rotation_sign!r}; allowed: 1, -1")
    t_long, t_short = library.response_at(wavelength_nm)
    psi_cell = conversion_phase(t_long, t_short)
    pp = np.asarray(phi_plus_rad, dtype=np.float64)
    pm = np.asarray(phi_minus_rad, dtype=np.float64)
    psi_t, _ = cell_targets(pp, pm)
    n = psi_t.size
    best = np.zeros(n, dtype=np.int16)
    best_e = np.full(n, np.inf)
    for c, ph in enumerate(psi_cell):  # loop over the library's cells (a short axis)
        e = wrap_pi(2.0 * (ph - psi_t)) / 2.0  # error modulo pi, in (-pi/2, pi/2]
        better = np.abs(e) < np.abs(best_e)
        best[better] = c
        best_e[better] = e[better]
    # branch of the chosen cell: psi_cell = psi_t + e + m pi; rotate with the matching branch of theta
    m = np.rint((psi_cell[best] - best_e - psi_t) / np.pi)
    theta = np.mod((pp - psi_t - m * np.pi) / 2.0, np.pi)
    theta_mask = np.mod(rotation_sign * theta, np.pi)
    theta_mask[theta_mask >= np.pi] = 0.0
    level = None
    errors = {1: best_e.copy(), -1: best_e.copy()}
    if rotation_levels:
        theta_q, level = quantise_rotation(theta_mask, rotation_levels)
        d = wrap_pi(2.0 * (theta_q - theta_mask)) / 2.0
        for sigma in (1, -1):
            errors[sigma] = wrap_pi(best_e + 2.0 * sigma * rotation_sign * d)
        theta_mask = theta_q
    worst = {s: float(np.max(np.abs(v), initial=0.0)) for s, v in errors.items()}
    return SpinAssignment(best, theta_mask, level, max(worst.values()), float(np.max(np.abs(best_e), initial=0.0)),
                          worst, errors)
