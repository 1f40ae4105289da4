"""Elements that measure OAM, and reading the charge from measured images.

==================  ======================================================================  ========================
module              stage                                                                   public entry
==================  ======================================================================  ========================
``sorter.py``       log-polar mode sorter: unwrapper and corrector phase terms, fan-out     ``sorter_parameters``,
                    copier, two-element optical check (angular spectrum + Fourier lens)     ``sorter_check``
``demux.py``        demultiplexer channel layouts (carriers on a ring), isolation by a      ``design_ring_layout``,
                    direct sum at the channel directions, encoding optimiser                ``optimise_multiplex``
``imagecharge.py``  topological charge from camera images (fork, spiral, triangular         ``read_image``,
                    aperture); the triangular aperture as mask geometry                     ``read_fork``, ...
``camerasim.py``    simulated camera images from independent formulas (tests, set-up)       ``fork_scene``, ...,
                                                                                            ``simulate_image``
``sortermask.py``   the sorter check of written masks (decode each element, propagate,      ``check_sorter``,
                    verdict from thresholds) and its report (JSON, PNG, HTML)               ``write_sorter_report``
``sorterplan.py``   sorter parameters for a wavelength, aperture and spacing; the element   ``plan_sorter``,
                    design files                                                            ``write_element_designs``
``aperture.py``     the triangular aperture as a mask (GDSII/OASIS on its own layer) with   ``write_triangle_aperture``
                    a manifest; spec files
==================  ======================================================================  ========================

The sorter's phase terms and parameter choice live in :mod:`metalay.design.logpolar` (design files carry them as
kind ``mode_sorter``); :mod:`sorter` re-exports them.

Imports: design, io (writers and reader), mask (layout polygons), checks (decoding, site fields, far field at
chosen directions, plots, report), util, validate, errors.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "sorter_parameters": "sorter",
    "sorter_check": "sorter",
    "LogPolarUnwrapper": "sorter",
    "LogPolarCorrector": "sorter",
    "design_ring_layout": "demux",
    "evaluate_multiplex": "demux",
    "optimise_multiplex": "demux",
    "optimise_design_encodings": "demux",
    "read_image": "imagecharge",
    "read_fork": "imagecharge",
    "read_spiral": "imagecharge",
    "read_triangle": "imagecharge",
    "triangle_aperture": "imagecharge",
    "read_charge_file": "imagecharge",
    "simulate_image": "camerasim",
    "check_sorter": "sortermask",
    "write_sorter_report": "sortermask",
    "plan_sorter": "sorterplan",
    "write_element_designs": "sorterplan",
    "write_triangle_aperture": "aperture",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
