"""Every error metalay raises on bad input: one root, one class per kind, each with its command-line exit code.

Library code raises these with a one-line message naming the file, the dotted key, the value and the allowed
range or options (:mod:`metalay.validate` writes those for TOML files); only :mod:`metalay.cli` turns them into
``metalay: error: ...`` and the exit code. Anything else that escapes is an internal fault (exit code 70).

===================  =========  ===========================================================================
class                exit code  raised for
===================  =========  ===========================================================================
``MetalayError``     2          root: bad input of any kind
``DesignError``      2          a design file or a value in it (also the ``[routes]`` table)
``LibraryError``     2          a cell library file is missing, malformed or lacks what the design needs
``CellBuildError``   2          a library build spec, ``cells import`` metadata or response table
``MaterialError``    2          unknown material, malformed table, wavelength outside a material's range
``RulesError``       2          a design-rules file or value
``GeometryError``    2          polygons handed to a geometry stage are invalid (not convex, an edge collapses)
``StudyError``       2          bad input to a library comparison or a tolerance study
``OutputError``      2          an output path cannot be written
``MaskReadError``    3          a GDSII/OASIS file cannot be read (truncated, malformed, hostile, over a limit)
``OutputBusyError``  75         another metalay process is writing the same output folder (try again later)
===================  =========  ===========================================================================
"""

__all__ = ["MetalayError", "DesignError", "LibraryError", "CellBuildError", "MaterialError", "RulesError",
           "GeometryError", "StudyError", "OutputError", "MaskReadError", "OutputBusyError"]


class MetalayError(Exception):
    """Root of every error metalay raises on bad input. ``exit_code`` is what the CLI returns."""

    exit_code = 2


class DesignError(MetalayError):
    """A design file (or a value in it) is invalid. Message names file, key, value and allowed range."""


class LibraryError(MetalayError):
    """A cell library file is missing, malformed or lacks what the design needs."""


class CellBuildError(MetalayError):
    """A build spec or an import table is invalid."""


class MaterialError(MetalayError):
    """Unknown material, malformed table, or wavelength outside a material's range."""


class RulesError(MetalayError):
    """A rules file or value is invalid (exit code 2)."""


class GeometryError(MetalayError):
    """Polygons handed to a geometry stage are invalid (not convex and counter-clockwise, an edge collapses)."""


class StudyError(MetalayError):
    """Bad input to a comparison or tolerance study (exit code 2)."""


class MaskReadError(MetalayError):
    """A GDSII/OASIS file cannot be read (truncated, malformed, hostile)."""

    exit_code = 3


class OutputError(MetalayError):
    """An output path cannot be written."""


class OutputBusyError(OutputError):
    """Another metalay process holds the lock of the output folder (exit code 75, EX_TEMPFAIL of sysexits.h:
    a temporary condition, the same command can succeed later)."""

    exit_code = 75
