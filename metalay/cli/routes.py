"""``metalay routes``: compile one design to other fabrication routes (etch masks, fork grating, SLM image,
orientation map) and compare their optics. Thin layer over :mod:`metalay.routes`; only this module prints."""

from __future__ import annotations

from pathlib import Path

__all__ = ["add_parser", "run"]

_ACTIONS = ("etch", "fork", "slm", "orient", "compare", "all")


def add_parser(subparsers) -> None:
    """Register ``metalay routes <action> DESIGN -o OUT``."""
    p = subparsers.add_parser("routes", help="same target, other fabrication routes: multi-level etch masks, "
                                             "fork grating, SLM phase image, orientation map, comparison table")
    sub = p.add_subparsers(dest="route_action", required=True)
    helps = {"etch": "k binary masks of a 2^k-level etched phase plate (GDSII) + depths and efficiency",
             "fork": "binary fork grating mask (GDSII) with line-width and gap check",
             "slm": "8/16-bit grayscale PNG of the wrapped phase for a spatial light modulator",
             "orient": "fast-axis angle map (16-bit PNG + CSV) for a patterned retarder",
             "compare": "table of first-order efficiency and mode purity of every route",
             "all": "every route above, then the comparison"}
    for action in _ACTIONS:
        q = sub.add_parser(action, help=helps[action])
        q.add_argument("design", help="design file (.toml); route settings in its [routes] table")
        q.add_argument("-o", "--output", type=Path, help="output folder (default: out/<design stem>-routes)")
        if action in ("etch", "all", "compare"):
            q.add_argument("--levels", type=int, help="override routes.etch.levels (power of two, 2..256)")
        q.set_defaults(func=run)


def _settings(design, args):
    from dataclasses import replace

    from metalay.routes.routes import parse_routes

    if getattr(args, "levels", None) is not None:
        raw = dict(design.raw)
        routes = dict(raw.get("routes", {}) or {})
        etch = dict(routes.get("etch", {}) or {})
        etch["levels"] = args.levels
        routes["etch"] = etch
        raw["routes"] = routes
        design = replace(design, raw=raw)
    return design, parse_routes(design)


def run(args) -> int:
    """Run one ``routes`` action; returns the exit code (0)."""
    from metalay.api import prepare_design
    from metalay.design.spec import load_design
    from metalay.mask.compile import SAFETY_CAUTION
    from metalay.routes import routes as R

    design = prepare_design(load_design(args.design))[0]  # optimised multiplex encodings, as compile writes them
    design, settings = _settings(design, args)
    out = args.output or Path("out") / f"{Path(args.design).stem}-routes"
    name = design.name
    db_unit_nm = design.mask.db_unit_nm
    action = args.route_action
    written = []
    if action in ("etch", "all"):
        e = R.etch_masks(design, settings, with_level_areas=settings.etch.levels <= 16)
        written += R.write_etch(e, out, name, split=settings.etch.split, db_unit_nm=db_unit_nm)
        print(f"etch: {e.levels} levels = {len(e.masks)} masks, {e.material}, n = {e.index:.5f} at "
              f"{e.wavelength_nm:g} nm")
        for j, (d, (ly, dt), m, a) in enumerate(zip(e.depths_nm, e.layers, e.masks, e.mask_area_um2), start=1):
            print(f"  mask {j}: etch depth {d:9.2f} nm  layer {ly}/{dt}  {len(m)} polygons  etched area "
                  f"{a:.6g} um^2")
        print(f"  level step {e.step_nm:.2f} nm, deepest {e.max_depth_nm:.2f} nm")
        if e.spiral_step_nm:
            print(f"  continuous spiral plate of charge {e.charge}: total step {e.spiral_step_nm:.2f} nm "
                  "(l lambda / (n - 1))")
        print(f"  expected first-order efficiency sinc^2(1/{e.levels}) = {e.efficiency_expected:.4f}")
        if e.level_area_um2 is not None:
            frac = e.level_area_um2 / e.aperture_area_um2
            print("  level area fractions: " + " ".join(f"{v:.4f}" for v in frac))
        print(f"  boundary error {e.boundary_error_um * 1e3:.2f} nm (outside {e.core_radius_um:.2f} um of vortex "
              f"cores), aperture outline {e.aperture_error_um * 1e3:.2f} nm, snapping "
              f"{e.snap_error_um * 1e3:.2f} nm")
        for w in e.warnings:
            print(f"  warning: {w}")
    if action in ("fork", "all"):
        f = R.fork_grating(design, settings)
        written += R.write_fork(f, out, name, db_unit_nm=db_unit_nm)
        print(f"fork: {f.kind} grating, period {f.period_um:g} um, duty {f.duty:g}, charge {f.charge}, "
              f"{len(f.rings)} polygons on layer {f.layer[0]}/{f.layer[1]}")
        if f.etch_depth_nm:
            print(f"  etch depth (pi step) {f.etch_depth_nm:.2f} nm")
        rl, rg = f.rules["narrow_lines"], f.rules["narrow_gaps"]
        print(f"  rules: lines < {f.rules['min_line_um']:g} um: {rl['count']} ({rl['near_core']} at the fork core), "
              f"gaps < {f.rules['min_gap_um']:g} um: {rg['count']} ({rg['near_core']} at the fork core)")
        print(f"  expected first-order efficiency {f.efficiency_expected:.4f}; boundary error "
              f"{f.boundary_error_um * 1e3:.2f} nm")
        for w in f.warnings:
            print(f"  warning: {w}")
    if action in ("slm", "all"):
        s = R.slm_image(design, settings)
        written += R.write_slm(s, out, name)
        h, w = s.gray.shape
        print(f"slm: {w} x {h} px, pitch {s.pitch_um:g} um, {s.bit_depth}-bit, {int(s.inside.sum())} px inside the "
              f"aperture, largest encoding error {s.max_error_rad:.4f} rad")
        for wn in s.warnings:
            print(f"  warning: {wn}")
    if action in ("orient", "all"):
        o = R.orientation_map(design, settings)
        written += R.write_orientation(o, out, name)
        h, w = o.code.shape
        print(f"orient: {w} x {h} px, pitch {o.pitch_um:g} um, fast-axis angle theta = sigma phi / 2 mod pi")
    if action in ("compare", "all"):
        rows = R.compare_routes(design, settings)
        from metalay.util.atomic import atomic_write_text

        lines = R.format_table(rows)
        written.append(atomic_write_text(Path(R.ensure_dir(out)) / f"{name}_routes_compare.txt",
                                         "\n".join(lines) + "\n"))
        print(f"compare (grid {settings.compare_samples} samples across the aperture):")
        for line in lines:
            print("  " + line)
    print(f"output folder: {out}  ({len(written)} files)")
    print(SAFETY_CAUTION)
    return 0
