"""metalay: geometric-phase (Pancharatnam-Berry) metasurface masks from design files.

Architecture map (one module per pipeline stage, plain data between stages)::

    spec.load_design(path)            TOML -> Design (frozen, validated; errors name file, key, range)
    phase.target_phase(terms, x, y)   sum of phase terms (vortex, tilt, lens, axicon, qplate, multiplex, map)
    lattice.sample_sites(ap, lat)     site centres of whole cells inside the aperture (tile = band of rows)
    library.load_library(name)        unit-cell library (JSON + CSV): cells, rules, responses, provenance
    mapping.assign_cells(phi, lib)    cell + rotation per site: theta = sigma*phi/2 mod pi, optional K levels
    cellkinds.outline_nm(cell)        outline of a cell kind at rotation 0
    layout.element_offsets(...)       rotated outlines snapped to the database grid; grouping; frame; label
    writer.GdsStream / gdstk          flat GDSII stream writer; OASIS and hierarchical GDSII via gdstk
    compile.compile_design(d, out)    the pipeline, tile by tile, + manifest.json
    gdsread.read_mask(path)           vectorised mask reader (GDSII record walk, OASIS via gdstk)
    rules.check_mask(...)             design-rule check (shapely STRtree + lattice fast path)
    optics.check_optics(...)          near field from the written mask -> far field, OAM spectrum, metrics
    rcwa / rcwa_nv / materials / cellbuild   unit-cell solver (polygon layers, normal vectors), optical constants,
                                      library builder
    cli.main                          thin command line over all of the above

Conventions: exp(-i omega t); a plane wave to +z is exp(i k z); |sigma> = (x + i sigma y)/sqrt(2); a cell rotated
by theta has Jones matrix R(-theta) diag(t_long, t_short) R(theta). Units are in names (wavelength_nm, ...).
"""

__version__ = "0.1.0"
