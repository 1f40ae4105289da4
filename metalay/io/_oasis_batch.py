"""Runs of plain POLYGON records parsed together: the fast path of :mod:`metalay.io.oasis_read`'s parser.

A flat mask as metalay writes it is a long run of POLYGON records (point list, position, repetition) inside each
CBLOCK. Parsed one record at a time, each costs tens of microseconds of Python; here a run of them is parsed with
numpy over the region's :class:`~metalay.io._oasis_codec.VarintTable`, with no Python per record beyond following
the chain of record starts:

1. Candidates: every integer of a stretch of the region that could begin a POLYGON record (the value 21 as one
   byte, then a one-byte info byte with the point list bit) is parsed as if it did (fields, run spans, lattice
   sizes), all at once; a candidate that would break any rule of the record-by-record parser is marked.
2. Chain: from the record at hand, each record's end is the next record's start; the run ends at the first start
   that is not a sound candidate.
3. Checks: the runs (point lists, explicit repetitions) are decoded together and every check of the record-by-record
   parser is made (integer sizes, coordinate limits, element and vertex limits, memory admission). The run is cut
   just before the first record that fails one: that record is then parsed by the record-by-record parser, which
   raises its own one-line error. So the fast path never raises, and a file gives the same result and the same
   error as without it.

What is kept of a run is a :class:`Batch` (the kept records' decoded point lists and repetitions, a bounded piece
of the region) that is expanded into polygons like the queued records of the record-by-record parser.

References
----------
SEMI P39, OASIS - Open Artwork System Interchange Standard: POLYGON record, point lists, repetitions.
"""

from __future__ import annotations

import numpy as np

from metalay.io import _oasis_codec as oc

__all__ = ["Batch", "parse_run", "MAX_RECORDS", "MAX_VALUES"]

MAX_RECORDS = 4096
"""Records parsed together at most (the streamed read drains its queue every few thousand records)."""
MAX_VALUES = 1 << 20
"""Integers of point lists and repetitions decoded together at most (bounds the decoded arrays)."""
_FIRST_STRETCH = 1 << 12
_LAST_STRETCH = 1 << 20
_LIMIT = float(oc.COORD_LIMIT)
_SAFE = _LIMIT * (1.0 - 1e-6)  # float sums closer than this to the limit are left to the exact parser
_I64 = np.int64


class Batch:
    """Kept POLYGON records of one run, decoded: polygon ``(r, i)`` has the vertices ``pts[r] + (x[r], y[r]) +
    offset_i(r)``; ``offset_i`` from the explicit offsets or the lattice ``(i % nx) a + (i // nx) b``.

    Attributes
    ----------
    layer, datatype : ndarray (R,) int64
    rows : ndarray (R,) int64
        Vertices of each record's polygon.
    pts : ndarray (sum rows, 2) int64
        Point lists back to back (each begins at (0, 0)).
    xy : ndarray (R, 2) int64
        Record positions.
    n_pos : ndarray (R,) int64
        Positions of each record (1 without a repetition).
    nx, lat : ndarray (R,) int64, (R, 4) int64
        Lattice width and steps ``(ax, ay, bx, by)`` (``nx`` 0: explicit offsets or none).
    off, off_start : ndarray (M, 2) int64, ndarray (R,) int64
        Explicit offsets back to back and where each record's begin (-1: none).
    """

    def __init__(self, **arrays):
        self.__dict__.update(arrays)

    def vertices(self) -> int:
        return int((self.n_pos * self.rows).sum())


# ----------------------------------------------------------------------------------------------------------------
# Candidates
# ----------------------------------------------------------------------------------------------------------------

class _Reader:
    """Reads the integer at segment ``j`` of many candidates at once, marking those that run out of the table."""

    def __init__(self, t, ok, big_run: int):
        self.t, self.ok, self.n, self.big_run = t, ok, t.n, big_run
        self.V = t.V

    def at(self, j) -> np.ndarray:
        self.ok &= j < self.n
        return self.V[np.minimum(j, self.n - 1)].astype(_I64)

    def sint(self, j) -> np.ndarray:
        u = self.at(j)
        return np.where(u & 1, -(u >> 1), u >> 1)

    def gdelta(self, j, sel):
        """One g-delta at segment ``j`` of the candidates ``sel``: (dx, dy, segments used)."""
        u = self.at(np.where(sel, j, 0))
        form2 = (u & 1) == 1
        d = (u >> 1) & 7
        m = u >> 4
        v2 = self.at(np.where(sel & form2, j + 1, 0))
        mx = u >> 2
        dx = np.where(form2, np.where(u & 2, -mx, mx), oc._DIR8_X[d] * m)
        dy = np.where(form2, np.where(v2 & 1, -(v2 >> 1), v2 >> 1), oc._DIR8_Y[d] * m)
        self.ok &= ~sel | ((np.abs(dx) <= oc.COORD_LIMIT) & (np.abs(dy) <= oc.COORD_LIMIT))
        return dx, dy, 1 + form2

    def g_span(self, k0, count, sel):
        """Vectorised :meth:`VarintTable.g_span` for the candidates ``sel``: (n_local, g0, n_global, end segment)."""
        t, n = self.t, self.n
        k0, count = np.where(sel, k0, 0), np.where(sel, count, 1)
        ok = (k0 < n) & (count > 0)
        k0c = np.minimum(k0, n - 1)
        e0 = t.NE[k0c]
        n_local = np.minimum(count, (e0 - k0c) // 2 + 1)
        n_global = count - n_local
        g0 = t.PH[np.minimum(e0 + 1, n)]
        gh = t.GH if t.GH.shape[0] else np.zeros(1, _I64)
        need = n_global > 0
        ok &= ~need | (g0 + n_global <= t.GH.shape[0])
        last = np.where(need, gh[np.clip(g0 + n_global - 1, 0, gh.shape[0] - 1)], k0c + 2 * (n_local - 1))
        odd = (self.V[np.minimum(last, n - 1)] & np.uint64(1)).astype(bool) & (last < n)
        end = last + 1 + odd
        self.ok &= ~sel | (ok & (end <= n))
        return n_local, g0, n_global, end


def _candidates(t, k_lo: int, k_hi: int, big_run: int) -> dict:
    """Every segment in [k_lo, k_hi) that could begin a plain POLYGON record, parsed as if it did."""
    n = t.n
    w = t.V[k_lo:k_hi]
    c = k_lo + np.flatnonzero(w == 21)
    c = c[c + 1 < n]
    info = t.V[c + 1].astype(_I64)
    one = (t.T[c + 1] - t.T[c] == 1) & (t.T[c] - np.where(c > 0, t.T[np.maximum(c - 1, 0)], -1) == 1)
    c = c[(info < 64) & ((info & 0x20) != 0) & one]
    info = t.V[c + 1].astype(_I64)
    rd = _Reader(t, np.ones(c.shape[0], bool), big_run)
    j = c + 2
    f = {"c": c, "info": info}
    for bit, name in ((1, "layer"), (2, "datatype")):
        has = (info & bit) != 0
        f[name] = np.where(has, rd.at(np.where(has, j, c)), -1)
        rd.ok &= f[name] <= 2 ** 31 - 1
        j = j + has
    _point_list(rd, f, j)
    j = f.pop("j")
    for bit, name in ((0x10, "x"), (0x08, "y")):
        has = (info & bit) != 0
        f[name] = np.where(has, rd.sint(np.where(has, j, c)), 0)
        f["has_" + name] = has
        rd.ok &= np.abs(f[name]) <= oc.COORD_LIMIT
        j = j + has
    _repetition(rd, f, j, (info & 0x04) != 0)
    bad = t.PB[np.minimum(f["end"], n)] - t.PB[c]  # an integer of 2**63 or more anywhere in the record
    f["ok"] = rd.ok & (bad == 0)
    return f


def _point_list(rd: _Reader, f: dict, j) -> None:
    """Point list fields: type, count, the run's location; its rows (with the implied vertex of types 0 and 1)."""
    pt = rd.at(j)
    npts = rd.at(j + 1)
    implied = (pt <= 1).astype(_I64)
    rd.ok &= (pt <= 5) & (npts >= 1) & (npts <= rd.big_run) & (npts + 1 + implied >= 3)
    k0 = j + 2
    g = pt >= 4
    nl, g0, ng, gend = rd.g_span(k0, npts, g)
    end = np.where(g, gend, k0 + npts)
    rd.ok &= end <= rd.n
    f.update(pt=pt, npts=npts, implied=implied, pk0=k0, pnl=nl, pg0=g0, png=ng, rows=npts + 1 + implied, j=end)


def _repetition(rd: _Reader, f: dict, j, has) -> None:
    """Repetition fields of the candidates with the R bit: type, lattice or the explicit run's location."""
    z = np.zeros(j.shape[0], _I64)
    rt = np.where(has, rd.at(np.where(has, j, f["c"])), -1)
    rd.ok &= (rt != 0) & (rt <= 11)  # type 0 (reuse) is left to the record-by-record parser
    v1, v2 = rd.at(np.where(has, j + 1, f["c"])), rd.at(np.where(has, j + 2, f["c"]))
    nx, ny = np.where(has, 1, 0), np.where(has, 1, 0)
    lat = np.zeros((j.shape[0], 4), _I64)
    end = j + has
    for t_, sel in ((1, rt == 1), (2, rt == 2), (3, rt == 3)):
        if not sel.any():
            continue
        if t_ == 1:
            v3, v4 = rd.at(np.where(sel, j + 3, f["c"])), rd.at(np.where(sel, j + 4, f["c"]))
            nx, ny = np.where(sel, v1 + 2, nx), np.where(sel, v2 + 2, ny)
            lat[sel, 0], lat[sel, 3] = v3[sel], v4[sel]
            rd.ok &= ~sel | ((v3 <= oc.COORD_LIMIT) & (v4 <= oc.COORD_LIMIT))
            end = np.where(sel, j + 5, end)
        else:
            nx = np.where(sel, v1 + 2 if t_ == 2 else 1, nx)
            ny = np.where(sel, 1 if t_ == 2 else v1 + 2, ny)
            lat[sel, 0 if t_ == 2 else 3] = v2[sel]
            rd.ok &= ~sel | (v2 <= oc.COORD_LIMIT)
            end = np.where(sel, j + 3, end)
    for t_, sel in ((8, rt == 8), (9, rt == 9)):
        if not sel.any():
            continue
        q = j + (3 if t_ == 8 else 2)
        ax, ay, sa = rd.gdelta(q, sel)
        nx = np.where(sel, v1 + 2, nx)
        ny = np.where(sel, v2 + 2 if t_ == 8 else 1, ny)
        lat[sel, 0], lat[sel, 1] = ax[sel], ay[sel]
        q = q + sa
        if t_ == 8:
            bx, by, sb = rd.gdelta(q, sel)
            lat[sel, 2], lat[sel, 3] = bx[sel], by[sel]
            q = q + sb
        end = np.where(sel, q, end)
    _explicit(rd, f, j, rt, v1, v2, z)
    end = np.where(f["rk0"] >= 0, f["rend"], end)
    lattice = has & (rt <= 3) | (rt == 8) | (rt == 9)
    nxf, nyf = nx.astype(np.float64), ny.astype(np.float64)
    reach = (nxf - 1) * np.abs(lat[:, :2]).sum(1) + (nyf - 1) * np.abs(lat[:, 2:]).sum(1)
    rd.ok &= ~lattice | ((reach <= _SAFE) & (nxf * nyf < 2.0 ** 52) & (nx >= 1) & (ny >= 1))
    explicit = f["rk0"] >= 0
    f.update(rt=rt, nx=np.where(lattice, nx, 0), lat=lat, end=end,
             n_pos=np.where(explicit, f["rcount"] + 1, np.where(lattice, nx * ny, 1)))


def _explicit(rd: _Reader, f: dict, j, rt, v1, v2, z) -> None:
    """Explicit repetitions (types 4-7, 10, 11): count, grid and the run's location (``rk0`` -1 when none)."""
    ex = (rt >= 4) & (rt <= 7) | (rt == 10) | (rt == 11)
    grid_t = (rt == 5) | (rt == 7) | (rt == 11)
    count = np.where(ex, v1 + 1, 1)  # n - 1 deltas, n = v1 + 2
    grid = np.where(grid_t, v2, 1)
    rd.ok &= ~ex | ((count <= rd.big_run) & (grid <= oc.COORD_LIMIT))
    k0 = np.where(ex, j + 2 + grid_t, -1)
    g = rt >= 10
    nl, g0, ng, gend = rd.g_span(k0, count, g)
    end = np.where(g, gend, k0 + count)
    rd.ok &= ~ex | (end <= rd.n)
    f.update(rk0=k0, rcount=np.where(ex, count, 0), rgrid=grid, rnl=nl, rg0=g0, rng=ng, rend=end)


# ----------------------------------------------------------------------------------------------------------------
# Chain of records
# ----------------------------------------------------------------------------------------------------------------

def _chain(t, k: int, budget: int, big_run: int) -> tuple:
    """Candidate fields of the sound records chained from segment ``k`` (at most ``budget`` records, about
    :data:`MAX_VALUES` integers), and the segment after the last."""
    picked, stretch = [], _FIRST_STRETCH
    taken = values = 0
    while taken < budget and values < MAX_VALUES and k < t.n:
        hi = min(t.n, k + stretch)
        f = _candidates(t, k, hi, big_run)
        c, end, ok = f["c"].tolist(), f["end"].tolist(), f["ok"].tolist()
        where = dict(zip(c, range(len(c))))
        idx = []
        while taken + len(idx) < budget:
            i = where.get(k)
            if i is None or not ok[i]:
                break
            idx.append(i)
            k = end[i]
        if idx:
            sel = np.array(idx)
            picked.append({name: a[sel] for name, a in f.items()})
            taken += len(idx)
            values += int(picked[-1]["end"][-1] - picked[-1]["c"][0])
        if not idx or k < hi:  # an unsound record, a start that is no candidate, or the budget
            break
        stretch = min(2 * stretch, _LAST_STRETCH)
    if not picked:
        return None, k
    if len(picked) == 1:
        return picked[0], k
    return {name: np.concatenate([p[name] for p in picked]) for name in picked[0]}, k


# ----------------------------------------------------------------------------------------------------------------
# Runs decoded and checked
# ----------------------------------------------------------------------------------------------------------------

def _deltas(t, g, mode, k0, nl, g0, ng, count) -> tuple:
    """Deltas of located runs back to back (g-delta runs where ``g``, else integer runs of ``mode`` 0-3 or 4/5 for
    the x/y spaces of repetition types 4-7), and per run whether a space is beyond the coordinate limit."""
    d = np.empty((int(count.sum()), 2), _I64)
    row0 = np.cumsum(count) - count
    big = np.zeros(count.shape[0], bool)
    for sel in (g, ~g):
        if not sel.any():
            continue
        cs = count[sel]
        rows = np.repeat(row0[sel] - (np.cumsum(cs) - cs), cs) + np.arange(int(cs.sum()))
        if sel is g:
            d[rows] = t.gdeltas(k0[sel], nl[sel], g0[sel], ng[sel])
            continue
        v = t.values(k0[sel], cs)
        md = np.repeat(mode[sel], cs)
        j = np.arange(v.shape[0]) - np.repeat(np.cumsum(cs) - cs, cs)
        du = np.zeros((v.shape[0], 2), _I64)
        mag = (v >> np.uint64(1)).astype(_I64)
        sv = np.where((v & np.uint64(1)) != 0, -mag, mag)
        axis = (j + md) & 1
        alt = md <= 1
        du[alt & (axis == 0), 0] = sv[alt & (axis == 0)]
        du[alt & (axis == 1), 1] = sv[alt & (axis == 1)]
        for m, bits in ((2, 2), (3, 3)):
            s = md == m
            if s.any():
                w = v[s]
                dirn = (w & np.uint64((1 << bits) - 1)).astype(_I64)
                mg = (w >> np.uint64(bits)).astype(_I64)
                du[s, 0], du[s, 1] = oc._DIR8_X[dirn] * mg, oc._DIR8_Y[dirn] * mg
        far = (v > np.uint64(oc.COORD_LIMIT)) & (md >= 4)
        big[np.flatnonzero(sel)] = np.add.reduceat(far, np.cumsum(cs) - cs) > 0
        v = np.minimum(v, np.uint64(oc.COORD_LIMIT)).astype(_I64)
        du[md == 4, 0] = v[md == 4]
        du[md == 5, 1] = v[md == 5]
        d[rows] = du
    return d, big


def _sums(d: np.ndarray, count: np.ndarray) -> tuple:
    """Cumulative sums of each run of deltas from zero, and per run whether a partial sum comes near the limit
    (the float test of ``oasis_read._seg_cumsum``, with a margin: such runs are the exact parser's)."""
    starts = np.cumsum(count) - count
    df = d.astype(np.float64)
    tf = np.add.reduceat(df, starts, axis=0)
    df[starts[1:]] -= tf[:-1]
    cf = np.abs(np.cumsum(df, axis=0)).max(axis=1)
    near = np.maximum.reduceat(cf, starts) > _SAFE
    if near.any():  # runs after the first one near the limit are not used: keep their sums from wrapping
        cut = int(starts[int(np.argmax(near))])
        d = d.copy()
        d[cut:] = 0
    tot = np.add.reduceat(d, starts, axis=0)
    d2 = d.copy()
    d2[starts[1:]] -= tot[:-1]
    return np.cumsum(d2, axis=0), near


def _decode(t, f: dict, rec: np.ndarray, point_lists: bool) -> tuple:
    """Point lists (``point_lists``) or explicit repetitions of the records ``rec``: the values back to back with
    their first row (0, 0) (point lists also with their implied vertex), and per record whether it fails a check."""
    if point_lists:
        g, mode, k0, nl, g0, ng = (f["pt"] >= 4), f["pt"], f["pk0"], f["pnl"], f["pg0"], f["png"]
        count, grid = f["npts"], np.ones_like(f["npts"])
    else:
        rt = f["rt"]
        g, mode, k0, nl, g0, ng = rt >= 10, np.where(rt <= 5, 4, 5), f["rk0"], f["rnl"], f["rg0"], f["rng"]
        count, grid = f["rcount"], f["rgrid"]
    g, mode, k0, nl, g0, ng, count, grid = (a[rec] for a in (g, mode, k0, nl, g0, ng, count, grid))
    if rec.shape[0] == 0:
        return np.zeros((0, 2), _I64), np.zeros(0, _I64), np.zeros(0, bool)
    d, bad = _deltas(t, g, mode, k0, nl, g0, ng, count)
    gr = np.repeat(grid, count)
    if (grid != 1).any():
        over = np.abs(d).max(axis=1).astype(np.float64) * gr > oc.COORD_LIMIT
        bad |= np.add.reduceat(over, np.cumsum(count) - count) > 0
        d = d * np.where(over, 0, gr)[:, None]
    double = g & (mode == 5) & point_lists
    if double.any():
        dd = np.repeat(double, count)
        d[dd], near = _sums(d[dd], count[double])
        bad[np.flatnonzero(double)] |= near
    pos, near = _sums(d, count)
    bad |= near
    implied = f["implied"][rec] if point_lists else np.zeros(rec.shape[0], _I64)
    rows = count + 1 + implied
    out = np.zeros((int(rows.sum()), 2), _I64)
    first = np.cumsum(rows) - rows
    dest = np.repeat(first + 1, count) + np.arange(pos.shape[0]) - np.repeat(np.cumsum(count) - count, count)
    out[dest] = pos
    if implied.any():  # the implied vertex brings the coordinate of the next (missing) delta back to zero
        last = (first + rows - 1)[implied == 1]
        out[last] = out[last - 1]
        axis = ((count + mode) & 1)[implied == 1]
        out[last, axis] = 0
    return out, first, bad


# ----------------------------------------------------------------------------------------------------------------
# A run of records into the parser's state
# ----------------------------------------------------------------------------------------------------------------

def parse_run(p, cur, at: int, t) -> tuple:
    """Parse the plain POLYGON records from byte ``at`` (a record start, an integer boundary of the table ``t``)
    into the parser ``p``: modal variables, counts, admission, the kept records as a :class:`Batch` queued in
    ``p.entries``. Returns (records taken, byte after the last); (0, ``at``) when it takes none."""
    f, _ = _chain(t, t.index(at), MAX_RECORDS, p.big_run)
    if f is None:
        return 0, at
    m = p.m
    n = f["c"].shape[0]
    lay, cut = _modal_fill(f["layer"], m.layer, n)
    dt, cut2 = _modal_fill(f["datatype"], m.datatype, n)
    x, y, n = _positions(f, m, min(n, cut, cut2))
    if n == 0:
        return 0, at
    keep = _keep(p, cur, at, lay[:n], dt[:n])
    need = keep.copy() if p.mode in ("whole", "geometry") else np.zeros(n, bool)
    need[n - 1] = True  # the last point list becomes the modal one
    last_rep = np.flatnonzero(f["rt"][:n] > 0)
    if last_rep.shape[0] and f["rk0"][last_rep[-1]] >= 0:
        need[last_rep[-1]] = True  # so does the last repetition
    # Checked by the survey, or no partial sum can reach the limit (the sum of the integers bounds every delta):
    # decode only what is used; else decode all and check.
    partial = p.mode in ("placements", "geometry") or _bounded(t, f, n)
    rec = np.flatnonzero(need) if partial else np.arange(n)
    pl, pl_first, bad_pl = _decode(t, f, rec, True)
    rrec = rec[f["rk0"][rec] >= 0]
    off, off_first, bad_rep = _decode(t, f, rrec, False)
    bad = np.zeros(n, bool)
    bad[rec] |= bad_pl
    bad[rrec] |= bad_rep
    taken = min(n, int(np.argmax(bad)) if bad.any() else n, _admitted(p, f, keep, n))
    if taken == 0 or (taken < n and not _modal_decoded(f, taken, rec, rrec)):
        return 0, at
    _commit(p, f, taken, lay, dt, x, y, keep, (rec, pl, pl_first), (rrec, off, off_first))
    return taken, t.end(int(f["end"][taken - 1]))


def _bounded(t, f: dict, n: int) -> bool:
    """Whether no point list or explicit repetition of the first ``n`` records can reach the coordinate limit: each
    delta is at most its integers' value (times the grid), so the sum of all the integers of the records bounds
    every partial sum (double-delta point lists excepted)."""
    if (f["pt"][:n] == 5).any():
        return False
    total = float(t.V[int(f["c"][0]):int(f["end"][n - 1])].sum(dtype=np.float64))
    return total * max(1, int(f["rgrid"][:n].max())) <= _SAFE


def _modal_decoded(f: dict, taken: int, rec: np.ndarray, rrec: np.ndarray) -> bool:
    """Whether the point list and the explicit repetition that stay modal after ``taken`` records were decoded."""
    if not np.isin(taken - 1, rec):
        return False
    last_rep = np.flatnonzero(f["rt"][:taken] > 0)
    return not (last_rep.shape[0] and f["rk0"][last_rep[-1]] >= 0 and not np.isin(last_rep[-1], rrec))


def _modal_fill(v: np.ndarray, incoming, n: int) -> tuple:
    """A modal integer along the run (-1 where the record omits it): its value at each record, and the first record
    that uses it undefined (``n`` if none)."""
    idx = np.maximum.accumulate(np.where(v >= 0, np.arange(n), -1))
    undefined = idx < 0
    if undefined.any() and incoming is None:
        return v, int(np.argmax(undefined))
    return np.where(undefined, -1 if incoming is None else incoming, v[np.maximum(idx, 0)]), n


def _positions(f: dict, m, n: int) -> tuple:
    """Record positions (absolute or relative mode) and the first record that would leave the coordinate limit."""
    out = []
    for name in ("x", "y"):
        v, has = f[name], f["has_" + name]
        start = getattr(m, "geometry_" + name)
        if m.relative:
            pos = start + np.cumsum(np.where(has, v, 0))
        else:
            idx = np.maximum.accumulate(np.where(has, np.arange(n), -1))
            pos = np.where(idx < 0, start, v[np.maximum(idx, 0)])
        far = np.abs(pos) > oc.COORD_LIMIT
        if far.any():
            n = min(n, int(np.argmax(far)))
        out.append(pos)
    return out[0][:n], out[1][:n], n


def _keep(p, cur, at: int, lay: np.ndarray, dt: np.ndarray) -> np.ndarray:
    """The parser's layer filter over the records (one call per distinct layer/datatype pair)."""
    pairs, inv = np.unique(np.stack([lay, dt], axis=1), axis=0, return_inverse=True)
    kept = np.array([p.keep(cur, at, int(a), int(b)) for a, b in pairs], bool)
    return kept[inv.reshape(-1)]


def _admitted(p, f: dict, keep: np.ndarray, n: int) -> int:
    """Records that pass the parser's admission (element and vertex limits, memory in the whole read) after the
    counts of each, exactly as record-by-record; the first that would fail is left to the exact parser."""
    runs = 16.0 * (f["npts"][:n] + 2) + np.where(f["rk0"][:n] >= 0, 16.0 * (f["rcount"][:n] + 2), 0.0)
    counted = keep if p.mode in ("whole", "count") else np.zeros(n, bool)
    npos = f["n_pos"][:n].astype(np.float64)
    nv = npos * f["rows"][:n]
    tp = p.total_p + np.cumsum(np.where(counted, npos, 0.0))
    tv = p.total_v + np.cumsum(np.where(counted, nv, 0.0))
    fail = (nv > 2.0 ** 60) | (tp > p.max_elements * (1 - 1e-9) - 1) | (tv > p.max_vertices * (1 - 1e-9) - 1)
    if p.mode == "whole":
        rb = p.run_bytes + np.cumsum(runs)
        fail |= tp * p.poly_bytes + tv * p.vertex_bytes + rb > p.max_memory * (1 - 1e-9) - 1
    return int(np.argmax(fail)) if fail.any() else n


def _commit(p, f: dict, n: int, lay, dt, x, y, keep, pls, reps) -> None:
    """The first ``n`` records of the run into the parser: modal variables, counts, the kept ones as a Batch."""
    m = p.m
    rec, pl, pl_first = pls
    rrec, off, off_first = reps
    keep = keep[:n]
    rows = f["rows"][:n]
    n_pos = f["n_pos"][:n]
    kp = int(n_pos[keep].sum())
    kv = int((n_pos * rows)[keep].sum())
    p.run_bytes += int((16 * (f["npts"][:n] + 2)).sum() + (16 * (f["rcount"][:n] + 2))[f["rk0"][:n] >= 0].sum())
    if p.mode in ("whole", "count"):
        p.total_p += kp
        p.total_v += kv
    c = p.cell
    c.records["polygon"] = c.records.get("polygon", 0) + n
    m.layer, m.datatype = int(lay[n - 1]), int(dt[n - 1])
    m.geometry_x, m.geometry_y = int(x[n - 1]), int(y[n - 1])
    i = int(np.searchsorted(rec, n - 1))
    m.polygon_points = pl[pl_first[i]:pl_first[i] + rows[n - 1]].copy()
    with_rep = np.flatnonzero(f["rt"][:n] > 0)
    if with_rep.shape[0]:
        m.repetition = _repetition_object(f, int(with_rep[-1]), rrec, off, off_first)
    if p.mode == "count":
        c.own_p += kp
        c.own_v += kv
        return
    if p.mode == "placements" or not keep.any():
        return
    kr = np.flatnonzero(keep)
    pl_at = pl_first[np.searchsorted(rec, kr)]
    vidx = np.repeat(pl_at, rows[kr]) + np.arange(int(rows[kr].sum())) - np.repeat(np.cumsum(rows[kr]) - rows[kr],
                                                                                  rows[kr])
    has_off = f["rk0"][kr] >= 0
    o_at = np.full(kr.shape[0], -1, _I64)
    o_at[has_off] = off_first[np.searchsorted(rrec, kr[has_off])]
    p.entries.append((c, Batch(layer=lay[kr], datatype=dt[kr], rows=rows[kr], pts=pl[vidx],
                               xy=np.stack([x[kr], y[kr]], axis=1), n_pos=n_pos[kr], nx=f["nx"][kr],
                               lat=f["lat"][kr], off=off, off_start=o_at)))


def _repetition_object(f: dict, r: int, rrec, off, off_first) -> oc.Repetition:
    """The repetition of record ``r`` as the record-by-record parser makes it (the modal repetition)."""
    t = int(f["rt"][r])
    if f["rk0"][r] >= 0:
        i = int(np.searchsorted(rrec, r))
        lo = int(off_first[i])
        return oc.Repetition(t, explicit=off[lo:lo + int(f["rcount"][r]) + 1].copy())
    nx, lat = int(f["nx"][r]), [int(v) for v in f["lat"][r]]
    ny = int(f["n_pos"][r]) // nx
    return oc.Repetition(t, nx, ny, (lat[0], lat[1]), (lat[2], lat[3]))


# ----------------------------------------------------------------------------------------------------------------
# Expansion
# ----------------------------------------------------------------------------------------------------------------

def expand(b: Batch, chunk: int):
    """Yield the polygons of a batch as pieces ``(layer, datatype, counts, xy)`` of about ``chunk`` vertices, in
    record order then position order (a record with many positions a slice of positions at a time)."""
    nv = b.n_pos * b.rows
    r, n_rec = 0, b.rows.shape[0]
    while r < n_rec:
        if nv[r] > chunk:
            step = max(1, chunk // int(b.rows[r]))
            for lo in range(0, int(b.n_pos[r]), step):
                yield _polygons(b, np.array([r]), np.array([lo]), np.array([min(int(b.n_pos[r]), lo + step) - lo]))
            r += 1
            continue
        hi = r + max(1, int(np.searchsorted(np.cumsum(nv[r:]), chunk, side="right")))
        hi = min(hi, r + int(np.argmax(nv[r:] > chunk)) if (nv[r:] > chunk).any() else hi)
        recs = np.arange(r, hi)
        yield _polygons(b, recs, np.zeros(recs.shape[0], _I64), b.n_pos[recs])
        r = hi


def _polygons(b: Batch, recs: np.ndarray, lo: np.ndarray, count: np.ndarray) -> tuple:
    """Polygons ``lo[k] .. lo[k] + count[k]`` of the records ``recs``: vertex v of polygon (r, i) is
    ``pts[r][v] + xy[r] + offset_i(r)``."""
    rec = np.repeat(recs, count)
    i = np.arange(rec.shape[0]) - np.repeat(np.cumsum(count) - count - lo, count)
    shift = b.xy[rec]
    if (b.nx[recs] > 0).any():  # lattice offsets (zero steps for the other records)
        jj, ii = np.divmod(i, np.maximum(b.nx, 1)[rec])
        ab = b.lat[rec]
        shift += jj[:, None] * ab[:, 2:] + ii[:, None] * ab[:, :2]
    start = b.off_start[rec]
    ex = start >= 0
    if ex.all():  # every record with explicit offsets (as metalay writes a flat mask): no masked copies
        shift += b.off[start + i]
    elif ex.any():
        shift[ex] += b.off[start[ex] + i[ex]]
    rows = b.rows[rec]
    k = int(b.rows[0])
    if (b.rows == k).all():  # one vertex count (the common case): gather per polygon, broadcast over vertices
        out = b.pts.reshape(-1, k, 2)[rec]
        out += shift[:, None, :]
        out = out.reshape(-1, 2)
    else:
        first = np.cumsum(b.rows) - b.rows
        poly = np.repeat(np.arange(rec.shape[0]), rows)
        v = np.arange(poly.shape[0]) - np.repeat(np.cumsum(rows) - rows, rows)
        out = b.pts[first[rec][poly] + v] + shift[poly]
    return b.layer[rec].astype(np.int32), b.datatype[rec].astype(np.int32), rows, out
