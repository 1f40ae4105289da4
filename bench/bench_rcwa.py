"""Benchmark and convergence study of metalay.cells.rcwa against grcwa (test-only reference), same cell, same run.

Cell: TiO2-like nanofin (n = 2.45), 250 x 85 nm, 600 nm tall, 325 nm square period, light from fused silica
(n = 1.4607) into air, 532 nm, normal incidence (the bundled visible library's stack).

Usage::

    .venv/bin/python bench/bench_rcwa.py                 # timings + 20 x 20 sweep + grcwa ratio
    .venv/bin/python bench/bench_rcwa.py --plot docs/rcwa-convergence.png   # also the convergence study + plot

Prints seconds and ratios measured in the same run (times vary +-30 % between runs on a shared machine).
"""

from __future__ import annotations

import argparse
import io
import os
import sys
import time
from pathlib import Path

# One BLAS thread for both codes: on a shared 2-core machine, multi-threaded OpenBLAS on ~250x250 matrices
# oversubscribes the cores and runs several times slower (measured). Override with BENCH_BLAS_THREADS.
os.environ.setdefault("OPENBLAS_NUM_THREADS", os.environ.get("BENCH_BLAS_THREADS", "1"))

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from metalay.cells.rcwa import Layer, Stack, rect_pattern, solve  # noqa: E402

WL, P, H = 532.0, 325.0, 600.0
EPS_FIN, EPS_SUB = 2.45**2, 1.4607**2


def ours(length, width, m, factorization="li"):
    length, width = np.atleast_1d(length).astype(float), np.atleast_1d(width).astype(float)
    st = Stack(np.array([EPS_SUB]), (Layer(H, rect_pattern(length, width, EPS_FIN, 1.0, P, P)),), np.array([1.0]), P, P)
    t = solve(st, WL, harmonics=(m, m), factorization=factorization).t_jones
    return t[:, 0, 0], t[:, 1, 1]


def grcwa_fin(length, width, m, ng=512):
    """grcwa zeroth-order E_x / E_y in air for p / s input, normalised by the same stack without the fin."""
    import grcwa

    grcwa.set_backend("numpy")

    def run(eps_in):
        obj = grcwa.obj((2 * m + 1) ** 2, [P / 1000, 0], [0, P / 1000], 1000 / WL, 0.0, 0.0, verbose=0)
        obj.Add_LayerUniform(0.1, EPS_SUB)
        obj.Add_LayerGrid(H / 1000, ng, ng)
        obj.Add_LayerUniform(0.1, 1.0)
        obj.Init_Setup(Gmethod=1)
        x = (np.arange(ng) + 0.5) / ng * P - P / 2
        xx, yy = np.meshgrid(x, x, indexing="ij")
        obj.GridLayer_geteps(np.where((np.abs(xx) < length / 2) & (np.abs(yy) < width / 2), eps_in, 1.0).ravel())
        out = []
        for pa, sa, comp in ((1, 0, 0), (0, 1, 1)):
            obj.MakeExcitationPlanewave(pa, 0, sa, 0, order=0)
            e, _ = obj.Solve_FieldFourier(2, 0.0)
            out.append(e[comp][0])
        return np.array(out)

    return run(EPS_FIN)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--m", type=int, default=5, help="harmonics per axis for the sweep (default 5)")
    ap.add_argument("--grcwa-count", type=int, default=40, help="sweep geometries also timed with grcwa")
    ap.add_argument("--plot", type=Path, help="write the convergence plot (PNG) here")
    args = ap.parse_args()

    print(f"OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}")
    print("single solve, TiO2 fin 250 x 85 nm (both polarisations), best of 3 s, and |t| error vs (12, 12):")
    ref_l, ref_s = ours(250.0, 85.0, 12)
    for m in (3, 4, 5, 6, 8):
        times = []
        for _ in range(3):
            t0 = time.perf_counter()
            tl, ts = ours(250.0, 85.0, m)
            times.append(time.perf_counter() - t0)
        dt = min(times)
        err = max(abs(abs(tl[0]) - abs(ref_l[0])), abs(abs(ts[0]) - abs(ref_s[0])))
        print(f"  harmonics ({m},{m}) N={(2*m+1)**2:4d}: {dt:7.3f} s   max | |t| - |t_ref| | = {err:.1e}")

    lengths = np.linspace(150.0, 290.0, 20)
    widths = np.linspace(60.0, 140.0, 20)
    ll, ww = [a.ravel() for a in np.meshgrid(lengths, widths, indexing="ij")]
    t0 = time.perf_counter()
    ours(ll, ww, args.m)
    t_sweep = time.perf_counter() - t0
    print(f"20 x 20 sweep at ({args.m},{args.m}) harmonics, one wavelength, metalay.cells.rcwa: {t_sweep:.1f} s "
          f"({t_sweep / ll.size * 1000:.0f} ms per geometry)")
    n = min(args.grcwa_count, ll.size)
    try:
        t0 = time.perf_counter()
        for i in range(n):
            grcwa_fin(ll[i], ww[i], args.m)
        t_g = (time.perf_counter() - t0) / n
        ours_per = t_sweep / ll.size
        print(f"grcwa, same cell and truncation ({(2*args.m+1)**2} harmonics, Gmethod=1, 512x512 grid), "
              f"{n} geometries: {t_g * 1000:.0f} ms per geometry -> 400 geometries ~{t_g * 400:.0f} s; "
              f"ratio grcwa / metalay = {t_g / ours_per:.2f}")
    except ImportError:
        print("grcwa not installed: no ratio")

    if args.plot:
        study(args.plot)


def study(png: Path):
    """Error of the zeroth-order t_short (field across the fin, the slow one) versus the number of harmonics."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ms_ours = [2, 3, 4, 5, 6, 7, 8, 9, 10]
    ms_grcwa = [2, 3, 4, 5, 6, 7, 8, 9, 10]
    ref_l, ref_s = ours(250.0, 85.0, 14)
    rows = []
    for m in ms_ours:
        tl, ts = ours(250.0, 85.0, m)
        la_l, la_s = ours(250.0, 85.0, m, "laurent")
        rows.append((m, abs(tl[0] - ref_l[0]), abs(ts[0] - ref_s[0]), abs(la_l[0] - ref_l[0]), abs(la_s[0] - ref_s[0])))
        print(f"  m={m}: li |dt_long|={rows[-1][1]:.1e} |dt_short|={rows[-1][2]:.1e}  laurent {rows[-1][3]:.1e} "
              f"{rows[-1][4]:.1e}")
    # grcwa's absolute phase reference differs; compare the reference-free ratio t_short / t_long
    ratio_ref = ref_s[0] / ref_l[0]
    g_err = []
    for m in ms_grcwa:
        g = grcwa_fin(250.0, 85.0, m)
        g_err.append(abs(g[1] / g[0] - ratio_ref))
        print(f"  grcwa m={m}: |d(t_short/t_long)| = {g_err[-1]:.1e}")
    li_ratio = [abs(ours(250.0, 85.0, m)[1][0] / ours(250.0, 85.0, m)[0][0] - ratio_ref) for m in ms_ours]
    nh = lambda ms: [(2 * m + 1) ** 2 for m in ms]  # noqa: E731
    fig, ax = plt.subplots(figsize=(6, 4.2), dpi=110)
    r = np.array(rows)
    ax.semilogy(nh(ms_ours), r[:, 2], "o-", label="metalay (Li factorisation): |t_short - ref|")
    ax.semilogy(nh(ms_ours), r[:, 4], "s--", label="metalay, Laurent rule: |t_short - ref|")
    ax.semilogy(nh(ms_ours), li_ratio, "o-", label="metalay (Li): |t_s/t_l - ref|")
    ax.semilogy(nh(ms_grcwa), g_err, "^-", label="grcwa: |t_s/t_l - ref|")
    ax.set_xlabel("number of harmonics (2M+1)^2")
    ax.set_ylabel("error vs metalay (Li) at M = 14")
    ax.set_title("TiO2 fin 250x85x600 nm, period 325 nm, 532 nm")
    ax.legend(fontsize=7)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    png.parent.mkdir(parents=True, exist_ok=True)
    png.write_bytes(buf.getvalue())
    print(f"wrote {png}")


if __name__ == "__main__":
    main()
