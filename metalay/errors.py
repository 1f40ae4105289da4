"""One exception root for metalay; the CLI turns these into one-line messages and exit codes."""

__all__ = ["MetalayError", "DesignError", "LibraryError", "MaskReadError", "OutputError"]


class MetalayError(Exception):
    """Root of every error metalay raises on bad input. ``exit_code`` is what the CLI returns."""

    exit_code = 2


class DesignError(MetalayError):
    """A design file (or a value in it) is invalid. Message names file, key, value and allowed range."""


class LibraryError(MetalayError):
    """A cell library file is missing, malformed or lacks what the design needs."""


class MaskReadError(MetalayError):
    """A GDSII/OASIS file cannot be read (truncated, malformed, hostile)."""

    exit_code = 3


class OutputError(MetalayError):
    """An output path cannot be written."""
