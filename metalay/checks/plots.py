"""PNG figures of the optical check (matplotlib, Agg canvas, no pyplot state).

Every function returns the PNG as ``bytes``; the same input gives the same bytes (no software tag, no dates,
fixed size and resolution, matplotlib's default style reset for each figure).  Large arrays are reduced for display
by block averaging (intensity) or striding (phase) to at most ``max_pixels`` per side.
"""

from __future__ import annotations

import io

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PolyCollection
from matplotlib.colors import LogNorm, Normalize
from matplotlib.figure import Figure

__all__ = ["png_bytes", "phase_map", "layout_zoom", "far_field_map", "oam_bars", "crosstalk_map",
           "interferogram_map", "focal_profile", "PHASE_CMAP", "INTENSITY_CMAP", "new_figure", "styled"]

#: Our colour choices: a cyclic map for phase, a perceptual map for intensity.
PHASE_CMAP = "twilight_shifted"
INTENSITY_CMAP = "cividis"
BAR_COLOUR = "#3b6e8f"
HIGHLIGHT_COLOUR = "#d9822b"
_RC = {"svg.hashsalt": "metalay", "font.size": 9, "axes.titlesize": 10, "figure.dpi": 100}


def new_figure(w_in=5.0, h_in=4.0) -> Figure:
    """A figure of ``w_in`` x ``h_in`` inches drawn by the Agg canvas (no pyplot state)."""
    fig = Figure(figsize=(w_in, h_in), dpi=100)
    FigureCanvasAgg(fig)
    return fig


def png_bytes(fig: Figure, *, dpi: int = 100) -> bytes:
    """Render ``fig`` to deterministic PNG bytes (no ``Software`` tag, no timestamps)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()


def styled(fn):
    """Run ``fn`` with matplotlib's defaults plus metalay's fixed style (deterministic output)."""
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(rc={**matplotlib.rcParamsDefault, **_RC}):
            return fn(*args, **kwargs)

    wrapper.__doc__ = fn.__doc__
    wrapper.__name__ = fn.__name__
    return wrapper


def _shrink(a: np.ndarray, max_pixels: int, *, mean: bool):
    """Reduce a 2-D array to at most ``max_pixels`` per side (block mean or stride); return it and the factor."""
    m = int(np.ceil(max(a.shape) / max_pixels))
    if m <= 1:
        return a, 1
    if not mean:
        return a[::m, ::m], m
    ny, nx = (a.shape[0] // m) * m, (a.shape[1] // m) * m
    return a[:ny, :nx].reshape(ny // m, m, nx // m, m).mean(axis=(1, 3)), m


@styled
def phase_map(phase_rad: np.ndarray, x_um: np.ndarray, y_um: np.ndarray, *, title: str, valid=None,
              max_pixels: int = 700) -> bytes:
    """Wrapped phase (-pi..pi] as an image; ``valid`` (bool, same shape) blanks samples outside the aperture."""
    ph = np.angle(np.exp(1j * np.asarray(phase_rad, dtype=np.float64)))
    if valid is not None:
        ph = np.where(valid, ph, np.nan)
    ph, m = _shrink(ph, max_pixels, mean=False)
    fig = new_figure(5.2, 4.2)
    ax = fig.add_subplot()
    im = ax.imshow(ph, origin="lower", cmap=PHASE_CMAP, vmin=-np.pi, vmax=np.pi, interpolation="nearest",
                   extent=[x_um[0], x_um[-1], y_um[0], y_um[-1]])
    cb = fig.colorbar(im, ax=ax, ticks=[-np.pi, 0, np.pi])
    cb.ax.set_yticklabels(["-pi", "0", "pi"])
    cb.set_label("phase (rad)")
    ax.set_xlabel("x (um)")
    ax.set_ylabel("y (um)")
    ax.set_title(title)
    return png_bytes(fig)


@styled
def layout_zoom(start: np.ndarray, xy_db: np.ndarray, db_unit_nm: float, *, center_um=(0.0, 0.0), half_width_um=2.0,
                title: str = "mask layout (zoom)", max_polygons: int = 5000, by_extent: bool = False) -> bytes:
    """Polygons of the mask inside a square window, drawn as outlines over a light fill.

    Polygons are chosen by their first vertex (small elements), or with ``by_extent`` by their bounding box (the
    long film pieces of a complement-tone mask).
    """
    counts = np.diff(start)
    um_per_db = db_unit_nm / 1000.0
    if by_extent and counts.size:
        lo = np.minimum.reduceat(xy_db, start[:-1], axis=0) * um_per_db
        hi = np.maximum.reduceat(xy_db, start[:-1], axis=0) * um_per_db
        c = np.asarray(center_um, dtype=np.float64)
        near = np.all((hi > c - half_width_um) & (lo < c + half_width_um), axis=1)
    else:
        first = xy_db[start[:-1]] * um_per_db
        near = (np.abs(first[:, 0] - center_um[0]) < half_width_um + 1) & \
               (np.abs(first[:, 1] - center_um[1]) < half_width_um + 1)
    idx = np.flatnonzero(near)[:max_polygons]
    polys = [xy_db[start[k]:start[k] + counts[k]] * um_per_db for k in idx]  # a few hundred polygons for the figure
    fig = new_figure(4.6, 4.6)
    ax = fig.add_subplot()
    ax.add_collection(PolyCollection(polys, facecolors="#9ec5d8", edgecolors="#1f3b4d", linewidths=0.6))
    ax.set_xlim(center_um[0] - half_width_um, center_um[0] + half_width_um)
    ax.set_ylim(center_um[1] - half_width_um, center_um[1] + half_width_um)
    ax.set_aspect("equal")
    ax.set_xlabel("x (um)")
    ax.set_ylabel("y (um)")
    ax.set_title(title)
    return png_bytes(fig)


@styled
def far_field_map(power: np.ndarray, u: np.ndarray, v: np.ndarray, *, title: str = "far field", log: bool = True,
                  extent_u: float | None = None, marks=None, max_pixels: int = 700, dynamic_range_db: float = 50.0
                  ) -> bytes:
    """Far-field power per bin over direction cosines; ``marks`` maps labels to (u, v) drawn as circles."""
    if extent_u is not None:
        cols = np.flatnonzero(np.abs(u) <= extent_u)
        rows = np.flatnonzero(np.abs(v) <= extent_u)
        power = power[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
        u, v = u[cols[0]:cols[-1] + 1], v[rows[0]:rows[-1] + 1]
    img, m = _shrink(np.asarray(power, dtype=np.float64), max_pixels, mean=True)
    fig = new_figure(5.2, 4.2)
    ax = fig.add_subplot()
    top = float(img.max()) if img.size and img.max() > 0 else 1.0
    norm = LogNorm(vmin=top * 10 ** (-dynamic_range_db / 10), vmax=top) if log else Normalize(0, top)
    im = ax.imshow(np.maximum(img, top * 10 ** (-dynamic_range_db / 10) if log else 0), origin="lower",
                   cmap=INTENSITY_CMAP, norm=norm, interpolation="nearest", extent=[u[0], u[-1], v[0], v[-1]])
    fig.colorbar(im, ax=ax).set_label("power per bin (relative)" if not log else "power per bin (log)")
    for k, (label, (mu, mv)) in enumerate((marks or {}).items()):
        ax.plot([mu], [mv], marker="o", mfc="none", mec=HIGHLIGHT_COLOUR, ms=10, mew=1.2)
        # alternate above/below so labels of nearby spots do not overlap
        ax.annotate(label.replace("_", " "), (mu, mv), textcoords="offset points",
                    xytext=(6, 7) if k % 2 == 0 else (6, -15), color=HIGHLIGHT_COLOUR)
    ax.set_xlabel("u = sin(theta_x)")
    ax.set_ylabel("v = sin(theta_y)")
    ax.set_title(title)
    return png_bytes(fig)


@styled
def oam_bars(charges, weights, *, design_charge=None, title: str = "OAM spectrum") -> bytes:
    """Bar chart of power per topological charge (designed charge highlighted)."""
    charges = np.asarray(charges)
    weights = np.asarray(weights, dtype=np.float64)
    fig = new_figure(6.4, 3.6)
    ax, ax_log = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1, 1]})
    colours = [HIGHLIGHT_COLOUR if design_charge is not None and c == design_charge else BAR_COLOUR for c in charges]
    step = 1 if charges.size <= 9 else (2 if charges.size <= 13 else 5)
    for a in (ax, ax_log):
        a.bar(charges, np.maximum(weights, 1e-12) if a is ax_log else weights, color=colours, width=0.8)
        a.set_xticks(charges[::step])
        a.set_xlabel("topological charge l")
    ax.set_ylabel("power fraction")
    ax.set_ylim(0, max(1.0, float(weights.max()) * 1.05) if weights.size else 1.0)
    ax.set_title(title)
    ax_log.set_yscale("log")
    ax_log.set_ylim(1e-8, 1.5)
    ax_log.set_title("same, log scale")
    fig.subplots_adjust(bottom=0.16, wspace=0.35, left=0.1, right=0.97)
    return png_bytes(fig)


@styled
def crosstalk_map(matrix_db, charges, *, title: str = "channel crosstalk (dB, row-normalised)") -> bytes:
    """Heat map of the crosstalk matrix in dB with the values written in the cells."""
    m = np.asarray(matrix_db, dtype=np.float64)
    m = np.where(np.isfinite(m), m, -99.0)
    fig = new_figure(4.6, 4.0)
    ax = fig.add_subplot()
    im = ax.imshow(m, cmap="viridis", vmin=max(-60.0, float(m.min())), vmax=0.0)
    for (r, c), val in np.ndenumerate(m):
        ax.text(c, r, f"{val:.1f}", ha="center", va="center", color="white" if val < -20 else "black", fontsize=8)
    labels = [f"l={q}" for q in charges]
    ax.set_xticks(range(len(labels)), labels)
    ax.set_yticks(range(len(labels)), labels)
    ax.set_xlabel("spot of channel")
    ax.set_ylabel("probe (conjugate vortex of channel)")
    fig.colorbar(im, ax=ax).set_label("dB")
    ax.set_title(title)
    return png_bytes(fig)


@styled
def interferogram_map(intensity: np.ndarray, x_um, y_um, *, title: str = "interferogram", max_pixels: int = 700
                      ) -> bytes:
    """Grey-scale fringe pattern."""
    img, m = _shrink(np.asarray(intensity, dtype=np.float64), max_pixels, mean=False)
    fig = new_figure(4.8, 4.2)
    ax = fig.add_subplot()
    ax.imshow(img, origin="lower", cmap="gray", interpolation="nearest", extent=[x_um[0], x_um[-1], y_um[0], y_um[-1]])
    ax.set_xlabel("x (um)")
    ax.set_ylabel("y (um)")
    ax.set_title(title)
    return png_bytes(fig)


@styled
def focal_profile(radius_um, intensity, *, airy_radius_um=None, title: str = "focal spot (azimuthal mean)"
                  ) -> bytes:
    """Radial focal-spot profile with the ideal Airy pattern ``[2 J1(v)/v]^2`` for comparison."""
    from scipy.special import j1

    r = np.asarray(radius_um, dtype=np.float64)
    fig = new_figure(5.0, 3.4)
    ax = fig.add_subplot()
    ax.plot(r, intensity, color=BAR_COLOUR, label="mask")
    if airy_radius_um:
        vv = 3.8317 * r / airy_radius_um
        with np.errstate(invalid="ignore", divide="ignore"):
            airy = np.where(vv > 0, (2 * j1(vv) / vv) ** 2, 1.0)
        ax.plot(r, airy, color=HIGHLIGHT_COLOUR, ls="--", label="Airy (same NA)")
        ax.axvline(airy_radius_um, color="#888888", lw=0.8)
    ax.set_xlabel("radius (um)")
    ax.set_ylabel("intensity (normalised)")
    ax.legend()
    ax.set_title(title)
    return png_bytes(fig)
