"""metalay: geometric-phase (Pancharatnam-Berry) metasurface masks from design files.

Architecture map (one subpackage per family of stages, plain data between stages; imports point down this list,
never up; DEVELOPERS.md has the long map)::

    errors.py, validate.py   one exception root with exit codes; the one TOML validation helper
    util/                    atomic output (files; whole output folders under a lock), the memory budget,
                             progress bars, allocator setting, lazy package names
    design/                  spec.load_design (TOML -> Design), phase.target_phase, lattice.sample_sites
    cells/                   library.load_library, cellkinds.outline_nm, rcwa.solve (+ rcwa_nv: polygon layers,
                             normal-vector factorisation), materials, cellbuild
    io/                      gdsread.read_mask (GDSII/OASIS -> FlatPolygons), writer.GdsStream (+ gdstk builders)
    mask/                    mapping.assign_cells, layout (snapping), process (bias, tone, write fields, marks),
                             compile.compile_mask(design, out, checks=...) with steps.MaskCheck
    checks/                  rules.check_mask, decode, grid, oam, fringes, optics.check_optics, plots, report,
                             steps.default_checks (the checks a compile runs)
    routes/                  etched plates, fork gratings, SLM images, orientation maps, route comparison
    studies/                 library comparison and fabrication-tolerance Monte Carlo
    api.py                   compile_design = compile_mask + default checks (notebooks and the command line)
    cli/                     thin command line over all of the above (metalay.cli:main)

Conventions: exp(-i omega t); a plane wave to +z is exp(i k z); |sigma> = (x + i sigma y)/sqrt(2); a cell rotated
by theta has Jones matrix R(-theta) diag(t_long, t_short) R(theta). Units are in names (wavelength_nm,
db_unit_nm, ...).
"""

__version__ = "0.1.0"
