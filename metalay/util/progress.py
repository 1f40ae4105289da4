"""Progress bars for long stages (tqdm), silent when stderr is not a terminal or when disabled."""

from __future__ import annotations

import sys

from tqdm import tqdm

__all__ = ["progress"]


def progress(iterable=None, *, total=None, desc: str = "", enabled: bool | None = None, unit: str = "it"):
    """Wrap ``iterable`` in a tqdm bar.

    Parameters
    ----------
    iterable : iterable, optional
        What to iterate over.
    total : int, optional
        Number of steps, when ``iterable`` has no length.
    desc : str
        Label shown left of the bar.
    enabled : bool or None
        ``None`` shows the bar only when stderr is a terminal; ``False`` never shows it.
    """
    if enabled is None:
        enabled = sys.stderr.isatty()
    return tqdm(iterable, total=total, desc=desc, disable=not enabled, unit=unit, leave=False, file=sys.stderr)
