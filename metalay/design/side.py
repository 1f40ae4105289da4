"""Which face the mask shows and from which side the light arrives: the frame of the written element.

A GDSII/OASIS file shows the patterned face of the wafer seen from above (from outside the patterned face, looking
down at the structures on their substrate), as the writer exposes it: mask coordinates ``(x_m, y_m)``, and ``+z_m``
pointing out of the patterned face. The light meets that element in one of three ways:

=========================  ==============================  ================================================
case                       travels (mask frame)            frame of the light leaving the element
=========================  ==============================  ================================================
transmission, lit from     ``+z_m`` (substrate first)      ``(x_m, y_m, +z_m)``: the mask frame
the substrate
transmission, lit from     ``-z_m`` (structures first)     ``(x_m, -y_m, -z_m)``: mirrored (``y -> -y``)
the structures
reflection (always lit     arrives along ``-z_m``,         ``(x_m, y_m, +z_m)``: the mask frame; the
from the structures)       leaves along ``+z_m``           arriving light's frame is ``(x_m, -y_m, -z_m)``
=========================  ==============================  ================================================

Design coordinates, phase terms, tilt azimuths and charges are those of the light *leaving* the element, in its
own right-handed frame (x along the mask's x, z along the direction of travel); the input spin ``sigma`` is that
of the *arriving* light in its own frame (``|sigma> = (x + i sigma y)/sqrt(2)``). An element rotated by
``theta_m`` in the mask frame is rotated by ``-theta_m`` in a frame whose y axis is reversed, and the converted
light carries ``exp(2 i sigma theta)`` with ``theta`` measured in the arriving light's frame (Bomzon et al. 2002).
Hence the rotation written at mask site ``(x_m, y_m)`` for a target phase ``phi`` of the leaving light:

* transmission, lit from the substrate:   ``theta_m = sigma phi(x_m, y_m) / 2``;
* transmission, lit from the structures:  ``theta_m = -sigma phi(x_m, -y_m) / 2`` (mirrored element);
* reflection:                             ``theta_m = -sigma phi(x_m, y_m) / 2``.

A vortex charge is mirror-invariant (the same written mask makes charge ``l`` from either face), a lens or a tilt
is not: a geometric-phase lens written for one face focuses one spin and diverges it when lit from the other face,
and a tilt deflects the other way (Hasman et al. 2003). Propagation-phase cells carry no spin: only the mirror of
positions applies to them.

References
----------
Bomzon, Biener, Kleiner & Hasman 2002, Opt. Lett. 27, 1141 (geometric phase ``2 sigma theta``).
Hasman, Kleiner, Biener & Niv 2003, Appl. Phys. Lett. 82, 328 (geometric-phase lens: opposite spins focus and
diverge).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from metalay.errors import DesignError

__all__ = ["LIT_FROM", "Facing", "resolve_facing"]

#: Values of the design key ``design.lit_from`` and of a library's ``lit_from``.
LIT_FROM = ("substrate", "structures")


@dataclass(frozen=True)
class Facing:
    """The side the light arrives from, for a transmission or reflection element.

    Attributes
    ----------
    lit_from : {"substrate", "structures"}
        Where the light arrives: through the substrate, or onto the patterned face.
    mode : {"transmission", "reflection"}
        What leaves the element: transmitted or reflected light.
    source : str
        Where the choice came from: ``"design"``, ``"library"``, or ``"assumed"`` (neither says; the compile's
        writing verdict is then "warn").
    """

    lit_from: str = "substrate"
    mode: str = "transmission"
    source: str = "design"

    @property
    def rotation_sign(self) -> int:
        """``s`` in ``theta_m = s sigma phi / 2``: +1 lit through the substrate in transmission, else -1."""
        return 1 if (self.mode == "transmission" and self.lit_from == "substrate") else -1

    @property
    def mirror_y(self) -> bool:
        """Whether the leaving light's frame has ``y = -y_m`` (transmission lit from the structures)."""
        return self.mode == "transmission" and self.lit_from == "structures"

    def beam_xy(self, x_um, y_um):
        """Coordinates in the leaving light's frame of mask points ``(x_um, y_um)`` (and back: an involution)."""
        y = np.asarray(y_um, dtype=np.float64)
        return np.asarray(x_um, dtype=np.float64), (-y if self.mirror_y else y)

    def describe(self) -> str:
        """The side in words (manifest, reports)."""
        face = ("The mask file shows the patterned face seen from above (structures towards the viewer), as the "
                "writer exposes it.")
        if self.mode == "reflection":
            return (f"{face} Light arrives onto the structures and is reflected back towards its source; the design "
                    "describes the reflected light in its own frame, which is the frame of the mask file (no "
                    "mirroring of positions), while the element rotations are negated because the arriving spin "
                    "is seen from the other face (theta = -sigma phi / 2).")
        if self.lit_from == "substrate":
            return (f"{face} Light arrives through the substrate and leaves from the structures: it sees the element "
                    "as the file shows it (theta = sigma phi / 2, no mirroring).")
        return (f"{face} Light arrives onto the structures and leaves through the substrate: it sees the element "
                "mirrored (y -> -y, theta -> -theta), so the file holds the mirror image of the design "
                "(theta(x, y) = -sigma phi(x, -y) / 2).")

    def describe_source(self) -> str:
        """Where the side came from, in words."""
        return {"design": "stated by the design (design.lit_from)",
                "library": "the side the library's responses were computed for (design.lit_from not given)",
                "assumed": "ASSUMED: neither the design nor the library says; set design.lit_from"}[self.source]

    def as_dict(self) -> dict:
        """JSON-ready record (manifest, optics report)."""
        return {"lit_from": self.lit_from, "mode": self.mode, "source": self.source,
                "rotation_sign": self.rotation_sign, "mirrored_y": self.mirror_y, "in_words": self.describe(),
                "chosen_by": self.describe_source()}


def resolve_facing(lit_from: str | None, *, mode: str, library_lit_from: str | None, library_name: str,
                   where: str) -> Facing:
    """The facing of a compile: the design's ``lit_from``, else the library's side.

    Parameters
    ----------
    lit_from : {"substrate", "structures"} or None
        The design's ``design.lit_from`` (None: not given).
    mode : {"transmission", "reflection"}
        The library's mode.
    library_lit_from : str or None
        The side the library's responses were computed for (``CellLibrary.side`` of :mod:`metalay.cells.library`).
    library_name : str
        For messages.
    where : str
        The design file, for messages.

    Returns
    -------
    Facing
        When neither the design nor the library gives a side: ``"substrate"`` with ``source = "assumed"`` (the
        compile flags it with a "warn" verdict and a warning; state ``design.lit_from`` to settle it).

    Raises
    ------
    DesignError
        A reflection element lit through the substrate.
    """
    if lit_from is None:
        if library_lit_from is None:
            return Facing("substrate", mode, "assumed")
        return Facing(library_lit_from, mode, "library")
    if mode == "reflection" and lit_from != "structures":
        raise DesignError(f"{where}: key 'design.lit_from' = {lit_from!r}: library {library_name!r} is a reflection "
                          "library, lit from the structure side; allowed: 'structures'")
    return Facing(lit_from, mode, "design")
