"""Spin-decoupled cells: a half-wave cell with its own propagation phase gives any two phases to the two spins.

A cell with principal responses ``t_long = A exp(i delta_x)`` and ``t_short = A exp(i delta_y)``,
``delta_y = delta_x + pi`` (a half-wave plate), rotated by ``theta`` (long axis from +x towards +y, in the frame of
the arriving light), has the Jones matrix ``R(-theta) diag(t_long, t_short) R(theta)``. For input
``|sigma> = (x + i sigma y)/sqrt(2)`` it gives (README "Physics conventions")::

    ((t_long + t_short)/2) |sigma>  +  ((t_long - t_short)/2) exp(2 i sigma theta) |-sigma>

so the converted light of spin ``sigma`` carries the phase ``psi + 2 sigma theta`` with the cell's conversion phase
``psi = arg((t_long - t_short)/2)`` (``= delta_x`` for an exact half-wave cell, and the right quantity for any
cell: it is what the converted light carries). In this project's sign convention:

* spin +1 receives ``phi_+ = psi + 2 theta``;
* spin -1 receives ``phi_- = psi - 2 theta``.

Any two targets are reached with ``psi = (phi_+ + phi_-)/2`` and ``theta = (phi_+ - phi_-)/4`` (Mueller, Rubin,
Devlin, Groever, Capasso 2017, Phys. Rev. Lett. 118, 113901; Devlin, Ambrosio, Rubin, Mueller, Capasso 2017,
Science 358, 896). Branches: ``phi_+`` and ``phi_-`` are phases (mod 2 pi), so their half-sum is defined only mod
pi and ``theta`` only mod pi/2, and the two choices are tied: taking ``psi + pi`` needs ``theta - pi/2``. Physically,
turning a cell by 90 degrees swaps its axes, ``t_long <-> t_short``, which adds pi to its conversion phase for both
spins. :func:`cell_targets` therefore returns the half-sum mod pi and the rotation of that branch, and a library
only needs conversion phases covering 0..pi: each cell also serves, turned by 90 degrees, the level pi away.

The retardance of a cell is ``arg(t_long / t_short)``; its error from a half-wave plate is ``retardance - pi``
(wrapped). A retardance error ``epsilon`` leaves ``|(t_long + t_short)/2|^2 = A^2 sin^2(epsilon / 2)`` unconverted,
in the input polarisation, with no designed phase.

Functions
---------
conversion_phase, retardance_error   cell figures from ``(t_long, t_short)``
spin_phases                          forward relation: (psi, theta) -> (phi_+, phi_-)
cell_targets                         inverse relation: (phi_+, phi_-) -> (psi mod pi, theta mod pi), one branch
pick_spin_levels                     choose library cells for ``levels`` conversion-phase levels from a sweep
level_report                         per-cell and per-level figures stored in the library (``spin_decoupled``)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["conversion_phase", "retardance_error", "spin_phases", "cell_targets", "SpinLevels", "pick_spin_levels",
           "level_report", "wrap_pi"]


def wrap_pi(a):
    """Wrap angles (radians) to (-pi, pi]."""
    return np.pi - np.mod(np.pi - np.asarray(a, dtype=np.float64), 2 * np.pi)


def conversion_phase(t_long, t_short) -> np.ndarray:
    """Phase ``psi = arg((t_long - t_short)/2)`` carried by the converted light of either spin at rotation 0 (rad)."""
    return np.angle((np.asarray(t_long) - np.asarray(t_short)) / 2)


def retardance_error(t_long, t_short) -> np.ndarray:
    """``arg(t_long / t_short) - pi`` wrapped to (-pi, pi] (radians): 0 for a half-wave cell."""
    return wrap_pi(np.angle(np.asarray(t_long) * np.conj(np.asarray(t_short))) - np.pi)


def spin_phases(psi_rad, theta_rad) -> tuple[np.ndarray, np.ndarray]:
    """Converted phases ``(phi_+, phi_-) = (psi + 2 theta, psi - 2 theta)`` of spins +1 and -1 (radians).

    Parameters
    ----------
    psi_rad : array_like
        Conversion phase of the cell, ``arg((t_long - t_short)/2)``.
    theta_rad : array_like
        Rotation of the long axis from +x towards +y, in the arriving light's frame.

    Notes
    -----
    From the Jones matrix ``R(-theta) diag(t_long, t_short) R(theta)``: the converted part of ``|sigma>`` is
    ``((t_long - t_short)/2) exp(2 i sigma theta)`` (Bomzon, Biener, Kleiner, Hasman 2002, Opt. Lett. 27, 1141).
    """
    psi = np.asarray(psi_rad, dtype=np.float64)
    theta = np.asarray(theta_rad, dtype=np.float64)
    return psi + 2 * theta, psi - 2 * theta


def cell_targets(phi_plus_rad, phi_minus_rad) -> tuple[np.ndarray, np.ndarray]:
    """The cell phase and rotation that give spin +1 the phase ``phi_+`` and spin -1 the phase ``phi_-``.

    Parameters
    ----------
    phi_plus_rad, phi_minus_rad : array_like
        Target phases (radians, any branch).

    Returns
    -------
    psi_rad : ndarray
        Wanted conversion phase, ``(phi_+ + phi_-)/2`` reduced to [0, pi).
    theta_rad : ndarray
        Rotation in [0, pi) of the same branch: ``theta = (phi_+ - psi)/2 mod pi``, so that
        ``spin_phases(psi, theta) == (phi_+, phi_-)`` mod 2 pi exactly. (Mueller et al. 2017 write
        ``theta = (phi_+ - phi_-)/4``; reducing ``psi`` by ``k pi`` shifts it by ``-k pi/2``.) A cell whose conversion
        phase is ``psi + pi`` serves the same site turned by 90 degrees.

    Notes
    -----
    Check: ``psi + 2 theta = phi_+`` (mod 2 pi) by construction, and ``psi - 2 theta = 2 psi - phi_+ = phi_-``
    (mod 2 pi) because ``2 psi = phi_+ + phi_-`` (mod 2 pi).
    """
    pp = np.asarray(phi_plus_rad, dtype=np.float64)
    pm = np.asarray(phi_minus_rad, dtype=np.float64)
    psi = np.mod((pp + pm) / 2, np.pi)
    psi = np.where(psi >= np.pi, 0.0, psi)
    theta = np.mod((pp - psi) / 2, np.pi)
    theta = np.where(theta >= np.pi, 0.0, theta)
    return psi, theta


@dataclass(frozen=True)
class SpinLevels:
    """Cells chosen for the conversion-phase levels ``offset + 2 pi k / levels``.

    Attributes
    ----------
    geometry : ndarray (K,) int
        Sweep index of the cell serving level k.
    turned : ndarray (K,) bool
        True where the cell serves the level turned by 90 degrees (its conversion phase + pi).
    offset_rad : float
        Phase of level 0.
    score : float
        Worst projection ``Re(c exp(-i level))`` over the levels (``c`` the converted amplitude): the
        figure maximised (flat, large amplitude and small phase error at once).
    """

    geometry: np.ndarray
    turned: np.ndarray
    offset_rad: float
    score: float

    @property
    def distinct(self) -> np.ndarray:
        """Sorted distinct sweep indices (the library's cells)."""
        return np.unique(self.geometry)


def pick_spin_levels(t_long, t_short, levels: int, *, retardance_tolerance_rad: float,
                     usable=None) -> SpinLevels | None:
    """Choose half-wave cells whose conversion phases cover 0..2 pi in ``levels`` equal steps.

    Parameters
    ----------
    t_long, t_short : ndarray (G,) complex
        Responses of the swept geometries at the design wavelength.
    levels : int
        Number of levels N (steps of 2 pi / N).
    retardance_tolerance_rad : float
        Largest accepted ``|retardance_error|``.
    usable : ndarray (G,) bool, optional
        Geometries allowed (e.g. not refused by a converged re-check).

    Returns
    -------
    SpinLevels or None
        None when no geometry is within the retardance tolerance.

    Notes
    -----
    Candidates are every usable geometry within tolerance, as it is (converted amplitude ``c``) and turned by 90
    degrees (``-c``). For each global offset on a 1-degree grid and each level k, the candidate maximising the
    projection ``Re(c exp(-i (offset + 2 pi k / N)))`` is taken; the offset whose worst projection is largest wins
    (ties: smaller offset, smaller index), the criterion of the propagation-phase picker applied to the converted
    amplitude.
    """
    tl = np.asarray(t_long, dtype=complex)
    ts = np.asarray(t_short, dtype=complex)
    ok = np.abs(retardance_error(tl, ts)) <= retardance_tolerance_rad
    if usable is not None:
        ok &= np.asarray(usable, bool)
    idx = np.flatnonzero(ok)
    if idx.size == 0:
        return None
    conv = (tl[idx] - ts[idx]) / 2
    cand = np.concatenate([conv, -conv])                                                  # (2C,)
    offsets = np.deg2rad(np.arange(360.0))
    targets = offsets[:, None] + 2 * np.pi * np.arange(levels)[None, :] / levels        # (O, K)
    proj = np.real(cand[None, None, :] * np.exp(-1j * targets)[:, :, None])             # (O, K, 2C)
    best = np.argmax(proj, axis=2)                                                       # (O, K)
    score = np.take_along_axis(proj, best[:, :, None], axis=2)[:, :, 0].min(axis=1)     # (O,)
    o = int(np.argmax(score))
    pick = best[o]
    return SpinLevels(geometry=idx[pick % idx.size], turned=pick >= idx.size, offset_rad=float(offsets[o]),
                      score=float(score[o]))


def level_report(cell_ids, t_long, t_short, chosen: SpinLevels, geometry_to_cell: dict, *,
                 retardance_tolerance_rad: float, wavelength_nm: float) -> dict:
    """JSON-ready figures of a spin-decoupled cell set (stored under ``spin_decoupled`` in the library file).

    Parameters
    ----------
    cell_ids : sequence of str
        Library cell ids, in library order.
    t_long, t_short : ndarray (C,) complex
        Converged responses of the library cells at ``wavelength_nm``.
    chosen : SpinLevels
        The level assignment (sweep indices).
    geometry_to_cell : dict int -> int
        Sweep index -> library cell index.
    retardance_tolerance_rad : float
        The tolerance the cells were chosen with.
    wavelength_nm : float

    Returns
    -------
    dict
        ``levels``, ``level_offset_deg``, ``retardance_tolerance_deg``, ``wavelength_nm``, ``amplitude_spread``
        (``(max - min) / mean`` of ``|c|``, ``c = (t_long - t_short)/2``), ``worst_retardance_error_deg``,
        ``worst_level_phase_error_deg``, ``cells`` (per cell: conversion phase, retardance error, conversion
        amplitude and efficiency, relative deviation of ``|c|`` from the set mean, ``|t_long|``, ``|t_short|``, the
        levels it serves) and ``level_table`` (per level: target phase, cell, turned, phase error).
    """
    tl = np.asarray(t_long, dtype=complex)
    ts = np.asarray(t_short, dtype=complex)
    conv = (tl - ts) / 2
    amp = np.abs(conv)
    mean_amp = float(amp.mean())
    psi = conversion_phase(tl, ts)
    ret = retardance_error(tl, ts)
    n = chosen.geometry.size
    table = []
    serves: dict[int, list] = {c: [] for c in range(len(cell_ids))}
    for k in range(n):  # levels (a short axis)
        c = geometry_to_cell[int(chosen.geometry[k])]
        target = chosen.offset_rad + 2 * np.pi * k / n
        phase = psi[c] + (np.pi if chosen.turned[k] else 0.0)
        err = float(np.degrees(wrap_pi(phase - target)))
        serves[c].append(k)
        table.append({"level": k, "target_phase_deg": _r(np.degrees(np.mod(target, 2 * np.pi))),
                      "cell_id": cell_ids[c], "turned_90_deg": bool(chosen.turned[k]), "phase_error_deg": _r(err)})
    cells = [{"cell_id": cid, "conversion_phase_deg": _r(np.degrees(psi[c])),
              "retardance_error_deg": _r(np.degrees(ret[c])), "conversion_amplitude": _r(amp[c]),
              "conversion_efficiency": _r(amp[c] ** 2), "leakage": _r(abs((tl[c] + ts[c]) / 2) ** 2),
              "amplitude_deviation": _r(amp[c] / mean_amp - 1.0), "abs_t_long": _r(abs(tl[c])),
              "abs_t_short": _r(abs(ts[c])), "levels": serves[c]} for c, cid in enumerate(cell_ids)]
    return {"levels": int(n), "level_offset_deg": _r(np.degrees(chosen.offset_rad)),
            "retardance_tolerance_deg": _r(np.degrees(retardance_tolerance_rad)), "wavelength_nm": float(wavelength_nm),
            "amplitude_spread": _r((amp.max() - amp.min()) / mean_amp),
            "worst_retardance_error_deg": _r(np.degrees(np.max(np.abs(ret)))),
            "worst_level_phase_error_deg": _r(max(abs(t["phase_error_deg"]) for t in table)),
            "relations": ("spin +1 receives psi + 2 theta, spin -1 receives psi - 2 theta, psi = arg((t_long - "
                          "t_short)/2); a cell turned by 90 degrees serves psi + pi"),
            "cells": cells, "level_table": table}


def _r(v) -> float:
    """9 significant digits (byte-stable JSON across BLAS thread counts)."""
    return float(f"{float(v):.9g}")
