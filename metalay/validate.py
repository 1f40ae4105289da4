"""The one TOML validation helper: every TOML file metalay reads goes through it.

Design files (:mod:`metalay.design.spec`), the ``[routes]`` table (:mod:`metalay.routes.routes`), rules files
(:mod:`metalay.checks.rules`), build specs and ``cells import`` metadata (:mod:`metalay.cells.cellbuild`) are read
with :func:`load_toml` and walked with :class:`TomlTable`. Every failure is one line naming the file, the dotted
key, the value and the allowed range or options::

    design.toml: key 'design.wavelength_nm' = -532.0: out of range, allowed (>= 100.0 and <= 20000.0)
    rules.toml: unknown key 'layers[0].min_widht_nm' (allowed here: [...])

Each caller chooses the :class:`~metalay.errors.MetalayError` subclass raised (``error=``), so the command line
maps it to its exit code.

Example
-------
>>> t = TomlTable({"lattice": {"period_nm": 325.0}}, "d.toml")
>>> lat = t.table("lattice")
>>> lat.number("period_nm", lo=10.0, hi=1e5)
325.0
>>> lat.check_unknown()
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Iterable
from pathlib import Path

from metalay.errors import DesignError, MetalayError

__all__ = ["TomlTable", "load_toml", "range_text"]

_MISSING = ...


def load_toml(path: str | Path, *, what: str, error: type[MetalayError] = DesignError) -> dict:
    """Read a TOML file; any failure is one ``error`` line naming the file.

    Parameters
    ----------
    path : str or Path
        The file.
    what : str
        What the file is, for the message (``"design file"``, ``"rules file"``, ``"build spec"``).
    error : MetalayError subclass
        Raised on a missing, unreadable, non-UTF-8 or malformed file.

    Returns
    -------
    dict
        The parsed document (validate it with :class:`TomlTable`).
    """
    path = Path(path)
    where = str(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError as exc:
        raise error(f"{where}: {what} not found") from exc
    except OSError as exc:
        raise error(f"{where}: cannot read {what} ({exc.strerror or exc})") from exc
    try:
        return tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise error(f"{where}: not UTF-8 text") from exc
    except tomllib.TOMLDecodeError as exc:
        raise error(f"{where}: not valid TOML ({exc})") from exc


def range_text(lo=None, hi=None, lo_open: bool = False) -> str:
    """The allowed range as text, e.g. ``(>= 100.0 and <= 20000.0)``; empty when unbounded."""
    if lo is None and hi is None:
        return ""
    if hi is None:
        return f"({'>' if lo_open else '>='} {lo})"
    if lo is None:
        return f"(<= {hi})"
    return f"({'>' if lo_open else '>='} {lo} and <= {hi})"


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


class TomlTable:
    """Typed access to one TOML table; errors name the file and the dotted key.

    Parameters
    ----------
    data : dict
        The table.
    where : str
        The file (first word of every message).
    prefix : str
        Dotted path of this table including the trailing dot (``"mask.write_field."``); empty at the top.
    error : MetalayError subclass
        Raised on invalid values (default :class:`~metalay.errors.DesignError`).

    Notes
    -----
    Every key read (or given a default) is remembered; :meth:`check_unknown` then refuses any other key, so a
    misspelt key is an error rather than silently ignored.
    """

    def __init__(self, data: dict, where: str, prefix: str = "", *, error: type[MetalayError] = DesignError):
        self.data = data
        self.where = where
        self.prefix = prefix
        self.error = error
        self.used: set[str] = set()

    def key(self, k: str) -> str:
        """Dotted path of key ``k``."""
        return f"{self.prefix}{k}"

    def fail(self, k: str, value, allowed: str):
        """Raise the one-line error for key ``k`` holding ``value``."""
        raise self.error(f"{self.where}: key '{self.key(k)}' = {value!r}: {allowed}")

    def has(self, k: str) -> bool:
        return k in self.data

    def raw(self, k: str, default=_MISSING):
        """The value as parsed (``default`` when absent; missing and no default is an error)."""
        self.used.add(k)
        if k not in self.data:
            if default is _MISSING:
                raise self.error(f"{self.where}: missing key '{self.key(k)}'")
            return default
        return self.data[k]

    def number(self, k: str, default=_MISSING, *, lo=None, hi=None, lo_open: bool = False, integer: bool = False,
               allowed: str | None = None):
        """A finite number (an integer with ``integer=True``) in ``[lo, hi]`` (``(lo, hi]`` with ``lo_open``).

        ``allowed`` replaces the generated range text (``"expected <allowed>"``) where a file's documented
        wording differs.
        """
        v = self.raw(k, default)
        if v is None:
            return v
        rng = range_text(lo, hi, lo_open)
        kind = "an integer" if integer else "a number"
        if not _is_number(v) or (integer and not isinstance(v, int)):
            self.fail(k, v, f"expected {allowed}" if allowed else f"expected {kind} {rng}".rstrip())
        if isinstance(v, float) and not math.isfinite(v):
            self.fail(k, v, f"expected {allowed}" if allowed else f"must be finite {rng}".rstrip())
        if lo is not None and (v < lo or (lo_open and v == lo)) or hi is not None and v > hi:
            self.fail(k, v, f"expected {allowed}" if allowed else f"out of range, allowed {rng}")
        return v

    def string(self, k: str, default=_MISSING, *, options=None):
        """A string (one of ``options`` when given)."""
        v = self.raw(k, default)
        if v is None:
            return v
        if not isinstance(v, str):
            self.fail(k, v, "expected a string" + (f", one of {list(options)}" if options else ""))
        if options is not None and v not in options:
            self.fail(k, v, f"not one of {list(options)}")
        return v

    def boolean(self, k: str, default=_MISSING):
        """``true`` or ``false``."""
        v = self.raw(k, default)
        if not isinstance(v, bool):
            self.fail(k, v, "expected true or false")
        return v

    def numbers(self, k: str, default=_MISSING, *, length: int | None = None, lo=None, hi=None,
                integer: bool = False, allowed: str):
        """A list of numbers (``length`` of them when given, each in ``[lo, hi]``); ``allowed`` names the form."""
        v = self.raw(k, default)
        if v is None:
            return v
        ok = isinstance(v, list) and (length is None or len(v) == length) and all(
            _is_number(x) and (not integer or isinstance(x, int)) and math.isfinite(x)
            and (lo is None or x >= lo) and (hi is None or x <= hi) for x in v)
        if not ok:
            self.fail(k, v, f"expected {allowed}")
        return v

    def table(self, k: str, default=_MISSING) -> "TomlTable":
        """A sub-table (``default`` usually ``{}`` for an optional one)."""
        v = self.raw(k, default)
        if not isinstance(v, dict):
            self.fail(k, v, "expected a table")
        return TomlTable(v, self.where, f"{self.key(k)}.", error=self.error)

    def tables(self, k: str, *, max_count: int | None = None) -> list["TomlTable"]:
        """A non-empty array of tables ``[[k]]`` (at most ``max_count``), each as a :class:`TomlTable`."""
        v = self.raw(k)
        if not isinstance(v, list) or not v or (max_count is not None and len(v) > max_count):
            count = f"1 to {max_count}" if max_count is not None else "a non-empty list of"
            self.fail(k, v, f"expected {count} [[{self.key(k)}]] tables")
        out = []
        for n, t in enumerate(v):
            if not isinstance(t, dict):
                self.fail(f"{k}[{n}]", t, "expected a table")
            out.append(TomlTable(t, self.where, f"{self.key(k)}[{n}].", error=self.error))
        return out

    def check_unknown(self, allowed: Iterable[str] | None = None):
        """Refuse keys that were not read (or are not in ``allowed``), naming the first one."""
        known = set(self.used) if allowed is None else set(allowed)
        unknown = sorted(set(self.data) - known)
        if unknown:
            raise self.error(f"{self.where}: unknown key '{self.key(unknown[0])}' (allowed here: "
                             f"{sorted(known)})")
