"""Log-polar sorter study: spot positions, spacing against the linear relation and crosstalk, with and without
fan-out copies, for an invented example element (532 nm, 325 nm lattice, 300 um input).

Run:  .venv/bin/python bench/sorter_study.py [--diameter-um 300] [--charges 5] [--sample-um 1.0]

Prints, for each configuration, the measured spot positions, the least-squares slope against
lambda F / (2 pi a) (Berkhout et al. 2010), the fraction of each state's detected power in its own window, the
neighbour leakage, the detected fraction of the input power and the time.  Configurations: corrector amplitude
2 and 4 waves (ring beam), LG beams, and 3 copies (O'Sullivan et al. 2012 copier).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from metalay.measure import sorter  # noqa: E402

LAM = 532.0


def run(name, design, charges, beam, sample_um):
    t0 = time.perf_counter()
    chk = sorter.sorter_check(design, charges=charges, beam=beam, sample_um=sample_um, max_side=4096)
    dt = time.perf_counter() - t0
    c = chk.charges
    adj = [chk.crosstalk[i, i + 1] for i in range(c.size - 1)] + [chk.crosstalk[i + 1, i] for i in range(c.size - 1)]
    err = np.abs(chk.positions_um - chk.predicted_um)
    print(f"\n== {name} ({beam} beam, {design.n_copies} copies, f = {design.focal_length_mm:.3f} mm, "
          f"F = {design.fourier_focal_length_mm:.3f} mm, corrector {design.corrector_waves:.2f} waves, "
          f"grid {chk.grid_side}, {dt:.1f} s)")
    print("positions um  ", np.round(chk.positions_um, 2).tolist())
    print(f"slope {chk.slope_um:.4f} um per unit charge vs lambda F/(2 pi a) = {chk.predicted_slope_um:.4f} "
          f"({100 * (chk.slope_um / chk.predicted_slope_um - 1):+.3f} %); worst position error {err.max():.3f} um "
          f"({100 * err.max() / abs(chk.predicted_slope_um):.2f} % of a spacing)")
    print("own window    ", np.round(chk.diagonal, 3).tolist())
    print(f"neighbour leakage {min(adj):.3f}..{max(adj):.3f}; detected fraction of input "
          f"{chk.detected.min():.3f}..{chk.detected.max():.3f}")
    return chk


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--diameter-um", type=float, default=300.0)
    ap.add_argument("--charges", type=int, default=5, help="charges -N..N")
    ap.add_argument("--sample-um", type=float, default=1.0)
    args = ap.parse_args(argv)
    charges = range(-args.charges, args.charges + 1)
    kw = {"wavelength_nm": LAM, "spot_spacing_um": 20.0, "period_nm": 325.0}
    d4 = sorter.sorter_parameters(args.diameter_um, **kw)
    d2 = sorter.sorter_parameters(args.diameter_um, min_waves=2.0, max_ray_angle_deg=30.0, **kw)
    print(f"sinc^2 reference: {sorter.window_fraction_sinc2(0.5):.4f} of a uniform strip's power in one spacing "
          f"({sorter.window_fraction_sinc2(0.5) / sorter.window_fraction_sinc2(args.charges + 0.5):.4f} of what "
          f"the {len(charges)} windows collect); 3 copies: {sorter.window_fraction_sinc2(1.5):.4f}")
    run("corrector 4 waves", d4, charges, "ring", args.sample_um)
    run("corrector 2 waves", d2, charges, "ring", args.sample_um)
    run("corrector 4 waves", d4, charges, "lg", args.sample_um)
    run("3 copies", sorter.sorter_parameters(args.diameter_um, n_copies=3, **kw), charges, "ring", args.sample_um)


if __name__ == "__main__":
    main()
