"""Demultiplexer study: layouts, padding-free isolation before and after optimising the encoding.

Run:  .venv/bin/python bench/demux_study.py [--diameter-um 150] [--evaluations 1200]

Prints, for the bundled four-channel example's square layout and for ring layouts designed by
``metalay.measure.demux.design_ring_layout`` (4 and 5 channels, 532 nm, 325 nm square lattice as in tio2-nanofin-532):
worst row/column isolation and channel-power spread (direct sum at the channel directions) before and after
``optimise_multiplex``; the same element through the FFT route of ``optics.crosstalk_matrix`` at padding 2
and 8 (bilinear look-up), with the time ratio; the effect of quantising the phase to 16 levels; and the optimised
channels as a design-file snippet.  The layouts are invented examples of our own.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from metalay.checks import optics
from metalay.design.phase import Channel  # noqa: E402
from metalay.measure import demux  # noqa: E402

LAM, PERIOD = 532.0, 325.0


def _fft_isolation(chans, diameter_um, pad):
    x, y = demux.aperture_sites(diameter_um, PERIOD)
    p = PERIOD * 1e-3
    i, j = np.rint(x / p).astype(int), np.rint(y / p).astype(int)
    n = int(max(np.abs(i).max(), np.abs(j).max()))
    axis = np.arange(-n, n + 1) * p
    plan = demux.DemuxPlan(chans, x, y, wavelength_nm=LAM)
    e = plan.element_field([c.weight for c in chans], np.radians([c.offset_deg for c in chans]))
    field = np.zeros((axis.size, axis.size), np.complex64)
    field[j + n, i + n] = e
    near = optics.NearField(x_um=axis, y_um=axis, dx_um=p, dy_um=p, designed=field, other=0 * field,
                            converted=field, illuminated=np.abs(field) > 0, samples_per_site=1, decimation=1,
                            note="study")
    t0 = time.perf_counter()
    ct = optics.crosstalk_matrix(near, [(c.charge, *d) for c, d in zip(chans, plan.directions)], LAM,
                                 radius_u=0.005, pad_factor=pad)
    return ct["worst_isolation_db"], time.perf_counter() - t0


def _line(tag, rep):
    return (f"{tag:<8} worst row {rep.worst_isolation_db:6.2f} dB  worst column {rep.worst_column_isolation_db:6.2f} dB"
            f"  power spread {rep.power_spread_db:5.2f} dB  powers {np.round(rep.channel_power, 4).tolist()}")


def study(name, chans, diameter_um, evaluations):
    print(f"\n== {name}: charges {[c.charge for c in chans]}, azimuths {[c.azimuth_deg for c in chans]} deg, "
          f"{chans[0].angle_deg} deg, D = {diameter_um} um")
    clear = demux.layout_clearance(chans, wavelength_nm=LAM, aperture_diameter_um=diameter_um)
    print(f"product clearance (spot widths lambda/D): "
          f"{ {k: round(v, 2) for k, v in clear.min_distance_spots.items()} }, "
          f"min coordinate gap {clear.min_coordinate_gap_spots:.2f}")
    t0 = time.perf_counter()
    x, y = demux.aperture_sites(diameter_um, PERIOD)
    plan = demux.DemuxPlan(chans, x, y, wavelength_nm=LAM)
    t_plan = time.perf_counter() - t0
    t0 = time.perf_counter()
    before = demux.evaluate_multiplex(chans, wavelength_nm=LAM, aperture_diameter_um=diameter_um,
                                      period_nm=PERIOD, plan=plan)
    t_eval = time.perf_counter() - t0
    t0 = time.perf_counter()
    res = demux.optimise_multiplex(chans, wavelength_nm=LAM, aperture_diameter_um=diameter_um, period_nm=PERIOD,
                                   max_evaluations=evaluations, plan=plan)
    t_opt = time.perf_counter() - t0
    print(_line("before", before))
    print(_line("after", res.after) + f"   ({res.evaluations} evaluations, {t_opt:.1f} s)")
    for pad in (2, 8):
        iso, t_fft = _fft_isolation(res.channels, diameter_um, pad)
        print(f"same optimised element, FFT pad {pad} + bilinear (optics.crosstalk_matrix): worst row "
              f"{iso:6.2f} dB in {t_fft:.2f} s; direct sum {res.after.worst_isolation_db:6.2f} dB in {t_eval:.3f} s "
              f"(+ plan {t_plan:.2f} s once): ratio FFT/direct {t_fft / t_eval:.0f}x")
    e = plan.element_field([c.weight for c in res.channels], np.radians([c.offset_deg for c in res.channels]))
    step = 2 * np.pi / 16
    q = np.exp(1j * np.round(np.angle(e) / step) * step)
    rq = demux.evaluate_multiplex(res.channels, wavelength_nm=LAM, aperture_diameter_um=diameter_um,
                                  period_nm=PERIOD, field=q, plan=plan)
    print(_line("16-lev", rq) + "   (optimised channels, phase quantised to 16 levels)")
    print("design-file term:\n[[phase]]\nkind = \"multiplex\"\nchannels = [")
    for c in res.channels:
        print(f"  {{ charge = {c.charge}, angle_deg = {c.angle_deg}, azimuth_deg = {c.azimuth_deg}, "
              f"weight = {c.weight}, offset_deg = {c.offset_deg} }},")
    print("]")
    return before, res


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--diameter-um", type=float, default=150.0)
    ap.add_argument("--evaluations", type=int, default=1200)
    args = ap.parse_args(argv)
    d = args.diameter_um
    square = (Channel(-2, 3.0, 0.0), Channel(-1, 3.0, 90.0), Channel(1, 3.0, 180.0), Channel(2, 3.0, 270.0))
    study("bundled example layout (square)", square, d, args.evaluations)
    for charges in ((-2, -1, 1, 2), (-2, -1, 1, 2, 3)):
        t0 = time.perf_counter()
        ring = demux.design_ring_layout(charges, 3.0, wavelength_nm=LAM, aperture_diameter_um=d, period_nm=PERIOD)
        print(f"\n(design_ring_layout for {len(charges)} channels: {time.perf_counter() - t0:.1f} s)")
        study(f"designed ring, {len(charges)} channels", ring, d, args.evaluations)


if __name__ == "__main__":
    main()
