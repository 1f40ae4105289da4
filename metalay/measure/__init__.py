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
``camerasim.py``    simulated camera images from independent formulas (tests, set-up)       ``fork_scene``, ...
==================  ======================================================================  ========================

Imports: design, checks (the far field at chosen directions), errors.
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
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
