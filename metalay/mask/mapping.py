"""Map the target phase to a cell and a rotation at every site.

Geometric phase: a cell rotated by theta converts spin sigma into -sigma with the extra phase 2 sigma theta
(design notes; Bomzon, Biener, Kleiner, Hasman 2002, Opt. Lett. 27, 1141), so the rotation that writes a target
phase phi is ``theta = sigma phi / 2 (mod pi)``. With K rotation levels theta is rounded to a multiple of pi/K.

Propagation phase: the cell whose transmitted phase arg(t) at the design wavelength is nearest (wrapped) to phi.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from metalay.cells.library import CellLibrary
from metalay.errors import LibraryError

__all__ = ["Assignment", "geometric_rotation", "quantise_rotation", "assign_cells", "wrap_pi"]


@dataclass(frozen=True)
class Assignment:
    """Per-site cell choice (parallel arrays of length N).

    Attributes
    ----------
    cell_index : ndarray of int16
        Index into ``library.cells``.
    rotation_rad : ndarray of float64
        Element rotation in [0, pi).
    level : ndarray of int32 or None
        Rotation level (0..K-1) when quantised.
    quantisation_error_rad : float
        Worst phase error (radians of target phase) that quantisation or cell choice introduced.
    """

    cell_index: np.ndarray
    rotation_rad: np.ndarray
    level: np.ndarray | None
    quantisation_error_rad: float


def wrap_pi(a):
    """Wrap angles to (-pi, pi]."""
    return np.pi - np.mod(np.pi - np.asarray(a, dtype=np.float64), 2 * np.pi)


def geometric_rotation(phi_rad, sigma: int) -> np.ndarray:
    """Element rotation ``theta = sigma * phi / 2 mod pi`` in [0, pi)."""
    theta = np.mod(sigma * np.asarray(phi_rad, dtype=np.float64) / 2.0, np.pi)
    theta[theta >= np.pi] = 0.0  # guard against rounding to exactly pi
    return theta


def quantise_rotation(theta_rad, levels: int) -> tuple[np.ndarray, np.ndarray]:
    """Round rotations to ``levels`` equally spaced values k*pi/levels; return (theta_q, level)."""
    step = np.pi / levels
    level = np.mod(np.rint(theta_rad / step).astype(np.int64), levels).astype(np.int32)
    return level * step, level


def assign_cells(phi_rad, library: CellLibrary, *, sigma: int = 1, cell_id: str | None = None,
                 rotation_levels: int = 0, wavelength_nm: float | None = None) -> Assignment:
    """Choose the cell and rotation at every site.

    Parameters
    ----------
    phi_rad : ndarray (N,)
        Target phase at the sites.
    library : CellLibrary
    sigma : {+1, -1}
        Input spin.
    cell_id : str, optional
        For a geometric-phase library: which cell to use (default: the first).
    rotation_levels : int
        0 for the exact rotation per site, K >= 2 to quantise to K levels.
    wavelength_nm : float, optional
        Design wavelength (needed for propagation-phase libraries).
    """
    phi = np.asarray(phi_rad, dtype=np.float64)
    n = phi.size
    if library.phase_mechanism == "geometric":
        k = 0 if cell_id is None else library.cell_index(cell_id)
        theta = geometric_rotation(phi, sigma)
        level = None
        err = 0.0
        if rotation_levels:
            theta_q, level = quantise_rotation(theta, rotation_levels)
            err = float(np.max(np.abs(wrap_pi(2 * (theta_q - theta))), initial=0.0))
            theta = theta_q
        return Assignment(np.full(n, k, dtype=np.int16), theta, level, err)
    if wavelength_nm is None:
        raise LibraryError(f"{library.source_path}: propagation-phase mapping needs the design wavelength")
    t_long, _ = library.response_at(wavelength_nm)
    cell_phase = np.angle(t_long)
    best = np.empty(n, dtype=np.int16)
    best_err = np.full(n, np.inf)
    for c, ph in enumerate(cell_phase):  # loop over the library's cells (a short axis)
        e = np.abs(wrap_pi(phi - ph))
        better = e < best_err
        best[better] = c
        best_err[better] = e[better]
    return Assignment(best, np.zeros(n), None, float(np.max(best_err, initial=0.0)))
