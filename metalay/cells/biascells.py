"""Responses of library cells grown by a critical-dimension bias, solved on demand with metalay's RCWA.

A bias ``b`` (nm per edge) grows every edge of a cell outwards by ``b``: a fin or slot ``L x W`` becomes
``(L + 2b) x (W + 2b)`` (sharp corners, as :func:`metalay.mask.process.bias_outline_nm` writes it), a pillar's
diameter or axes grow by ``2b``. Libraries hold one size per geometric-phase cell, so the response of the biased
cell is not in the file; :class:`BiasedCells` computes it with the same stack, the same pattern and, by default,
the same truncation the library build used at each tabulated wavelength (recorded per point in
``provenance.solver.convergence.points``), so that bias 0 reproduces the library's own numbers.

Wavelengths between tabulated ones are interpolated linearly in real and imaginary parts, as
:meth:`metalay.cells.library.CellLibrary.response_at` does. With ``bias_step_nm`` the bias is taken on a grid of
that step and interpolated in amplitude and phase (for Monte Carlo studies drawing many biases; measured on a
TiO2 fin: 7e-4 in ``t`` at a 1 nm step, 2e-4 at 0.5 nm); without it each bias is solved exactly.

The cache is owned by the object (one per library and settings): solved points are kept in memory and, with
``cache_dir``, written there as small JSON files (atomic writes; a file that does not parse or does not match its
key is ignored and solved again). Every result records the solver settings used (:meth:`BiasedCells.record`).

References
----------
Moharam et al. 1995, J. Opt. Soc. Am. A 12, 1068; Li 1997, J. Opt. Soc. Am. A 14, 2758 (the solver,
:mod:`metalay.cells.rcwa`).
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.errors import LibraryError

__all__ = ["BiasedCells", "biased_dims", "SOLVABLE_KINDS"]

#: Cell kinds whose biased outline the solver builds as the library build does.
SOLVABLE_KINDS = ("nanofin", "slot", "elliptic_pillar", "round_pillar")
_CACHE_FORMAT = "metalay.biased-cell-response"
_CACHE_MAX_BYTES = 1 << 16


def _polar(a: complex, b: complex, f: float) -> complex:
    """Interpolate between two responses in amplitude and phase (``a |b/a|^f exp(i f arg(b/a))``).

    A bias mostly turns the phase of a response; a straight chord in the complex plane would cut the arc short by
    ``|t| (d phi)^2 / 8``, this follows it (measured: 3x smaller error than the chord at a 1 nm step).
    """
    if f == 0.0 or a == b:
        return complex(a)
    if a == 0 or b == 0:
        return complex((1 - f) * a + f * b)
    r = b / a
    return complex(a * abs(r) ** f * np.exp(1j * f * np.angle(r)))


def biased_dims(cell, bias_nm: float) -> dict[str, float]:
    """Dimensions (nm) of ``cell`` after growing every edge by ``bias_nm`` (each size by ``2 bias_nm``)."""
    return {name: float(value) + 2.0 * float(bias_nm) for name, value in cell.dims_nm}


@dataclass(frozen=True)
class _Point:
    """One solved geometry: cell index, bias (nm), tabulated wavelength (nm), truncation."""

    cell: int
    bias_nm: float
    wavelength_nm: float
    harmonics: tuple


class BiasedCells:
    """Responses of a library's cells after a CD bias, solved on demand and cached (one object per library).

    Parameters
    ----------
    library : CellLibrary
        A library with a stack (layers, media) and cells of :data:`SOLVABLE_KINDS`.
    harmonics : (int, int) or None
        Truncation of every solve; None (default): the library's recorded truncation at each tabulated
        wavelength (the one its own responses were computed with).
    bias_step_nm : float or None
        None: solve each bias exactly; > 0: solve on a grid of this step and interpolate linearly.
    cache_dir : str or Path, optional
        Folder that keeps solved points between runs.
    anchor : bool
        Anchor to the library (default): at each tabulated wavelength the response is
        ``t_library * t(bias) / t(0)`` with both solves at the same truncation, so truncation errors common to the
        biased and the nominal cell cancel and bias 0 gives the library's response exactly (at the library's own
        truncation the factor ``t_library / t(0)`` is 1 to its 1e-10 quantisation). False: the raw solve.

    Raises
    ------
    LibraryError
        The library cannot be solved (no stack, unsupported cell kind, no recorded truncation and none given).
    """

    def __init__(self, library, *, harmonics=None, bias_step_nm: float | None = None, cache_dir=None,
                 anchor: bool = True):
        self.library = library
        where = library.source_path or library.name
        if harmonics is not None:
            harmonics = (int(harmonics[0]), int(harmonics[1]))
            if min(harmonics) < 0 or max(harmonics) > 40:
                raise LibraryError(f"{where}: bias solver harmonics = {harmonics}; allowed 0..40 per axis")
        if bias_step_nm is not None and not (math.isfinite(bias_step_nm) and 0 < bias_step_nm <= 50):
            raise LibraryError(f"{where}: bias_step_nm = {bias_step_nm!r}; allowed 0 < step <= 50 nm or None")
        self.harmonics = harmonics
        self.anchor = bool(anchor)
        self.bias_step_nm = None if bias_step_nm is None else float(bias_step_nm)
        self.cache_dir = None if cache_dir is None else Path(cache_dir)
        self._cache: dict = {}
        self._solved = 0
        self._loaded = 0
        self._recorded = self._recorded_points()
        self._check_solvable()

    # -------------------------------------------------------------------------------------------------------------
    # public face

    def responses_at(self, cells, bias_nm: float, wavelength_nm: float) -> tuple[np.ndarray, np.ndarray]:
        """``(t_long, t_short)`` per library cell at ``wavelength_nm``, with ``cells`` biased by ``bias_nm``.

        Parameters
        ----------
        cells : iterable of int
            Library cell indices to bias; the other cells keep the library's response.
        bias_nm : float
            Bias per edge (nm).
        wavelength_nm : float
            Inside the library's tabulated band.

        Returns
        -------
        (ndarray (C,) complex, ndarray (C,) complex)
        """
        lib = self.library
        tl, ts = lib.response_at(wavelength_nm)
        tl, ts = tl.copy(), ts.copy()
        cells = sorted({int(c) for c in cells})
        if not cells:
            return tl, ts
        (w0, w1), fw = self._wavelength_bracket(wavelength_nm)
        (b0, b1), fb = self._bias_bracket(bias_nm)
        self.prepare(cells, [b0, b1] if fb else [b0], [w0, w1] if fw else [w0])
        for c in cells:  # cells in use (a short axis)
            at_b = []
            for b in (b0, b1):  # wavelength: linear in real and imaginary parts (as the library interpolates)
                lo, hi = self._node(c, b, w0), self._node(c, b, w1)
                at_b.append([(1 - fw) * lo[k] + fw * hi[k] for k in (0, 1)])
            tl[c], ts[c] = (_polar(at_b[0][k], at_b[1][k], fb) for k in (0, 1))
        return tl, ts

    def _node(self, cell: int, bias_nm: float, wavelength_nm: float) -> tuple:
        """Response of one solved node, anchored to the library when :attr:`anchor` (see the class notes)."""
        tl, ts = self._cache[self._key(cell, bias_nm, wavelength_nm)]
        if not self.anchor:
            return tl, ts
        k = int(np.argmin(np.abs(np.asarray(self.library.wavelengths_nm) - wavelength_nm)))
        zl, zs = self._cache[self._key(cell, 0.0, wavelength_nm)]
        lib_l, lib_s = self.library.t_long[cell, k], self.library.t_short[cell, k]
        return (complex(lib_l * tl / zl) if zl != 0 else tl), (complex(lib_s * ts / zs) if zs != 0 else ts)

    def prepare(self, cells, biases_nm, wavelengths_nm) -> None:
        """Solve (or load) every missing ``(cell, bias, wavelength)`` point, batched per truncation.

        Biases and wavelengths are used as given (grid nodes or exact values); wavelengths must be tabulated.
        Call it before forking workers so that they find every point they need in the cache.
        """
        todo = []
        biases_nm = list(biases_nm) + ([0.0] if self.anchor else [])  # the anchor: bias 0 at the same truncation
        for c in sorted({int(v) for v in cells}):
            for b in sorted({float(v) for v in biases_nm}):
                for w in sorted({float(v) for v in wavelengths_nm}):
                    key = self._key(c, b, w)
                    if key in self._cache:
                        continue
                    got = self._load(key)
                    if got is not None:
                        self._cache[key] = got
                        self._loaded += 1
                    else:
                        todo.append(key)
        if todo:
            self._solve(todo)

    def nodes_for(self, biases_nm, wavelengths_nm) -> tuple[list, list]:
        """Bias nodes and tabulated wavelengths needed to interpolate at the given values (for :meth:`prepare`)."""
        bn, wn = set(), set()
        for b in np.asarray(biases_nm, dtype=np.float64).ravel():
            (b0, b1), fb = self._bias_bracket(float(b))
            bn.update([b0, b1] if fb else [b0])
        for w in np.asarray(wavelengths_nm, dtype=np.float64).ravel():
            (w0, w1), fw = self._wavelength_bracket(float(w))
            wn.update([w0, w1] if fw else [w0])
        return sorted(bn), sorted(wn)

    def record(self) -> dict:
        """JSON-ready solver settings and counts (for the results that used these responses)."""
        lib = self.library
        return {"solver": "metalay.rcwa (Fourier modal method, S-matrices)",
                "library": lib.name, "library_sha256": lib.sha256,
                "truncation": ("the library's recorded truncation at each tabulated wavelength"
                               if self.harmonics is None else {"harmonics_x": self.harmonics[0],
                                                              "harmonics_y": self.harmonics[1]}),
                "anchored_to_library": self.anchor,
                "factorization": "as the library build: Li 1997 rules (rectangles and staircased ellipses)",
                "geometry": "every size grown by 2 x bias (sharp corners); wavelengths interpolated linearly "
                            "between tabulated ones; biases between grid nodes in amplitude and phase",
                "bias_grid_step_nm": self.bias_step_nm,
                "cache_dir": None if self.cache_dir is None else str(self.cache_dir),
                "points_solved": self._solved, "points_loaded_from_cache": self._loaded,
                "points_in_memory": len(self._cache)}

    # -------------------------------------------------------------------------------------------------------------
    # internals

    def _check_solvable(self) -> None:
        lib = self.library
        where = lib.source_path or lib.name
        if not lib.has_responses:
            raise LibraryError(f"{where}: library has no responses; biased responses need a solver-built library")
        bad = sorted({c.kind for c in lib.cells} - set(SOLVABLE_KINDS))
        if bad:
            raise LibraryError(f"{where}: cell kind {bad[0]!r} cannot be solved with a bias; allowed: "
                               f"{', '.join(SOLVABLE_KINDS)}")
        if not any(lay.get("patterned") for lay in lib.layers):
            raise LibraryError(f"{where}: library has no patterned layer to bias")
        if self.harmonics is None and not self._recorded:
            raise LibraryError(f"{where}: library records no solver truncation (responses not built by metalay's "
                               "solver); give the bias solver's harmonics explicitly or use the nominal response")

    def _recorded_points(self) -> dict:
        solver = (self.library.provenance or {}).get("solver") or {}
        pts = ((solver.get("convergence") or {}).get("points")) or []
        out = {}
        for p in pts:
            try:
                out[(str(p["cell_id"]), round(float(p["wavelength_nm"]), 6))] = (int(p["harmonics_x"]),
                                                                                 int(p["harmonics_y"]))
            except (KeyError, TypeError, ValueError):
                continue
        return out

    def _harmonics_for(self, cell: int, wavelength_nm: float) -> tuple:
        if self.harmonics is not None:
            return self.harmonics
        rec = self._recorded
        key = (self.library.cells[cell].id, round(wavelength_nm, 6))
        if key not in rec:
            raise LibraryError(f"{self.library.source_path or self.library.name}: no recorded truncation for cell "
                               f"{key[0]} at {wavelength_nm:g} nm; give the bias solver's harmonics explicitly")
        return rec[key]

    def _wavelength_bracket(self, wavelength_nm: float):
        wl = np.asarray(self.library.wavelengths_nm, dtype=np.float64)
        lo, hi = float(wl[0]), float(wl[-1])
        if not (lo - 1e-9 <= wavelength_nm <= hi + 1e-9):
            raise LibraryError(f"{self.library.source_path or self.library.name}: wavelength_nm = "
                               f"{wavelength_nm:g} is outside the tabulated band [{lo:g}, {hi:g}] nm")
        if wl.size == 1:
            return (lo, lo), 0.0
        k = int(np.clip(np.searchsorted(wl, wavelength_nm) - 1, 0, wl.size - 2))
        f = float((wavelength_nm - wl[k]) / (wl[k + 1] - wl[k]))
        if abs(f) < 1e-12:
            return (float(wl[k]), float(wl[k])), 0.0
        if abs(f - 1) < 1e-12:
            return (float(wl[k + 1]), float(wl[k + 1])), 0.0
        return (float(wl[k]), float(wl[k + 1])), f

    def _bias_bracket(self, bias_nm: float):
        if not math.isfinite(bias_nm):
            raise LibraryError(f"bias_nm = {bias_nm!r}; allowed: a finite number")
        if self.bias_step_nm is None:
            return (float(bias_nm), float(bias_nm)), 0.0
        s = self.bias_step_nm
        k = math.floor(bias_nm / s + 1e-9)
        f = bias_nm / s - k
        if f < 1e-9:
            return (k * s, k * s), 0.0
        return (k * s, (k + 1) * s), float(f)

    def _key(self, cell: int, bias_nm: float, wavelength_nm: float) -> _Point:
        return _Point(int(cell), round(float(bias_nm), 9) + 0.0, round(float(wavelength_nm), 6),
                      self._harmonics_for(int(cell), float(wavelength_nm)))

    def _solve(self, todo: list) -> None:
        """Solve the missing points, one batched solver call per (wavelength, truncation)."""
        from metalay.cells.rcwa import solve

        groups: dict = {}
        for key in todo:
            groups.setdefault((key.wavelength_nm, key.harmonics), []).append(key)
        mode_t = self.library.mode == "transmission"
        for (wl, harm), keys in sorted(groups.items()):  # a few wavelengths x truncations
            stack = self._stack(keys, wl)
            res = solve(stack, np.full(len(keys), wl), harmonics=harm)
            jm = res.t_jones if mode_t else res.r_jones
            for n, key in enumerate(keys):
                val = (complex(jm[n, 0, 0]), complex(jm[n, 1, 1]))
                if self.library.cells[key.cell].kind == "round_pillar":  # isotropic: as the library build
                    avg = 0.5 * (val[0] + val[1])
                    val = (avg, avg)
                self._cache[key] = val
                self._solved += 1
                self._store(key, val)

    def _stack(self, keys: list, wavelength_nm: float):
        """Solver stack of the biased cells (batched over ``keys``), built as the library build builds it."""
        from metalay.cells.materials import get_material
        from metalay.cells.rcwa import Layer, Stack, ellipse_pattern, rect_pattern

        lib = self.library
        base = Path(lib.source_path).parent if lib.source_path else None
        b = len(keys)
        wl = np.full(b, wavelength_nm)

        def eps(name):
            return get_material(name, base_dir=base).epsilon(wl)

        p = float(lib.period_nm)
        dims = [biased_dims(lib.cells[k.cell], k.bias_nm) for k in keys]
        kinds = {lib.cells[k.cell].kind for k in keys}
        where = lib.source_path or lib.name
        for k, d in zip(keys, dims):
            if min(d.values()) <= 0 or max(d.values()) >= p:
                raise LibraryError(f"{where}: cell {lib.cells[k.cell].id} biased by {k.bias_nm:+g} nm measures "
                                   f"{' x '.join(f'{v:g}' for v in d.values())} nm; every size must lie in (0, "
                                   f"{p:g}) nm (the period)")
        n_stairs = int((lib.provenance.get("solver") or {}).get("n_stairs") or 12)
        layers = []
        for lay in lib.layers:
            if lay.get("patterned"):
                e_in, e_out = eps(lay["material"]), eps(lay.get("background", "air"))
                if kinds <= {"nanofin", "slot"}:
                    pat = rect_pattern([d["length_nm"] for d in dims], [d["width_nm"] for d in dims], e_in, e_out,
                                       p, p)
                elif kinds <= {"elliptic_pillar", "round_pillar"}:
                    major = [d.get("major_nm", d.get("diameter_nm")) for d in dims]
                    minor = [d.get("minor_nm", d.get("diameter_nm")) for d in dims]
                    pat = ellipse_pattern(major, minor, e_in, e_out, p, p, n_stairs=n_stairs)
                else:
                    raise LibraryError(f"{where}: mixed cell kinds {sorted(kinds)} in one library")
                layers.append(Layer(float(lay["thickness_nm"]), pat))
            else:
                layers.append(Layer(float(lay["thickness_nm"]), eps(lay["material"])))
        return Stack(eps(lib.incident_medium), tuple(layers), eps(lib.exit_medium), p, p)

    # persistent cache ----------------------------------------------------------------------------------------

    def _key_text(self, key: _Point) -> str:
        lib = self.library
        return json.dumps({"library_sha256": lib.sha256, "cell": lib.cells[key.cell].id, "bias_nm": key.bias_nm,
                           "wavelength_nm": key.wavelength_nm, "harmonics": list(key.harmonics),
                           "mode": lib.mode}, sort_keys=True)

    def _path(self, key: _Point) -> Path | None:
        if self.cache_dir is None:
            return None
        digest = hashlib.sha256(self._key_text(key).encode()).hexdigest()[:32]
        return self.cache_dir / f"{self.library.name}-{digest}.json"

    def _load(self, key: _Point):
        """A cached point, or None when absent, unreadable, too large or for another key."""
        path = self._path(key)
        if path is None or not path.is_file():
            return None
        try:
            if path.stat().st_size > _CACHE_MAX_BYTES:
                return None
            doc = json.loads(path.read_text(encoding="utf-8"))
            if doc.get("format") != _CACHE_FORMAT or doc.get("key") != json.loads(self._key_text(key)):
                return None
            tl = complex(float(doc["t_long"][0]), float(doc["t_long"][1]))
            ts = complex(float(doc["t_short"][0]), float(doc["t_short"][1]))
        except (OSError, ValueError, TypeError, KeyError, IndexError, AttributeError):
            return None
        if not all(math.isfinite(v) for v in (tl.real, tl.imag, ts.real, ts.imag)):
            return None
        return tl, ts

    def _store(self, key: _Point, val) -> None:
        path = self._path(key)
        if path is None:
            return
        from metalay.util.atomic import atomic_write_bytes

        doc = {"format": _CACHE_FORMAT, "format_version": 1, "key": json.loads(self._key_text(key)),
               "t_long": [val[0].real, val[0].imag], "t_short": [val[1].real, val[1].imag]}
        atomic_write_bytes(path, (json.dumps(doc, sort_keys=True) + "\n").encode())
